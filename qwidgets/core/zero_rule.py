"""The one zero-point rule of every grid (see ``UniformGrid.zero_point``)."""

from __future__ import annotations

import torch

__all__ = ["ZP_TOLERANCE", "integer_zero_point", "zero_points", "derived_offset"]

# One rule decides whether a grid has an integer zero point Z (offset == -Z * scale): -offset /
# scale must lie within ZP_TOLERANCE * max(1, |Z|) of an integer. That is 4 float32 machine
# epsilons: the rounding that storing -Z * scale in float32 may cost, and nothing more, so a
# grid that has Z computes every value as (k - Z) * scale exactly. Grids decide it once, when
# they are made (``UniformGrid.zero_point``); quantization, export and the plan files all use
# that decision.
ZP_TOLERANCE = 4 * torch.finfo(torch.float32).eps


def integer_zero_point(scale, offset):
    """The integer Z with ``offset == -Z * scale`` under the one tolerance, or None.

    ``scale`` and ``offset`` are floats or tensors (broadcast against each other). Returns an
    int for scalars, an int64 tensor for tensors, or None when any entry is not an integer
    multiple (a grid has a zero point for all its channels or it has none).

    >>> integer_zero_point(0.1, -0.3), integer_zero_point(0.1, -(0.3 + 2e-5))
    (3, None)
    """
    z, whole = zero_points(scale, offset)
    return z if whole is True else None


def zero_points(scale, offset):
    """Entry by entry: ``(Z, whole)``, Z the nearest integer to ``-offset / scale`` where it is one
    under the tolerance (0 elsewhere) and ``whole`` True when every entry is, False when none
    is, else a bool tensor (a per-channel grid may have integer zero points on some channels)."""
    tensors = isinstance(scale, torch.Tensor) or isinstance(offset, torch.Tensor)
    # the decision is made in float64 on the stored values, whatever dtype later computes with them
    with torch.no_grad():
        s = torch.as_tensor(scale.detach() if isinstance(scale, torch.Tensor) else scale, dtype=torch.float64)
        o = torch.as_tensor(offset.detach() if isinstance(offset, torch.Tensor) else offset, dtype=torch.float64)
        z = -o / s
        zr = torch.round(z)
        mask = torch.abs(z - zr) <= ZP_TOLERANCE * torch.clamp(torch.abs(zr), min=1.0)
        zr = torch.where(mask, zr, 0.0) + 0.0
    if bool(mask.all()):
        whole = True
    elif not bool(mask.any()):
        whole = False
    else:
        whole = mask
    if zr.dim() == 0 or not tensors:
        return int(zr), whole
    return zr.to(torch.int64), whole


def derived_offset(zp, whole, scale, offset):
    """``-zp * scale`` in the type the offset was given in (a learned offset keeps its graph),
    on the entries that have an integer zero point (``whole``)."""
    if isinstance(offset, torch.Tensor) and offset.requires_grad:
        return offset  # learning: the value stays as given, quantization computes (k - Z) * s
    if whole is not True:  # some channels only: derive those, keep the others
        s = scale.detach() if isinstance(scale, torch.Tensor) else torch.tensor(float(scale))
        o = offset.detach() if isinstance(offset, torch.Tensor) else torch.tensor(float(offset), dtype=s.dtype)
        derived = -(torch.as_tensor(zp, dtype=s.dtype) * s) + 0.0
        shape = torch.broadcast_shapes(derived.shape, o.shape, whole.shape)
        return torch.where(whole.reshape(shape) if whole.numel() > 1 else whole, derived.to(o.dtype), o)
    if not bool(torch.as_tensor(zp).any()):  # Z = 0: offset 0, in the type it was given
        return torch.zeros_like(offset) if isinstance(offset, torch.Tensor) else 0.0
    if not isinstance(scale, torch.Tensor) and not isinstance(offset, torch.Tensor):
        return -zp * scale + 0.0
    s = scale.detach() if isinstance(scale, torch.Tensor) else torch.tensor(float(scale), dtype=offset.dtype)
    z = torch.as_tensor(zp, dtype=s.dtype)
    value = (-(z * s) + 0.0)
    if isinstance(offset, torch.Tensor):
        value = torch.broadcast_to(value, torch.broadcast_shapes(value.shape, offset.shape))
        return value.to(offset.dtype).reshape(offset.shape) if value.numel() == offset.numel() else value
    return float(value) if value.numel() == 1 else value
