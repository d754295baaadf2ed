"""PyTorch's attention fast path, switched off while qwidgets runs a model.

The one place that switches it: every pass (scan, evaluation, refinement, export, taps
kept on a planned copy) goes through :func:`attention_fastpath_off` or the
:func:`switch_fastpath_off` / :func:`restore_fastpath` pair.

In eval mode ``nn.MultiheadAttention`` and ``nn.TransformerEncoder(Layer)`` take a fused
kernel (``torch._transformer_encoder_layer_fwd``, ``torch._native_multi_head_attention``)
that hooks cannot see into, that skips the projections' own modules, and that the ONNX
exporter cannot write. Every pass qwidgets runs (scan, evaluation, refinement, export) runs
with it off, so what is measured is the decomposed attention a quantized model computes;
the user's setting (``torch.backends.mha.get_fastpath_enabled()``) is restored afterwards,
also when the pass raises. The switch is process-wide, like the user's own.
"""

from __future__ import annotations

import functools
from contextlib import contextmanager

import torch

__all__ = ["attention_fastpath_off", "without_fastpath", "switch_fastpath_off", "restore_fastpath"]


def switch_fastpath_off() -> bool:
    """Switch the fast path off; return the setting it had (for :func:`restore_fastpath`).
    For passes bracketed by hooks rather than a ``with`` block (a planned copy's forward)."""
    before = torch.backends.mha.get_fastpath_enabled()
    torch.backends.mha.set_fastpath_enabled(False)
    return before


def restore_fastpath(before: bool) -> None:
    """Put back the setting :func:`switch_fastpath_off` returned."""
    torch.backends.mha.set_fastpath_enabled(before)


@contextmanager
def attention_fastpath_off():
    """Switch the attention fast path off inside the block; the previous setting after.

    >>> import torch
    >>> before = torch.backends.mha.get_fastpath_enabled()
    >>> with attention_fastpath_off():
    ...     torch.backends.mha.get_fastpath_enabled()
    False
    >>> torch.backends.mha.get_fastpath_enabled() == before
    True
    """
    before = switch_fastpath_off()
    try:
        yield
    finally:
        restore_fastpath(before)


def without_fastpath(fn):
    """Decorator: ``fn`` runs inside :func:`attention_fastpath_off` (public entry points)."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        with attention_fastpath_off():
            return fn(*args, **kwargs)

    return wrapper
