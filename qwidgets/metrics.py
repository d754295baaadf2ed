"""Error measures between a reference tensor and its quantized approximation."""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import torch

from ._prep import as_input, channel_shape, grid_params
from .grid import UniformGrid

__all__ = ["ErrorStats", "GridUsage", "error_stats", "grid_usage"]


@dataclass(frozen=True)
class ErrorStats:
    """How far ``approx`` is from ``reference`` (all sums in float64).

    mse, rmse, max_abs: of the error ``approx - reference``;
    sqnr_db: ``10 log10(sum ref**2 / sum err**2)`` (+inf for zero error);
    rel_err: ``||err|| / ||ref||``; cosine: cosine similarity of the two; n: element count.
    """

    mse: float
    rmse: float
    max_abs: float
    sqnr_db: float
    rel_err: float
    cosine: float
    n: int

    def to_dict(self) -> dict:
        return asdict(self)

    def __str__(self) -> str:
        return (
            f"SQNR {self.sqnr_db:.2f} dB, rel. error {self.rel_err:.3g}, cosine {self.cosine:.6f}, "
            f"RMSE {self.rmse:.3g}, max |error| {self.max_abs:.3g} (n={self.n})"
        )


def error_stats(reference: torch.Tensor, approx: torch.Tensor) -> ErrorStats:
    """Compare ``approx`` with ``reference`` (same shape).

    >>> import torch
    >>> s = error_stats(torch.tensor([1.0, -1.0]), torch.tensor([1.0, -0.9]))
    >>> round(s.sqnr_db, 2), round(s.max_abs, 3)
    (23.01, 0.1)
    """
    ref, _ = as_input(reference, "reference")
    app, _ = as_input(approx, "approx")
    if ref.shape != app.shape:
        raise ValueError(f"reference and approx must have the same shape, got {tuple(ref.shape)} and {tuple(app.shape)}")
    n = ref.numel()
    if n == 0:
        raise ValueError("reference is empty; there is nothing to compare")
    r = ref.detach().double().reshape(-1)
    a = app.detach().double().reshape(-1).to(r.device)
    e = a - r
    sig = float(r.dot(r))
    err = float(e.dot(e))
    app_pow = float(a.dot(a))
    mse = err / n
    if err == 0.0:
        sqnr = math.inf
    elif sig == 0.0:
        sqnr = -math.inf
    else:
        sqnr = 10.0 * math.log10(sig / err)
    rel = math.sqrt(err / sig) if sig > 0 else (0.0 if err == 0 else math.inf)
    if sig > 0 and app_pow > 0:
        cosine = float(r.dot(a)) / math.sqrt(sig * app_pow)
        cosine = max(-1.0, min(1.0, cosine))
    else:
        cosine = 1.0 if sig == app_pow == 0 else 0.0
    return ErrorStats(
        mse=mse,
        rmse=math.sqrt(mse),
        max_abs=float(e.abs().max()),
        sqnr_db=sqnr,
        rel_err=rel,
        cosine=cosine,
        n=n,
    )


@dataclass(frozen=True)
class GridUsage:
    """How a tensor sits on a grid: the clipped fraction and how many grid levels it uses."""

    clipped_fraction: float  # share of values beyond the clip range by more than half a step
    clipped_low: float
    clipped_high: float
    bins_used: int  # distinct codes taken (summed over channels for a per-channel grid)
    n_bins: int  # levels available (times channels for a per-channel grid)

    @property
    def used_fraction(self) -> float:
        return self.bins_used / self.n_bins


def grid_usage(x: torch.Tensor, grid: UniformGrid) -> GridUsage:
    """Clipped fraction and grid levels used by ``x`` on ``grid``.

    >>> import torch
    >>> u = grid_usage(torch.tensor([0.0, 0.1, 5.0]), UniformGrid(2, 1.0))
    >>> u.clipped_fraction, u.bins_used, u.n_bins
    (0.3333333333333333, 2, 4)
    """
    x, _ = as_input(x)
    if x.numel() == 0:
        raise ValueError("x is empty")
    s, o = grid_params(x, grid)
    with torch.no_grad():
        t = (x - o) / s
        low = t < grid.qmin - 0.5
        high = t > grid.qmax + 0.5
        codes = torch.clamp(torch.round(t), grid.qmin, grid.qmax).to(torch.int64) - grid.qmin
        n = x.numel()
        shape = channel_shape(x, grid)
        if shape is None:
            used = int(torch.bincount(codes.reshape(-1), minlength=grid.n_levels).count_nonzero())
            total = grid.n_levels
        else:
            axis = grid.axis % x.dim()
            c = x.shape[axis]
            per = codes.movedim(axis, 0).reshape(c, -1)
            flat = per + torch.arange(c, device=x.device).unsqueeze(1) * grid.n_levels
            used = int(torch.bincount(flat.reshape(-1), minlength=c * grid.n_levels).count_nonzero())
            total = c * grid.n_levels
        lo, hi = int(low.sum()), int(high.sum())
    return GridUsage((lo + hi) / n, lo / n, hi / n, used, total)
