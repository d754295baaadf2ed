"""The MSE clipping search behind ``fit_range``: the range -> grid rule and a batched 1-D search.

``GridSpec`` holds the fixed part of a grid and maps a clipping range to (scale, offset). The
search is one batched 1-D search over the clipping range for all channels at once: a coarse
geometric sweep of candidate ranges, then a golden-section refinement around the best
candidate, every step a tensor operation over ``(channels, candidates, values)`` in
memory-sized chunks. ``SortedRows`` sorts a tensor's rows once; the sorted copy and its prefix
sums serve every bit width (``SortedRows.for_spec``), so fitting many widths sorts once.
"""

from __future__ import annotations

import math

import torch

_CHUNK_ELEMS = 1 << 22  # elements of one (channels, candidates, values) block in the MSE search
_COARSE = 48  # candidate ranges in the coarse sweep
_COARSE_LOW = 1e-4  # smallest candidate range, as a fraction of the min-max range
_GOLDEN_ITERS = 22  # golden-section steps after the sweep: bracket shrinks by 0.618**22 ~ 2.5e-5
_GOLD = (math.sqrt(5.0) - 1.0) / 2.0
SEARCH_CAP = 1 << 24  # values the MSE search looks at, at most (a seeded subset beyond)


class GridSpec:
    """The fixed part of a grid (bits, signedness, symmetry, style) and the range -> grid rule."""

    def __init__(self, bits: int, signed: bool, symmetric: bool, style: str):
        self.bits, self.signed, self.symmetric, self.style = bits, signed, symmetric, style
        self.qmin = -(2 ** (bits - 1)) if signed else 0
        self.qmax = 2 ** (bits - 1) - 1 if signed else 2**bits - 1
        self.n = 2**bits

    def symmetric_grid(self, r: torch.Tensor):
        """(scale, offset) for the clipping extent ``r`` > 0 (tensors of r's shape)."""
        if self.style == "midtread":
            scale = r / max(self.qmax, 1)
            return scale, torch.zeros_like(scale)
        scale = r / (self.n // 2 if self.signed else self.n)
        return scale, scale / 2

    def asymmetric_grid(self, lo: torch.Tensor, hi: torch.Tensor):
        """(scale, offset) for the range ``[lo, hi]`` with lo <= 0 <= hi and hi > lo.

        The smallest scale whose grid, with zero where ``style`` puts it, still covers the range:
        ``nb`` steps below zero and the rest above, ``scale = max(-lo / nb, hi / (steps - nb))``,
        minimised over the integer ``nb`` (at the floor or ceiling of where the two cross).
        """
        steps = self.n - 1 if self.style == "midtread" else self.n  # gaps between levels / bins
        cross = steps * (-lo) / (hi - lo)
        best_s = best_nb = None
        for nb in (torch.floor(cross), torch.ceil(cross)):
            nb = nb.clamp(0, steps)
            below = torch.where(nb > 0, -lo / nb.clamp(min=1), torch.where(lo < 0, math.inf, 0.0))
            above = torch.where(nb < steps, hi / (steps - nb).clamp(min=1),
                                torch.where(hi > 0, math.inf, 0.0))
            s = torch.maximum(below, above)
            if best_s is None:
                best_s, best_nb = s, nb
            else:
                better = s < best_s
                best_s, best_nb = torch.where(better, s, best_s), torch.where(better, nb, best_nb)
        # 1-bit mid-tread ({0, s} or {-s, 0}) cannot cover both signs: keep the larger side
        stuck = torch.isinf(best_s)
        if bool(stuck.any()):
            best_nb = torch.where(stuck, torch.where(-lo >= hi, steps, 0).to(best_nb), best_nb)
            best_s = torch.where(stuck, torch.maximum(-lo, hi) / steps, best_s)
        if self.style == "midtread":  # integer zero point Z = qmin + nb
            return best_s, -(self.qmin + best_nb) * best_s
        return best_s, (0.5 - best_nb - self.qmin) * best_s  # zero on the edge of bin nb


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


def error_evaluator(xf: torch.Tensor, spec: GridSpec, rows: SortedRows | None = None):
    """A function (scale, offset) of shape (C, K) -> (C, K) sums of squared quantization error.

    When a row holds many more values than the grid has levels, the rows are sorted once and
    each candidate grid costs one batched binary search of its bin edges plus prefix sums
    (``sum (x - g)**2 = S2 - 2 g S1 + g**2 n`` per bin, in float64); otherwise each candidate
    quantizes the rows directly. ``rows``: ``xf`` already sorted (for another bit width), reused.
    """
    m = xf.shape[1]
    if spec.n * 32 <= m:
        return SortedRows(xf, spec) if rows is None else rows.for_spec(spec)
    return lambda scale, offset: sse_direct(xf, spec, scale, offset)


class SortedRows:
    """Rows sorted once, with float64 prefix sums; an evaluator of squared error for ``spec``.

    ``for_spec`` gives the evaluator for another grid spec sharing the sorted copy and sums
    (no new sort), so fitting several bit widths to one tensor sorts it once.
    """

    def __init__(self, xf: torch.Tensor | None, spec: GridSpec, *, _shared: SortedRows | None = None):
        self.spec = spec
        if _shared is not None:
            self.xs, self.p1, self.p2, self.total2 = _shared.xs, _shared.p1, _shared.p2, _shared.total2
        else:
            self.xs = xf.sort(dim=1).values.contiguous()
            zero = torch.zeros(xf.shape[0], 1, dtype=torch.float64, device=xf.device)
            xd = self.xs.double()
            self.p1 = torch.cat([zero, xd.cumsum(dim=1)], dim=1)
            self.p2 = torch.cat([zero, (xd * xd).cumsum(dim=1)], dim=1)
            self.total2 = self.p2[:, -1:]
        # level index j = 0 .. n-1 (code qmin + j); interior bin edges sit between j and j + 1
        k = torch.arange(spec.qmin, spec.qmax + 1, dtype=torch.float64, device=self.xs.device)
        self.codes, self.edge_codes = k, k[:-1] + 0.5

    def for_spec(self, spec: GridSpec) -> SortedRows:
        return SortedRows(None, spec, _shared=self)

    def __call__(self, scale: torch.Tensor, offset: torch.Tensor) -> torch.Tensor:
        c, k = scale.shape
        m = self.xs.shape[1]
        n = self.spec.n
        out = torch.empty(c, k, dtype=torch.float64, device=scale.device)
        step = max(1, min(k, _CHUNK_ELEMS // max(1, c * n)))
        for k0 in range(0, k, step):
            s = scale[:, k0 : k0 + step, None]
            o = offset[:, k0 : k0 + step, None]
            kk = s.shape[1]
            edges = (s * self.edge_codes + o).float().reshape(c, -1)
            idx = torch.searchsorted(self.xs, edges).reshape(c, kk, n - 1)
            first = torch.zeros(c, kk, 1, dtype=idx.dtype, device=idx.device)
            last = torch.full((c, kk, 1), m, dtype=idx.dtype, device=idx.device)
            bounds = torch.cat([first, idx, last], dim=2).reshape(c, -1)
            s1 = self.p1.gather(1, bounds).reshape(c, kk, n + 1).diff(dim=2)
            cnt = bounds.reshape(c, kk, n + 1).diff(dim=2).double()
            g = s * self.codes + o
            out[:, k0 : k0 + step] = self.total2 - (g * (2 * s1 - g * cnt)).sum(dim=2)
        return out.clamp_(min=0)


def sse_direct(xf: torch.Tensor, spec: GridSpec, scale: torch.Tensor, offset: torch.Tensor) -> torch.Tensor:
    """Sum of squared quantization errors of each row of ``xf`` (C, M) for each candidate grid.

    ``scale`` and ``offset`` are (C, K); the result is (C, K) float64. The work runs in blocks of
    at most ``_CHUNK_ELEMS`` elements over candidates and values, so memory stays bounded.
    """
    c, m = xf.shape
    k = scale.shape[1]
    s32, o32 = scale.float().unsqueeze(2), offset.float().unsqueeze(2)
    out = torch.zeros(c, k, dtype=torch.float64, device=xf.device)
    k_step = max(1, min(k, _CHUNK_ELEMS // max(1, c * m)))
    m_step = max(1, min(m, _CHUNK_ELEMS // max(1, c * k_step)))
    for k0 in range(0, k, k_step):
        s, o = s32[:, k0 : k0 + k_step], o32[:, k0 : k0 + k_step]
        for m0 in range(0, m, m_step):
            xx = xf[:, None, m0 : m0 + m_step]
            t = xx - o
            t.div_(s).round_().clamp_(spec.qmin, spec.qmax).mul_(s).add_(o).sub_(xx)
            out[:, k0 : k0 + k_step] += t.square_().sum(dim=2, dtype=torch.float64)
    return out


def _search(objective, n_rows: int, device) -> torch.Tensor:
    """Minimise ``objective(t) -> (C, K) errors`` over the fraction t in (0, 1], per row.

    A geometric sweep of ``_COARSE`` fractions from ``_COARSE_LOW`` to 1, then golden-section
    steps inside the bracket around each row's best sweep point; returns the best t seen.
    """
    t = torch.logspace(math.log10(_COARSE_LOW), 0.0, _COARSE, dtype=torch.float64, device=device)
    grid = t.expand(n_rows, -1)
    err = objective(grid)
    # on ties take the widest range: it clips least of data not seen here (all-zero rows: t=1)
    best_i = _COARSE - 1 - err.flip(1).argmin(dim=1)
    best_t = t[best_i]
    best_e = err.gather(1, best_i[:, None]).squeeze(1)
    a = t[(best_i - 1).clamp(min=0)]
    b = t[(best_i + 1).clamp(max=_COARSE - 1)]
    a = torch.where(best_i == 0, torch.zeros_like(a), a)  # open the bracket down to 0

    c, d = b - _GOLD * (b - a), a + _GOLD * (b - a)
    fc = objective(c[:, None]).squeeze(1)
    fd = objective(d[:, None]).squeeze(1)
    for _ in range(_GOLDEN_ITERS):
        left = fc <= fd  # the minimum lies in [a, d]
        b = torch.where(left, d, b)
        a = torch.where(left, a, c)
        new = torch.where(left, b - _GOLD * (b - a), a + _GOLD * (b - a))
        fnew = objective(new[:, None]).squeeze(1)
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


def search_symmetric(xf: torch.Tensor, spec: GridSpec, r_max: torch.Tensor,
                     rows: SortedRows | None = None) -> torch.Tensor:
    """The extent r in (0, r_max] minimising each row's squared error."""
    r_col = r_max[:, None]
    sse = error_evaluator(xf, spec, rows)

    def objective(t):
        r = (t * r_col).clamp(min=torch.finfo(torch.float32).tiny)
        return sse(*spec.symmetric_grid(r))

    return _search(objective, xf.shape[0], xf.device) * r_max


def search_asymmetric(xf: torch.Tensor, spec: GridSpec, lo0: torch.Tensor, hi0: torch.Tensor,
                      rows: SortedRows | None = None):
    """The range [lo, hi] inside [lo0, hi0] minimising each row's squared error.

    First both ends shrink together towards zero; then each end is searched alone with the
    other one held (one round of coordinate descent); every step is a batched 1-D search.
    """
    tiny = torch.finfo(torch.float32).tiny
    _sse = error_evaluator(xf, spec, rows)

    def grid(lo, hi):
        return spec.asymmetric_grid(lo, torch.maximum(hi, lo + tiny))

    t = _search(lambda t: _sse(*grid(t * lo0[:, None], t * hi0[:, None])),
                xf.shape[0], xf.device)
    lo, hi = t * lo0, t * hi0
    # coordinate steps: each end searched over (0, its min-max value], the other held
    t = _search(lambda t: _sse(*grid(lo[:, None], t * hi0[:, None])), xf.shape[0], xf.device)
    hi_new = t * hi0
    keep = _sse(*grid(lo[:, None], hi[:, None])) <= _sse(*grid(lo[:, None], hi_new[:, None]))
    hi = torch.where(keep.squeeze(1), hi, hi_new)
    t = _search(lambda t: _sse(*grid(t * lo0[:, None], hi[:, None])), xf.shape[0], xf.device)
    lo_new = t * lo0
    keep = _sse(*grid(lo[:, None], hi[:, None])) <= _sse(*grid(lo_new[:, None], hi[:, None]))
    lo = torch.where(keep.squeeze(1), lo, lo_new)
    return lo, torch.maximum(hi, lo + tiny)
