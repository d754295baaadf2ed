"""Naming the weight behind a non-finite value: a NaN in ``c2.weight`` reaches every layer after
``c2``, and the first check that sees it is the next layer's input. On that failure (never on
the normal path) the model's own floating-point parameters and buffers are checked, and the
error names those that hold NaN / inf."""

from __future__ import annotations

import torch
from torch import nn

from ..core.checks import finite_check
from .layers import LayerInputError

__all__ = ["nonfinite_state", "check_layer_input"]


def nonfinite_state(model: nn.Module) -> list[str]:
    """``"'name' (n NaN, m inf of k)"`` for each floating-point parameter or buffer of ``model``
    holding NaN / inf (a tensor shared by several names once, under its first name).

    >>> import torch
    >>> from torch import nn
    >>> net = nn.Sequential(nn.Linear(2, 2), nn.Linear(2, 1))
    >>> with torch.no_grad():
    ...     net[1].weight[0, 0] = float("inf")
    >>> nonfinite_state(net)
    ["'1.weight' (0 NaN, 1 inf of 2)"]
    """
    out, seen = [], set()
    tensors = list(model.named_parameters(remove_duplicate=False)) + list(
        model.named_buffers(remove_duplicate=False))
    for name, t in tensors:
        if t is None or not t.is_floating_point() or id(t) in seen:
            continue
        seen.add(id(t))
        t = t.detach()
        if t.numel() and not bool(torch.isfinite(t.sum())):
            n_nan, n_inf = int(torch.isnan(t).sum()), int(torch.isinf(t).sum())
            if n_nan or n_inf:
                out.append(f"{name!r} ({n_nan} NaN, {n_inf} inf of {t.numel()})")
    return out


def check_layer_input(x: torch.Tensor, where: str, model: nn.Module) -> None:
    """:func:`finite_check` of a layer's input (LayerInputError); when it fails and the model's
    own weights or buffers hold NaN / inf, the error names them."""
    try:
        finite_check(x, where, LayerInputError)
    except LayerInputError:
        bad = nonfinite_state(model)
        if not bad:
            raise
        raise LayerInputError(
            f"the model's {'weight' if len(bad) == 1 else 'weights'} {', '.join(bad)} "
            f"{'holds' if len(bad) == 1 else 'hold'} NaN / inf values, so {where} is not finite "
            "either; quantization needs finite numbers (fix or reload the checkpoint)") from None
