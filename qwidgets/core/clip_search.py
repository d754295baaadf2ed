"""The MSE clipping search behind ``fit_range``: the range -> grid rule and a batched 1-D search.

``GridSpec`` holds the fixed part of a grid and maps a clipping range to (scale, offset);
``GridSpecs`` does the same for several bit widths at once. The search is one batched 1-D search
over the clipping range for every row (channel, block, or the whole tensor) and every bit width
at once: a geometric sweep of candidate ranges, then a golden-section refinement around the
best candidate. Candidate grids are measured exactly from the rows sorted once with prefix sums
(:mod:`qwidgets.core.cell_sums`), without quantizing the tensor; a sweep candidate whose
clipping error alone exceeds the error of a candidate already measured cannot win and is not
measured (the same grid, fewer evaluations; rows of at least ``PRUNE_MIN_VALUES`` values).
"""

from __future__ import annotations

import math

import torch

from .cell_sums import Layout, SortedRows

_COARSE = 48  # candidate ranges in the coarse sweep
_COARSE_LOW = 1e-4  # smallest candidate range, as a fraction of the min-max range
_GOLDEN_ITERS = 22  # golden-section steps after the sweep: bracket shrinks by 0.618**22 ~ 2.5e-5
_GOLD = (math.sqrt(5.0) - 1.0) / 2.0
_PRUNE_SLACK = 1e-9  # a candidate is skipped only when its bound beats the best by this x sum(x**2)
# ... and by this fraction of itself: errors measured by rounding in float32 may sit about 1e-7
# (relative) below the float64 bound, and at 1 bit the bound is the whole error
_PRUNE_REL = 1e-5
PRUNE_MIN_VALUES = 256  # rows of at least this many values prune the sweep with the bound
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

    def symmetric_grid(self, r: torch.Tensor):
        return _symmetric_grid(r, self.sym_div, self.style)

    def asymmetric_grid(self, lo: torch.Tensor, hi: torch.Tensor):
        return _asymmetric_grid(lo, hi, self.steps, self.qmin, self.style)


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



def _search(evaluate, n_rows: int, device, lower=None) -> torch.Tensor:
    """Minimise ``evaluate(t) -> (R, K) errors`` over the fraction t in (0, 1], per row.

    A geometric sweep of ``_COARSE`` fractions from ``_COARSE_LOW`` to 1, then golden-section
    steps inside the bracket around each row's best sweep point; returns the best t seen.
    ``lower(t)``: a lower bound of ``evaluate(t)`` (less a safety margin for float rounding).
    With it, the sweep first measures t = 1 (and a point halfway to the first candidate still
    in play), then only the fractions from the smallest one whose bound does not exceed the
    best error measured, in any row, upwards. A fraction whose bound exceeds its row's best
    cannot be that row's minimum (nor tie with it), so the sweep picks the point that
    measuring every fraction picks.
    """
    t = torch.logspace(math.log10(_COARSE_LOW), 0.0, _COARSE, dtype=torch.float64, device=device)
    grid = t.expand(n_rows, -1)
    if lower is None:
        err = evaluate(grid)
    else:
        bound = lower(grid)
        err = torch.full((n_rows, _COARSE), math.inf, dtype=torch.float64, device=device)
        last = _COARSE - 1
        err[:, last:] = evaluate(grid[:, last:])
        k0 = _first_alive(bound, err)
        if last - k0 > 2:  # one more point halfway: a tighter bound for the rest
            mid = (k0 + last) // 2
            err[:, mid:mid + 1] = evaluate(grid[:, mid:mid + 1])
            k0 = _first_alive(bound, err)
        if k0 < last:
            err[:, k0:last] = evaluate(grid[:, k0:last])
        err = torch.where(bound <= err.min(dim=1, keepdim=True).values, err, math.inf)
    # on ties take the widest range: it clips least of data not seen here (all-zero rows: t=1)
    best_i = _COARSE - 1 - err.flip(1).argmin(dim=1)
    best_t = t[best_i]
    best_e = err.gather(1, best_i[:, None]).squeeze(1)
    a = t[(best_i - 1).clamp(min=0)]
    b = t[(best_i + 1).clamp(max=_COARSE - 1)]
    a = torch.where(best_i == 0, torch.zeros_like(a), a)  # open the bracket down to 0

    c, d = b - _GOLD * (b - a), a + _GOLD * (b - a)
    fc = evaluate(c[:, None]).squeeze(1)
    fd = evaluate(d[:, None]).squeeze(1)
    for _ in range(_GOLDEN_ITERS):
        left = fc <= fd  # the minimum lies in [a, d]
        b = torch.where(left, d, b)
        a = torch.where(left, a, c)
        new = torch.where(left, b - _GOLD * (b - a), a + _GOLD * (b - a))
        fnew = evaluate(new[:, None]).squeeze(1)
        c, d, fc, fd = (
            torch.where(left, new, d),
            torch.where(left, c, new),
            torch.where(left, fnew, fd),
            torch.where(left, fc, fnew),
        )
        for cand, f in ((c, fc), (d, fd)):
            better = f < best_e
            best_t = torch.where(better, cand, best_t)
            best_e = torch.where(better, f, best_e)
    return best_t


def _first_alive(bound: torch.Tensor, err: torch.Tensor) -> int:
    """The smallest sweep index whose bound does not exceed its row's best error, in any row."""
    alive = (bound <= err.min(dim=1, keepdim=True).values).any(dim=0)
    alive[-1] = True
    return int(alive.nonzero()[0])


class _Objective:
    """Errors and lower bounds of the grids ``make(t)`` gives, for (rows * widths, K) fractions."""

    def __init__(self, rows: SortedRows, specs: GridSpecs, make):
        self.rows, self.specs, self.make = rows, specs, make
        self.c, self.w = rows.xs.shape[0], len(specs.specs)
        self.slack = (_PRUNE_SLACK * rows.total2)[:, None, None]

    def error(self, t: torch.Tensor) -> torch.Tensor:
        return self._measured(self.rows.sse, t)

    def lower(self, t: torch.Tensor) -> torch.Tensor:
        return self._measured(lambda *a: self.rows.clip_sse(*a) * (1.0 - _PRUNE_REL), t, self.slack)

    def _measured(self, measure, t: torch.Tensor, less=0.0) -> torch.Tensor:
        s, o = self.make(t.reshape(self.c, self.w, -1))
        return (measure(self.specs.layout, s, o) - less).reshape(self.c * self.w, -1)

    def search(self) -> torch.Tensor:
        """The best fraction per (row, width), shape (rows, widths)."""
        # the bound costs two binary searches and eight lookups per candidate: on rows shorter
        # than PRUNE_MIN_VALUES measuring every candidate is cheaper (measured on 1000 x 128 and
        # 32 x 16 weights: 1.3-1.8x; on 384 x 1152 the bound saves 1.4x). The grids are the same.
        lower = self.lower if self.rows.m >= PRUNE_MIN_VALUES else None
        t = _search(self.error, self.c * self.w, self.rows.xs.device, lower)
        return t.reshape(self.c, self.w)


ROW_CHUNK_VALUES = 1 << 22  # a larger sample is searched in chunks of rows (bounds memory)


def row_chunks(sample: torch.Tensor) -> list[slice]:
    """Slices of rows of about :data:`ROW_CHUNK_VALUES` values each (one slice for fewer).

    Each chunk is sorted and searched on its own: the grids are those of one search over all
    rows (every step reads its own row only, and the sweep's pruning skips only candidates
    that cannot win any row of the chunk), with the sorted copy, its prefix sums and the
    sweep's bounds held for one chunk at a time (a 50257 x 768 embedding: 2.4 GiB at once)."""
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
        return torch.cat([search_symmetric(SortedRows(rows[k]), specs, r_max[k]) for k in row_chunks(rows)])
    r_col = r_max[:, None, None]
    tiny = torch.finfo(torch.float32).tiny
    t = _Objective(rows, specs, lambda t: specs.symmetric_grid((t * r_col).clamp(min=tiny))).search()
    return t * r_max[:, None]


def search_asymmetric(rows: SortedRows | torch.Tensor, specs: GridSpecs, lo0: torch.Tensor, hi0: torch.Tensor):
    """The range [lo, hi] inside [lo0, hi0] minimising each row's squared error, per width.

    First both ends shrink together towards zero; then each end is searched alone with the
    other one held (one round of coordinate descent); every step is a batched 1-D search.
    Returns (lo, hi), each (rows, widths). ``rows`` as in :func:`search_symmetric`.
    """
    if isinstance(rows, torch.Tensor):
        parts = [search_asymmetric(SortedRows(rows[k]), specs, lo0[k], hi0[k]) for k in row_chunks(rows)]
        return torch.cat([p[0] for p in parts]), torch.cat([p[1] for p in parts])
    tiny = torch.finfo(torch.float32).tiny
    lo0c, hi0c = lo0[:, None, None], hi0[:, None, None]

    def grid(lo, hi):
        return specs.asymmetric_grid(lo, torch.maximum(hi, lo + tiny))

    def sse(lo, hi):
        return rows.sse(specs.layout, *grid(lo[..., None], hi[..., None]))[..., 0]

    t = _Objective(rows, specs, lambda t: grid(t * lo0c, t * hi0c)).search()
    ends = [t * lo0[:, None], t * hi0[:, None]]
    # coordinate steps: each end searched over (0, its min-max value], the other held (hi first)
    for k in (1, 0):
        end0 = (lo0, hi0)[k]

        def moved(t, k=k, end0=end0):
            return [t * end0[:, None, None] if j == k else ends[j][..., None] for j in (0, 1)]

        new = list(ends)
        new[k] = _Objective(rows, specs, lambda t: grid(*moved(t))).search() * end0[:, None]
        ends[k] = torch.where(sse(*ends) <= sse(*new), ends[k], new[k])
    lo, hi = ends
    return lo, torch.maximum(hi, lo + tiny)
