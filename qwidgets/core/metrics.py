"""Error measures between a reference tensor and its quantized approximation."""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import torch

from .blocks import expand_blocks
from .checks import as_input
from .grid import UniformGrid, block_axis, channel_shape, grid_params

__all__ = ["ErrorStats", "FixedReference", "GridUsage", "error_stats", "grid_usage", "stats_from_sums"]


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
    sig, err, app_pow, cross, max_abs = _sums(ref.detach().reshape(-1), app.detach().reshape(-1))
    return stats_from_sums(sig, err, app_pow, cross, max_abs, n)


def stats_from_sums(sig: float, err: float, app_pow: float, cross: float, max_abs: float,
                    n: int) -> ErrorStats:
    """:class:`ErrorStats` from float64 sums (``sum r*r``, ``sum e*e``, ``sum a*a``,
    ``sum r*a``, ``max |e|`` and the count), so comparisons can be accumulated batch by batch.

    >>> round(stats_from_sums(2.0, 0.01, 1.81, 1.9, 0.1, 2).sqnr_db, 2)
    23.01
    """
    mse = err / n if n else 0.0
    if err == 0.0:
        sqnr = math.inf
    elif sig == 0.0:
        sqnr = -math.inf
    else:
        sqnr = 10.0 * math.log10(sig / err)
    rel = math.sqrt(err / sig) if sig > 0 else (0.0 if err == 0 else math.inf)
    if sig > 0 and app_pow > 0:
        cosine = cross / math.sqrt(sig * app_pow)
        cosine = max(-1.0, min(1.0, cosine))
    else:
        cosine = 1.0 if sig == app_pow == 0 else 0.0
    return ErrorStats(
        mse=mse,
        rmse=math.sqrt(mse),
        max_abs=max_abs,
        sqnr_db=sqnr,
        rel_err=rel,
        cosine=cosine,
        n=int(n),
    )


_CHUNK = 1 << 16  # elements per slice: float64 temporaries of one slice stay in cache
KEEP_FLOAT64 = 1 << 22  # FixedReference keeps a float64 copy of references up to this many values


class FixedReference:
    """:func:`error_stats` of many approximations of one reference (a widget measuring grid
    after grid against the same float output): the reference is checked once, its float64
    slices (up to :data:`KEEP_FLOAT64` values) and their powers are kept, so each call reads
    the approximation only. The figures are bit for bit those of ``error_stats`` (the same
    slices, the same float64 sums in the same order).

    >>> import torch
    >>> ref = torch.linspace(-1.0, 1.0, 101)
    >>> fixed = FixedReference(ref)
    >>> fixed.stats(ref * 0.99) == error_stats(ref, ref * 0.99)
    True
    """

    def __init__(self, reference: torch.Tensor):
        ref, _ = as_input(reference, "reference")
        if ref.numel() == 0:
            raise ValueError("reference is empty; there is nothing to compare")
        self.shape = ref.shape
        self._ref = ref.detach().reshape(-1)
        self._r64 = self._ref.double() if ref.numel() <= KEEP_FLOAT64 else None
        self._powers = [rc.dot(rc) for rc in self._slices()]

    def _slices(self):
        for i in range(0, self._ref.numel(), _CHUNK):
            yield self._ref[i : i + _CHUNK].double() if self._r64 is None else self._r64[i : i + _CHUNK]

    def stats(self, approx: torch.Tensor) -> ErrorStats:
        """``error_stats(reference, approx)``."""
        if not isinstance(approx, torch.Tensor) or approx.dtype not in (torch.float32, torch.float64):
            approx, _ = as_input(approx, "approx")  # (other types as error_stats reads them)
        if approx.shape != self.shape:
            raise ValueError(f"reference and approx must have the same shape, got {tuple(self.shape)} "
                             f"and {tuple(approx.shape)}")
        sums = _sums(None, approx.detach().reshape(-1), self._slices(), self._powers)
        if not math.isfinite(sums[2]):  # sum a*a of float32 / float64 values: non-finite only
            as_input(approx, "approx")  # if a value is; error_stats's error says how many
        return stats_from_sums(*sums, self._ref.numel())


def _sums(r: torch.Tensor | None, a: torch.Tensor, slices=None, powers=None):
    """(sum r*r, sum e*e, sum a*a, sum r*a, max |e|) with e = a - r, accumulated in float64.

    Runs over cache-sized slices: whole-tensor float64 temporaries (8 bytes an element, several
    of them) cost more in fresh memory than the arithmetic (measured 3-10x slower on 1M values).
    ``slices`` / ``powers``: the float64 slices of ``r`` and their ``r*r`` sums, made before.
    """
    if slices is None:
        slices = (r[i : i + _CHUNK].double() for i in range(0, r.numel(), _CHUNK))
    device = None
    acc = top = None
    for j, rc in enumerate(slices):
        if acc is None:
            device = rc.device
            acc = torch.zeros(4, dtype=torch.float64, device=device)
            top = torch.zeros((), dtype=torch.float64, device=device)
        i = j * _CHUNK
        ac = a[i : i + _CHUNK].to(device=device, dtype=torch.float64)
        e = ac - rc
        acc += torch.stack((rc.dot(rc) if powers is None else powers[j], e.dot(e), ac.dot(ac), rc.dot(ac)))
        top = torch.maximum(top, e.abs_().max())
    sig, err, app_pow, cross = acc.tolist()
    return sig, err, app_pow, cross, float(top)


@dataclass(frozen=True)
class GridUsage:
    """How a tensor sits on a grid: the clipped fraction and how many grid levels it uses."""

    clipped_fraction: float  # share of values beyond the clip range by more than half a step
    clipped_low: float
    clipped_high: float
    bins_used: int  # distinct codes taken (summed over channels / blocks for those grids)
    n_bins: int  # levels available (times channels / blocks for those grids)

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
    if isinstance(grid, UniformGrid) and grid.blocked:
        return _block_usage(x, grid)
    s, o = grid_params(x, grid)
    n = x.numel()
    with torch.no_grad():
        if channel_shape(x, grid) is None:
            rows, s, o = x.reshape(1, -1), s.reshape(()), o.reshape(())
        else:  # one row per channel, with its scale and offset as a column
            axis = grid.axis % x.dim()
            rows = x.movedim(axis, 0).reshape(x.shape[axis], -1)
            s, o = (p.reshape(-1, 1) if p.numel() > 1 else p.reshape(()) for p in (s, o))
        lo, hi, used = _usage_counts(rows, s, o, grid)
    return GridUsage((lo + hi) / n, lo / n, hi / n, used, rows.shape[0] * grid.n_levels)


def _usage_counts(rows: torch.Tensor, s: torch.Tensor, o: torch.Tensor, grid: UniformGrid):
    """(count below, count above, levels used) of ``rows`` (channels, values), in slices."""
    c, m = rows.shape
    k = grid.n_levels
    used = torch.zeros(c * k, dtype=torch.bool, device=rows.device)
    lo = torch.zeros((), dtype=torch.int64, device=rows.device)
    hi = torch.zeros((), dtype=torch.int64, device=rows.device)
    n_rows = max(1, _CHUNK // m)
    n_cols = min(m, _CHUNK)
    for r0 in range(0, c, n_rows):
        r1 = min(c, r0 + n_rows)
        sr = s if s.dim() == 0 else s[r0:r1]
        orr = o if o.dim() == 0 else o[r0:r1]
        base = (torch.arange(r0, r1, device=rows.device) * k - r0 * k - grid.qmin).unsqueeze(1)
        for c0 in range(0, m, n_cols):
            t = (rows[r0:r1, c0 : c0 + n_cols] - orr) / sr
            lo += (t < grid.qmin - 0.5).sum()
            hi += (t > grid.qmax + 0.5).sum()
            codes = t.round_().clamp_(grid.qmin, grid.qmax).to(torch.int64) + base
            seen = torch.bincount(codes.reshape(-1), minlength=(r1 - r0) * k)
            used[r0 * k : r1 * k] |= seen > 0
    return int(lo), int(hi), int(used.sum())


def _block_usage(x: torch.Tensor, grid: UniformGrid) -> GridUsage:
    """:func:`grid_usage` of a block grid: every value tagged with its block's index (repeated
    over the block like the parameters), codes counted per block in one ``bincount``."""
    n, k = x.numel(), grid.n_levels
    with torch.no_grad():
        s, o = grid_params(x, grid)
        axis = block_axis(x, grid)
        t = (x - o) / s
        lo = int((t < grid.qmin - 0.5).sum())
        hi = int((t > grid.qmax + 0.5).sum())
        n_b = grid.scale.numel()
        ids = torch.arange(n_b, device=x.device).reshape(grid.scale.shape)
        ids = expand_blocks(ids, axis, grid.block_size, x.shape[axis])
        codes = t.round_().clamp_(grid.qmin, grid.qmax).to(torch.int64) - grid.qmin + ids * k
        used = int((torch.bincount(codes.reshape(-1), minlength=n_b * k) > 0).sum())
    return GridUsage((lo + hi) / n, lo / n, hi / n, used, n_b * k)
