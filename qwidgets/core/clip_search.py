"""The MSE clipping search behind ``fit_range``: the range -> grid rule and a batched 1-D search.

``GridSpec`` holds the fixed part of a grid and maps a clipping range to (scale, offset);
``GridSpecs`` does the same for several bit widths at once. The search is one batched 1-D search
over the clipping range for every row (channel, block, or the whole tensor) and every bit width
at once (:mod:`qwidgets.core.fraction_search`): a geometric sweep of candidate ranges, then a
golden-section refinement around the best candidate. Candidate grids are measured exactly from
the rows sorted once with prefix sums (:mod:`qwidgets.core.cell_sums`), without quantizing the
tensor; a sweep candidate whose error beyond the grid's outermost levels alone exceeds the
error of a candidate its row has already measured cannot win and is not measured (the same
grid, fewer evaluations; rows of at least ``PRUNE_MIN_VALUES`` values).
"""

from __future__ import annotations

import math

import torch

from .cell_sums import Layout, SortedRows
from .fraction_search import minimise_fraction, sweep_fractions
from .workers import map_chunks

_PRUNE_SLACK = 1e-9  # a candidate is skipped only when its bound beats the best by this x sum(x**2)
# ... and by this fraction of itself: errors measured by rounding in float32 may sit about 1e-7
# (relative) below the float64 bound, and at 1 bit the bound is the whole error
_PRUNE_REL = 1e-5
# the floor's own margin, wider: a level near zero computed in float32 as k * scale + offset with
# large opposite terms (asymmetric mid-rise grids, n-bit: about 2**(n - 23) relative in the
# squared error) can put the rounded error that far below the float64 bound; pruning a little
# less costs nothing measurable
_FLOOR_REL = 1e-3
# rows of at least this many values prune the sweep (floor bisection): measured on 1000 x 128,
# 96 x 144 and 300 x 200 weights, 1.2-1.4x faster than measuring every candidate; on 64 x 32
# and 32 x 16, 1.3x slower (the bounds cost more than measuring short rows)
FLOOR_MIN_VALUES = 128
# the search before the floor bound pruned rows of at least this many values with the clipping
# bound over every candidate (measured then on 1000 x 128 and 32 x 16 weights: 1.3-1.8x slower
# than measuring every candidate; on 384 x 1152 1.4x faster); its grids are the search's grids
PRUNE_MIN_VALUES = 256
SEARCH_CAP = 1 << 24  # values the MSE search looks at, at most (a seeded subset beyond)


class GridSpec:
    """The fixed part of a grid (bits, signedness, symmetry, style) and the range -> grid rule."""

    def __init__(self, bits: int, signed: bool, symmetric: bool, style: str):
        self.bits, self.signed, self.symmetric, self.style = bits, signed, symmetric, style
        self.qmin = -(2 ** (bits - 1)) if signed else 0
        self.qmax = 2 ** (bits - 1) - 1 if signed else 2**bits - 1
        self.n = 2**bits
        self.sym_div = max(self.qmax, 1) if style == "midtread" else (self.n // 2 if signed else self.n)
        self.steps = self.n - 1 if style == "midtread" else self.n  # gaps between levels / bins

    def symmetric_grid(self, r: torch.Tensor):
        """(scale, offset) for the clipping extent ``r`` > 0 (tensors of r's shape)."""
        return _symmetric_grid(r, self.sym_div, self.style)

    def asymmetric_grid(self, lo: torch.Tensor, hi: torch.Tensor):
        """(scale, offset) for the range ``[lo, hi]`` with lo <= 0 <= hi and hi > lo.

        The smallest scale whose grid, with zero where ``style`` puts it, still covers the range:
        ``nb`` steps below zero and the rest above, ``scale = max(-lo / nb, hi / (steps - nb))``,
        minimised over the integer ``nb`` (at the floor or ceiling of where the two cross).
        """
        return _asymmetric_grid(lo, hi, self.steps, self.qmin, self.style)


class GridSpecs:
    """Several :class:`GridSpec` sharing signedness, symmetry and style, for grids of many widths.

    ``symmetric_grid`` / ``asymmetric_grid`` take tensors whose second-to-last axis runs over the
    widths, ``(rows, widths, candidates)``, and give each width exactly what its ``GridSpec``
    gives (the same float64 operations, the width's constants as a column of tensors).
    """

    def __init__(self, bits, signed: bool, symmetric: bool, style: str, device=None):
        self.specs = [GridSpec(b, signed, symmetric, style) for b in bits]
        self.signed, self.symmetric, self.style = signed, symmetric, style

        def col(name):
            return torch.tensor([[float(getattr(s, name))] for s in self.specs], dtype=torch.float64,
                                device=device)

        self.qmin, self.qmax, self.sym_div, self.steps = col("qmin"), col("qmax"), col("sym_div"), col("steps")
        self.layout = Layout([s.qmin for s in self.specs], [s.qmax for s in self.specs], device)

    def symmetric_grid(self, r: torch.Tensor, which=None):
        """``which``: None (all widths, a column each), a width's index (a (1, 1) column), or
        one width index per entry of ``r`` (the constants gathered: the same float64 values)."""
        return _symmetric_grid(r, self._col(self.sym_div, which), self.style)

    def asymmetric_grid(self, lo: torch.Tensor, hi: torch.Tensor, which=None):
        return _asymmetric_grid(lo, hi, self._col(self.steps, which), self._col(self.qmin, which), self.style)

    @staticmethod
    def _col(col: torch.Tensor, which):
        if which is None:
            return col
        return col[which:which + 1] if isinstance(which, int) else col[which, 0]


def _symmetric_grid(r, sym_div, style: str):
    """(scale, offset) of extent ``r``; ``sym_div``: a number, or a column of one per width."""
    scale = r / sym_div
    return scale, (torch.zeros_like(scale) if style == "midtread" else scale / 2)


def _asymmetric_grid(lo, hi, steps, qmin, style: str):
    """(scale, offset) of the range [lo, hi] (see :meth:`GridSpec.asymmetric_grid`); ``steps`` and
    ``qmin``: numbers, or columns of one per width (the same float64 operations either way)."""
    cross = steps * (-lo) / (hi - lo)
    best_s = best_nb = None
    for nb in (torch.floor(cross), torch.ceil(cross)):
        nb = torch.minimum(nb.clamp(min=0), torch.as_tensor(steps, dtype=nb.dtype, device=nb.device))
        below = torch.where(nb > 0, -lo / nb.clamp(min=1), torch.where(lo < 0, math.inf, 0.0))
        above = torch.where(nb < steps, hi / (steps - nb).clamp(min=1), torch.where(hi > 0, math.inf, 0.0))
        s = torch.maximum(below, above)
        if best_s is None:
            best_s, best_nb = s, nb
        else:
            better = s < best_s
            best_s, best_nb = torch.where(better, s, best_s), torch.where(better, nb, best_nb)
    # 1-bit mid-tread ({0, s} or {-s, 0}) cannot cover both signs: keep the larger side
    stuck = torch.isinf(best_s)
    if bool(stuck.any()):
        best_nb = torch.where(stuck, torch.where(-lo >= hi, steps, 0.0).to(best_nb), best_nb)
        best_s = torch.where(stuck, torch.maximum(-lo, hi) / steps, best_s)
    if style == "midtread":  # integer zero point Z = qmin + nb
        return best_s, -(qmin + best_nb) * best_s
    return best_s, (0.5 - best_nb - qmin) * best_s  # zero on the edge of bin nb


def search_sample(xf: torch.Tensor) -> torch.Tensor:
    """``xf`` itself, or for more than ``SEARCH_CAP`` values a seeded random subset per row.

    Bounds memory and time on very large tensors (the sorted evaluator keeps two float64
    prefix sums); the candidate ranges still come from every value.
    """
    c, m = xf.shape
    if c * m <= SEARCH_CAP:
        return xf
    keep = min(m, max(SEARCH_CAP // c, 4096))
    if keep == m:
        return xf
    gen = torch.Generator(device=xf.device).manual_seed(0)
    idx = torch.randint(0, m, (c, keep), generator=gen, device=xf.device)
    return xf.gather(1, idx)



class _Objective:
    """Errors and lower bounds of the grids ``make(t, pick)`` gives, for the search over
    (rows * widths) pairs (:func:`minimise_fraction`). ``pick``: a :class:`_Pick` saying how the
    fractions line up with the rows and widths (a rectangle, or one fraction per listed pair)."""

    def __init__(self, rows: SortedRows, specs: GridSpecs, make, scaled: bool = False):
        self.rows, self.specs, self.make, self.scaled = rows, specs, make, scaled
        self.c, self.w = rows.xs.shape[0], len(specs.specs)
        self.n, self.device = self.c * self.w, rows.xs.device
        self.slack = (_PRUNE_SLACK * rows.total2)[:, None, None]
        # a bound costs two binary searches and two lookups per candidate: on short rows
        # measuring every candidate is cheaper. The grids are the same either way.
        self.prune = rows.m >= FLOOR_MIN_VALUES
        self.prune_reference = rows.m >= PRUNE_MIN_VALUES  # the search before the floor bound
        self._outward = None

    def error(self, t: torch.Tensor) -> torch.Tensor:
        return self._measured(self.rows.sse, t)

    def lower(self, t: torch.Tensor) -> torch.Tensor:
        """The clipping runs' error (a lower bound of the error), less the safety margin."""
        return self._measured(lambda *a: self.rows.clip_sse(*a) * (1.0 - _PRUNE_REL), t, self.slack)

    def floor(self, t: torch.Tensor) -> torch.Tensor:
        """The error of the values beyond the outermost levels, counted on each side where that
        level moves outwards as t grows (so it cannot rise with t), less the safety margin."""
        lo_out, hi_out = self._outward_sides()

        def measure(lay, s, o):
            below, above = self.rows.clamp_sse(lay, s, o)
            return (below * lo_out + above * hi_out) * (1.0 - _FLOOR_REL)

        return self._measured(measure, t, self.slack)

    def _outward_sides(self):
        """Per (row, width): whether the lowest level never rises and the highest never falls
        from one sweep fraction to the next. Grids that scale with t (``scaled``: symmetric
        ones, scale and offset proportional to t): a level moves outwards unless it is above
        zero (the lowest level of an unsigned mid-rise grid); other grids are checked on the
        fractions the bisection reads."""
        if self._outward is None:
            lay = self.specs.layout
            if self.scaled:
                off = 0.5 if self.specs.style == "midrise" else 0.0
                lo_out = (lay.low + off <= 0).expand(self.c, -1, -1)
                hi_out = torch.ones_like(lo_out)
            else:
                t = sweep_fractions(self.device)
                lo_out = torch.ones(self.c, self.w, 1, dtype=torch.bool, device=self.device)
                hi_out = lo_out.clone()
                step = 16  # fractions at a time (bounds memory), each block overlapping the last by one
                for i in range(0, len(t) - 1, step - 1):
                    s, o = self.make(t[i:i + step].expand(self.c, self.w, -1), _Pick())
                    lo_out &= ((s * lay.low + o).diff(dim=2) <= 0).all(dim=2, keepdim=True)
                    hi_out &= ((s * lay.high + o).diff(dim=2) >= 0).all(dim=2, keepdim=True)
            self._outward = lo_out.double(), hi_out.double()
        return self._outward

    def _measured(self, measure, t: torch.Tensor, less=None) -> torch.Tensor:
        s, o = self.make(t.reshape(self.c, self.w, -1), _Pick())
        out = measure(self.specs.layout, s, o)
        return (out if less is None else out - less).reshape(self.n, -1)

    def error_items(self, pairs: torch.Tensor, t: torch.Tensor) -> torch.Tensor:
        """The error of pair ``pairs[i]`` (row * widths + width) at fraction ``t[i]``, (N,)."""
        rows, widths = pairs // self.w, pairs % self.w
        out = torch.empty(t.shape, dtype=torch.float64, device=t.device)
        direct = self.rows.direct_widths(self.specs.layout)
        for j in range(self.w):
            sel = (widths == j).nonzero().squeeze(1)
            if not sel.numel():
                continue
            r, part = rows[sel], self.specs.layout.part((j,))
            if direct[j]:  # each pair's row rounded at its own grid
                s, o = self.make(t[sel], _Pick(r, widths[sel]))
                out[sel] = self.rows.sse_rows(part, r, s, o)
                continue
            # measured by runs: every row at the most fractions any row needs (slots padded with t = 1)
            slot = _rank_within(r, self.c)
            tt = torch.ones(self.c, 1, int(slot.max()) + 1, dtype=torch.float64, device=t.device)
            tt[r, 0, slot] = t[sel]
            s, o = self.make(tt, _Pick(width=j))
            out[sel] = self.rows.sse(part, s, o)[r, 0, slot]
        return out

    def search(self) -> torch.Tensor:
        """The best fraction per (row, width), shape (rows, widths)."""
        return minimise_fraction(self).reshape(self.c, self.w)


class _Pick:
    """How fractions line up with the rows and widths: ``_Pick()`` a (rows, widths, K) rectangle;
    ``_Pick(rows, widths)`` one fraction per listed (row, width) pair; ``_Pick(width=j)``
    a (rows, 1, K) rectangle of width ``j`` alone."""

    def __init__(self, rows=None, widths=None, width=None):
        self.rows, self.widths, self.width = rows, widths, width

    def row(self, v: torch.Tensor) -> torch.Tensor:
        """A per-row value lined up with the fractions."""
        return v[:, None, None] if self.rows is None else v[self.rows]

    def cell(self, v: torch.Tensor) -> torch.Tensor:
        """A per-(row, width) value, (rows, widths), lined up with the fractions."""
        if self.rows is not None:
            return v[self.rows, self.widths]
        return (v if self.width is None else v[:, self.width:self.width + 1])[..., None]

    def which(self):
        """The widths lined up with the fractions (see :meth:`GridSpecs.symmetric_grid`)."""
        return self.widths if self.rows is not None else self.width


def _rank_within(r: torch.Tensor, c: int) -> torch.Tensor:
    """For each entry of ``r`` (row indices), how many earlier entries hold the same row."""
    order = torch.argsort(r, stable=True)
    counts = torch.bincount(r, minlength=c)
    start = torch.cumsum(counts, 0) - counts
    rank = torch.empty_like(r)
    rank[order] = torch.arange(r.numel(), device=r.device) - start[r[order]]
    return rank


ROW_CHUNK_VALUES = 1 << 22  # a larger sample is searched in chunks of rows (bounds memory)


def row_chunks(sample: torch.Tensor) -> list[slice]:
    """Slices of rows of about :data:`ROW_CHUNK_VALUES` values each (one slice for fewer).

    Each chunk is sorted and searched on its own: the grids are those of one search over all
    rows (every step reads its own row only, and the sweep's pruning skips only candidates
    that cannot win any row of the chunk), with the sorted copy, its prefix sums and the
    sweep's bounds held for one chunk at a time (a 50257 x 768 embedding: 2.4 GiB at once), or
    one per worker (:func:`qwidgets.core.workers.chunk_workers`)."""
    c, m = sample.shape
    step = max(1, ROW_CHUNK_VALUES // max(1, m))
    return [slice(i, min(c, i + step)) for i in range(0, c, step)]


def sorted_rows(sample: torch.Tensor) -> SortedRows | torch.Tensor:
    """The sample's :class:`SortedRows`, or the sample itself when it is searched in
    :func:`row_chunks` (the searches sort each chunk)."""
    return SortedRows(sample) if len(row_chunks(sample)) == 1 else sample


def search_symmetric(rows: SortedRows | torch.Tensor, specs: GridSpecs, r_max: torch.Tensor) -> torch.Tensor:
    """The extent r in (0, r_max] minimising each row's squared error, per width: (rows, widths).

    ``rows``: the sorted rows, or the unsorted sample, then searched in :func:`row_chunks`."""
    if isinstance(rows, torch.Tensor):
        return torch.cat(map_chunks(lambda k: search_symmetric(SortedRows(rows[k]), specs, r_max[k]), row_chunks(rows)))
    tiny = torch.finfo(torch.float32).tiny

    def make(t, pick):
        return specs.symmetric_grid((t * pick.row(r_max)).clamp(min=tiny), pick.which())

    return _Objective(rows, specs, make, scaled=True).search() * r_max[:, None]


def search_asymmetric(rows: SortedRows | torch.Tensor, specs: GridSpecs, lo0: torch.Tensor, hi0: torch.Tensor):
    """The range [lo, hi] inside [lo0, hi0] minimising each row's squared error, per width.

    First both ends shrink together towards zero; then each end is searched alone with the
    other one held (one round of coordinate descent); every step is a batched 1-D search.
    Returns (lo, hi), each (rows, widths). ``rows`` as in :func:`search_symmetric`.
    """
    if isinstance(rows, torch.Tensor):
        parts = map_chunks(lambda k: search_asymmetric(SortedRows(rows[k]), specs, lo0[k], hi0[k]), row_chunks(rows))
        return torch.cat([p[0] for p in parts]), torch.cat([p[1] for p in parts])
    tiny = torch.finfo(torch.float32).tiny

    def grid(lo, hi, which=None):
        return specs.asymmetric_grid(lo, torch.maximum(hi, lo + tiny), which)

    def sse(lo, hi):
        return rows.sse(specs.layout, *grid(lo[..., None], hi[..., None]))[..., 0]

    t = _Objective(rows, specs, lambda t, p: grid(t * p.row(lo0), t * p.row(hi0), p.which())).search()
    ends = [t * lo0[:, None], t * hi0[:, None]]
    # coordinate steps: each end searched over (0, its min-max value], the other held (hi first)
    for k in (1, 0):
        end0 = (lo0, hi0)[k]

        def moved(t, p, k=k, end0=end0):
            return grid(*[t * p.row(end0) if j == k else p.cell(ends[j]) for j in (0, 1)], p.which())

        new = list(ends)
        new[k] = _Objective(rows, specs, moved).search() * end0[:, None]
        ends[k] = torch.where(sse(*ends) <= sse(*new), ends[k], new[k])
    lo, hi = ends
    return lo, torch.maximum(hi, lo + tiny)
