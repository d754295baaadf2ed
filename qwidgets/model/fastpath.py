"""PyTorch's attention fast path, switched off while qwidgets runs a model.

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

__all__ = ["attention_fastpath_off", "without_fastpath"]


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
    before = torch.backends.mha.get_fastpath_enabled()
    torch.backends.mha.set_fastpath_enabled(False)
    try:
        yield
    finally:
        torch.backends.mha.set_fastpath_enabled(before)


def without_fastpath(fn):
    """Decorator: ``fn`` runs inside :func:`attention_fastpath_off` (public entry points)."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        with attention_fastpath_off():
            return fn(*args, **kwargs)

    return wrapper
