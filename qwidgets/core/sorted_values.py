"""Error and grid usage of one tensor on many grids, from a sorted copy with prefix sums.

:func:`qwidgets.error_stats` and :func:`qwidgets.grid_usage` read every value for each grid. A
widget asks the same questions of the same tensor on grid after grid, so
:class:`SortedValues` sorts the values once (per channel for a per-channel grid) and keeps
float64 prefix sums of ``x`` and ``x**2``. For a grid, the values that round to one code form
one run of the sorted copy (found by binary search at the decision thresholds), and every
figure is a sum over runs: ``sum (x - q)**2 = S2 - 2 q S1 + n q**2`` with ``q`` the code's grid
value. A grid of ``L`` levels costs ``O(L log n)`` instead of ``O(n)``.

The prefix sums lose precision when the error is tiny next to the signal (many levels), so
grids of more than :data:`MAX_LEVELS` levels are measured directly with the core functions.
Values exactly on a decision threshold may land one code away from :func:`quantize`'s choice
(ties); for float data this moves no printed figure.
"""

from __future__ import annotations

import torch

from .checks import as_input
from .grid import UniformGrid
from .metrics import ErrorStats, GridUsage, error_stats, grid_usage, stats_from_sums
from .rounding import quantize

__all__ = ["MAX_LEVELS", "SortedValues"]

MAX_LEVELS = 1024  # beyond this many levels the sums are measured directly (float64 precision)


class SortedValues:
    """A tensor prepared for :meth:`measure` on many grids (per-tensor, or per channel on ``axis``).

    >>> import torch
    >>> from qwidgets import UniformGrid, error_stats, quantize
    >>> _ = torch.manual_seed(0)
    >>> x = torch.randn(1000)
    >>> g = UniformGrid(4, 0.4)
    >>> stats, usage = SortedValues(x).measure(g)
    >>> abs(stats.sqnr_db - error_stats(x, quantize(x, g)).sqnr_db) < 1e-9, usage.n_bins
    (True, 16)
    """

    def __init__(self, values: torch.Tensor, axis: int | None = None):
        x, _ = as_input(values, "values")
        if x.numel() == 0:
            raise ValueError("values is empty")
        x = x.detach().float()
        self.values = x
        self.axis = None if axis is None else axis % max(x.dim(), 1)
        rows = x.reshape(1, -1) if axis is None else x.movedim(self.axis, 0).reshape(x.shape[self.axis], -1)
        self.sorted = torch.sort(rows.double(), dim=1).values.contiguous()
        zero = torch.zeros(rows.shape[0], 1, dtype=torch.float64)
        self.s1 = torch.cat((zero, self.sorted.cumsum(1)), 1)
        self.s2 = torch.cat((zero, self.sorted.square().cumsum(1)), 1)
        self.n = x.numel()

    def measure(self, grid: UniformGrid) -> tuple[ErrorStats, GridUsage]:
        """(error of ``quantize(values, grid)``, :func:`grid_usage` of the values on ``grid``)."""
        if not isinstance(grid, UniformGrid):
            raise TypeError(f"grid must be a UniformGrid, got {type(grid).__name__}")
        if (grid.axis is None) != (self.axis is None) or (
                grid.axis is not None and grid.axis % max(self.values.dim(), 1) != self.axis):
            raise ValueError(f"grid.axis must be {self.axis} for these values, got {grid.axis}")
        if grid.n_levels > MAX_LEVELS:
            v = self.values
            return error_stats(v, quantize(v, grid)), grid_usage(v, grid)
        c = self.sorted.shape[0]
        s = grid.scale_tensor().detach().double().reshape(-1, 1).expand(c, 1)
        o = grid.offset_tensor().detach().double().reshape(-1, 1).expand(c, 1)
        k = torch.arange(grid.qmin, grid.qmax + 1, dtype=torch.float64)
        # the runs: codes k take the values between thresholds (k -/+ 0.5) steps; the ends
        # take everything beyond (clipped), and the clip counts use the same thresholds
        inner = o + (k[:-1] + 0.5) * s  # (c, L - 1)
        ends = torch.cat((o + (grid.qmin - 0.5) * s, o + (grid.qmax + 0.5) * s), 1)
        cut = torch.searchsorted(self.sorted, inner, side="right")
        edge = torch.searchsorted(self.sorted, ends, side="right")
        m = self.sorted.shape[1]
        first = torch.zeros(c, 1, dtype=torch.int64)
        last = torch.full((c, 1), m, dtype=torch.int64)
        bounds = torch.cat((first, cut, last), 1)  # (c, L + 1)
        n = (bounds[:, 1:] - bounds[:, :-1]).double()
        s1 = self.s1.gather(1, bounds[:, 1:]) - self.s1.gather(1, bounds[:, :-1])
        s2 = self.s2.gather(1, bounds[:, 1:]) - self.s2.gather(1, bounds[:, :-1])
        q = grid.levels.detach().double().reshape(c if grid.axis is not None else 1, -1)
        err = (s2 - 2.0 * q * s1 + n * q * q).clamp_min(0.0).sum().item()
        sig = self.s2[:, -1].sum().item()
        app = (n * q * q).sum().item()
        cross = (q * s1).sum().item()
        # the largest error sits at one end of a run
        nonempty = n > 0
        lo_idx = bounds[:, :-1].clamp(max=m - 1)
        hi_idx = (bounds[:, 1:] - 1).clamp(min=0)
        lo_err = (self.sorted.gather(1, lo_idx) - q).abs()
        hi_err = (self.sorted.gather(1, hi_idx) - q).abs()
        top = torch.where(nonempty, torch.maximum(lo_err, hi_err), 0.0).max().item()
        stats = stats_from_sums(sig, err, app, cross, top, self.n)
        low = int(edge[:, 0].sum())
        high = int((m - edge[:, 1]).sum())
        usage = GridUsage((low + high) / self.n, low / self.n, high / self.n,
                          int(nonempty.sum()), c * grid.n_levels)
        return stats, usage
