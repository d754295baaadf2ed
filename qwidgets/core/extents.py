"""Clipping extents of the rows of a fit: per-row min-max or percentile, before any search.

A row whose extent is zero (an all-zero channel) takes the widest extent of its tensor (1.0 when
every value is zero), so every scale is > 0; rows of different tensors fitted together
(:func:`qwidgets.core.fit_groups.fit_together`) take their extents from their own tensor.
"""

from __future__ import annotations

import math

import torch

from .clip_search import GridSpec

__all__ = ["sym_extent", "asym_extent", "quantile_rows"]


def sym_extent(xf: torch.Tensor, spec: GridSpec, method: str, pct: float) -> torch.Tensor:
    """Per-channel clipping extent r (float64, shape (C,)) for a symmetric grid."""
    a = xf.abs() if spec.signed else xf.clamp(min=0)
    r = quantile_rows(a, pct) if method == "percentile" else a.amax(dim=1)
    return _nonzero(r.double())


def asym_extent(xf: torch.Tensor, method: str, pct: float):
    """Per-channel range (lo, hi), widened to contain zero (float64, shape (C,) each)."""
    if method == "percentile":
        lo, hi = quantile_rows(xf, 100.0 - pct), quantile_rows(xf, pct)
    else:
        lo, hi = xf.amin(dim=1), xf.amax(dim=1)
    lo, hi = lo.double().clamp(max=0), hi.double().clamp(min=0)
    width = _nonzero(hi - lo)
    return lo, lo + width


def _nonzero(r: torch.Tensor) -> torch.Tensor:
    """Replace zero extents (all-zero channels) by the widest one, or 1.0, so scale > 0."""
    if bool((r > 0).all()):
        return r
    fill = float(r.max()) if bool((r > 0).any()) else 1.0
    return torch.where(r > 0, r, torch.full_like(r, fill))


def quantile_rows(x2d: torch.Tensor, pct: float) -> torch.Tensor:
    """Per-row percentile with linear interpolation (numpy's default), via kthvalue (no size cap)."""
    m = x2d.shape[1]
    pos = (m - 1) * pct / 100.0
    k0 = min(int(math.floor(pos)), m - 1)
    frac = pos - k0
    v0 = x2d.kthvalue(k0 + 1, dim=1).values.double()
    if frac == 0.0 or k0 + 1 >= m:
        return v0
    v1 = x2d.kthvalue(k0 + 2, dim=1).values.double()
    return v0 + frac * (v1 - v0)
