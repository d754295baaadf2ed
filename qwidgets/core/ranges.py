"""fit_range: choose a uniform grid for a tensor (min-max, percentile or MSE-optimal clipping).

Every method first finds a clipping range per tensor (or per channel), then maps it to a grid
with one rule (``_range_to_grid``), so the three methods differ only in the range they pick:

- symmetric, mid-tread (a grid point at zero, offset 0): the largest |value| lands exactly on
  the top grid point, ``scale = r / qmax`` (common practice for integer inference; for 1-bit
  signed grids, whose qmax is 0, ``scale = r``: levels ``{-r, 0}``).
- symmetric, mid-rise (zero midway between two grid points, offset = scale / 2): ``r`` is the
  overload point, the outer edge of the outermost bin, ``scale = 2 r / 2**bits`` for signed
  grids and ``r / 2**bits`` for unsigned ones (the textbook equally spaced quantizer).
- asymmetric (``symmetric=False``): the range ``[lo, hi]`` is widened to contain zero; the
  grid is the finest one that covers it with zero where the style puts it. Mid-tread: an
  integer zero point ``Z`` (``offset == -Z * scale``, so the grid maps to integer hardware:
  ``r = S (q - Z)``, Jacob et al. 2018) and ``scale`` about ``(hi - lo) / (2**bits - 1)``
  (a little more when the zero point has to move, instead of clipping an end). Mid-rise:
  ``2**bits`` bins of about ``(hi - lo) / 2**bits`` with zero on a bin edge (``offset`` an odd
  multiple of ``scale / 2``: mid-rise grids have no integer zero point).

The MSE search is one batched 1-D search over the clipping range for all channels at once: a
coarse geometric sweep of candidate ranges, then a golden-section refinement around the best
candidate, every step a tensor operation over ``(channels, candidates, values)`` in memory-sized
chunks (no Python loop over channels).
"""

from __future__ import annotations

import math
from numbers import Integral, Real

import torch

from .checks import as_input, check_bits
from .device_rules import DeviceRules, check_rules, power_of_two_fit
from .grid import UniformGrid

__all__ = ["fit_range", "METHODS", "STYLES"]

METHODS = ("minmax", "percentile", "mse")
STYLES = ("midtread", "midrise")

_CHUNK_ELEMS = 1 << 22  # elements of one (channels, candidates, values) block in the MSE search
_COARSE = 48  # candidate ranges in the coarse sweep
_COARSE_LOW = 1e-4  # smallest candidate range, as a fraction of the min-max range
_GOLDEN_ITERS = 22  # golden-section steps after the sweep: bracket shrinks by 0.618**22 ~ 2.5e-5
_GOLD = (math.sqrt(5.0) - 1.0) / 2.0
_SEARCH_CAP = 1 << 24  # values the MSE search looks at, at most (a seeded subset beyond)


def fit_range(
    x: torch.Tensor,
    bits: int,
    method: str = "mse",
    *,
    signed: bool | None = None,
    symmetric: bool = True,
    style: str = "midtread",
    axis: int | None = None,
    percentile: float = 99.99,
    rules: DeviceRules | None = None,
    role: str = "weight",
) -> UniformGrid:
    """Fit a ``bits``-bit uniform grid to ``x``.

    Parameters
    ----------
    x : tensor to fit (not modified; integer and half-precision tensors are computed in float32)
    bits : int in 1..16
    method : ``"minmax"`` (clip at the extremes), ``"percentile"`` (clip at that percentile of
        |x|, or of x at ``100 - percentile`` and ``percentile`` for asymmetric grids, linear
        interpolation as numpy's default), ``"mse"`` (the clipping range minimising the mean
        squared quantization error of ``x``)
    signed : grid with signed integer codes; None picks unsigned when ``x`` has no negative
        value (post-ReLU activations). An unsigned symmetric grid saturates negatives to 0.
    symmetric : True fixes the offset by ``style`` (0 or scale/2) and fits only the scale;
        False fits an asymmetric grid, the offset chosen with the scale
    style : ``"midtread"`` (a grid point at zero) or ``"midrise"`` (zero midway between two
        grid points, the classic equally spaced quantizer)
    axis : None for one grid for the whole tensor, or the axis of per-channel grids. Weights
        of Linear / Conv layers are quantized per output channel along axis 0.
    percentile : in (0, 100], used by ``method="percentile"``
    rules : :class:`DeviceRules` the grid must obey (None: none). ``bits`` must be in the
        ``role``'s menu, and options that conflict with the rules are refused; with
        ``pow2_scales`` the scale is the power of two with the least squared error on ``x``
        among those around the fitted scale (see :func:`power_of_two_fit`), not the nearest.
    role : ``"weight"`` or ``"input"``: which of the rules apply (used only with ``rules``)

    Returns a :class:`UniformGrid`; per tensor its scale and offset are floats, per channel
    1-D float32 tensors on ``x``'s device. A channel whose values are all zero gets the
    range of the widest channel (1.0 if every value is zero), so its scale stays > 0. A 1-bit
    mid-tread grid has only two levels with one at zero: signed symmetric it is ``{-s, 0}``;
    asymmetric it keeps the side of zero with the larger extent. The other side saturates to 0. The MSE search evaluates candidate grids
    exactly (sorted values and prefix sums when a row holds >= 32 values per grid level) on
    every value, or on a seeded random subset of 2**24 of them for larger tensors.

    >>> import torch
    >>> g = fit_range(torch.tensor([-1.0, 0.2, 0.5]), 3, "minmax")
    >>> round(g.scale, 4), g.offset, g.signed
    (0.3333, 0.0, True)
    >>> [round(v, 4) for v in fit_range(torch.tensor([[0.0, 2.0], [1.0, 3.0]]), 2, "minmax", axis=0).scale.tolist()]
    [0.6667, 1.0]
    """
    bits = check_bits(bits)
    method = _check_choice(method, METHODS, "method")
    style = _check_choice(style, STYLES, "style")
    if check_rules(rules) is not None:
        bits = rules.check_bits(bits, role)
        symmetric, style, axis = rules.fit_options(role, symmetric=symmetric, style=style, axis=axis)
    if signed is not None and not isinstance(signed, bool):
        raise TypeError(f"signed must be None, True or False, got {signed!r}")
    if not isinstance(symmetric, bool):
        raise TypeError(f"symmetric must be True or False, got {symmetric!r}")
    pct = _check_percentile(percentile)
    x, _ = as_input(x)
    if x.numel() == 0:
        raise ValueError(f"x is empty (shape {tuple(x.shape)}); there is nothing to fit")
    x2d, axis = _channels_first(x.detach(), axis)
    if signed is None:
        signed = bool(x2d.min() < 0)
    spec = _Spec(bits, signed, symmetric, style)

    with torch.no_grad():
        xf = x2d.float()
        if symmetric:
            r = _sym_extent(xf, spec, method, pct)
            if method == "mse":
                r = _search_symmetric(_search_sample(xf), spec, r)
            scale, offset = spec.symmetric_grid(r)
        else:
            lo, hi = _asym_extent(xf, method, pct)
            if method == "mse":
                lo, hi = _search_asymmetric(_search_sample(xf), spec, lo, hi)
            scale, offset = spec.asymmetric_grid(lo, hi)
    grid = _make_grid(spec, scale, offset, axis, x.device)
    if rules is not None and rules.pow2_scales:
        grid = power_of_two_fit(x, grid, method)
    return grid


# ---------------------------------------------------------------------------- grid rule
class _Spec:
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


def _make_grid(spec: _Spec, scale: torch.Tensor, offset: torch.Tensor, axis, device) -> UniformGrid:
    if axis is None:
        s, o = float(scale.reshape(())), float(offset.reshape(()))
        return UniformGrid(spec.bits, s, o + 0.0, signed=spec.signed)
    s = scale.reshape(-1).to(device=device, dtype=torch.float32)
    o = offset.reshape(-1).to(device=device, dtype=torch.float32) + 0.0  # no -0.0 offsets
    return UniformGrid(spec.bits, s, o, signed=spec.signed, axis=axis)


# ---------------------------------------------------------------------------- ranges
def _sym_extent(xf: torch.Tensor, spec: _Spec, method: str, pct: float) -> torch.Tensor:
    """Per-channel clipping extent r (float64, shape (C,)) for a symmetric grid."""
    a = xf.abs() if spec.signed else xf.clamp(min=0)
    r = _quantile_rows(a, pct) if method == "percentile" else a.amax(dim=1)
    return _nonzero(r.double())


def _asym_extent(xf: torch.Tensor, method: str, pct: float):
    """Per-channel range (lo, hi), widened to contain zero (float64, shape (C,) each)."""
    if method == "percentile":
        lo, hi = _quantile_rows(xf, 100.0 - pct), _quantile_rows(xf, pct)
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


def _quantile_rows(x2d: torch.Tensor, pct: float) -> torch.Tensor:
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


# ---------------------------------------------------------------------------- MSE search
def _search_sample(xf: torch.Tensor) -> torch.Tensor:
    """``xf`` itself, or for more than ``_SEARCH_CAP`` values a seeded random subset per row.

    Bounds memory and time on very large tensors (the sorted evaluator keeps two float64
    prefix sums); the candidate ranges still come from every value.
    """
    c, m = xf.shape
    if c * m <= _SEARCH_CAP:
        return xf
    keep = min(m, max(_SEARCH_CAP // c, 4096))
    if keep == m:
        return xf
    gen = torch.Generator(device=xf.device).manual_seed(0)
    idx = torch.randint(0, m, (c, keep), generator=gen, device=xf.device)
    return xf.gather(1, idx)


def _error_evaluator(xf: torch.Tensor, spec: _Spec):
    """A function (scale, offset) of shape (C, K) -> (C, K) sums of squared quantization error.

    When a row holds many more values than the grid has levels, the rows are sorted once and
    each candidate grid costs one batched binary search of its bin edges plus prefix sums
    (``sum (x - g)**2 = S2 - 2 g S1 + g**2 n`` per bin, in float64); otherwise each candidate
    quantizes the rows directly.
    """
    m = xf.shape[1]
    if spec.n * 32 <= m:
        return _SortedRows(xf, spec)
    return lambda scale, offset: _sse_direct(xf, spec, scale, offset)


class _SortedRows:
    def __init__(self, xf: torch.Tensor, spec: _Spec):
        self.spec = spec
        self.xs = xf.sort(dim=1).values.contiguous()
        zero = torch.zeros(xf.shape[0], 1, dtype=torch.float64, device=xf.device)
        xd = self.xs.double()
        self.p1 = torch.cat([zero, xd.cumsum(dim=1)], dim=1)
        self.p2 = torch.cat([zero, (xd * xd).cumsum(dim=1)], dim=1)
        self.total2 = self.p2[:, -1:]
        # level index j = 0 .. n-1 (code qmin + j); interior bin edges sit between j and j + 1
        k = torch.arange(spec.qmin, spec.qmax + 1, dtype=torch.float64, device=xf.device)
        self.codes, self.edge_codes = k, k[:-1] + 0.5

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


def _sse_direct(xf: torch.Tensor, spec: _Spec, scale: torch.Tensor, offset: torch.Tensor) -> torch.Tensor:
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


def _search_symmetric(xf: torch.Tensor, spec: _Spec, r_max: torch.Tensor) -> torch.Tensor:
    """The extent r in (0, r_max] minimising each row's squared error."""
    r_col = r_max[:, None]
    sse = _error_evaluator(xf, spec)

    def objective(t):
        r = (t * r_col).clamp(min=torch.finfo(torch.float32).tiny)
        return sse(*spec.symmetric_grid(r))

    return _search(objective, xf.shape[0], xf.device) * r_max


def _search_asymmetric(xf: torch.Tensor, spec: _Spec, lo0: torch.Tensor, hi0: torch.Tensor):
    """The range [lo, hi] inside [lo0, hi0] minimising each row's squared error.

    First both ends shrink together towards zero; then each end is searched alone with the
    other one held (one round of coordinate descent); every step is a batched 1-D search.
    """
    tiny = torch.finfo(torch.float32).tiny
    _sse = _error_evaluator(xf, spec)

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


# ---------------------------------------------------------------------------- validation
def _check_choice(value, options: tuple, name: str) -> str:
    if not isinstance(value, str) or value not in options:
        raise ValueError(f"{name} must be one of {', '.join(map(repr, options))}; got {value!r}")
    return value


def _check_percentile(p) -> float:
    if isinstance(p, bool) or not isinstance(p, Real):
        raise TypeError(f"percentile must be a number in (0, 100], got {p!r}")
    p = float(p)
    if not (0.0 < p <= 100.0):  # also refuses NaN
        raise ValueError(f"percentile must be in (0, 100], got {p}")
    return p


def _channels_first(x: torch.Tensor, axis):
    """``x`` as (channels, values): one row for a per-tensor fit."""
    if axis is None:
        return x.reshape(1, -1), None
    if isinstance(axis, bool) or not isinstance(axis, Integral):
        raise TypeError(f"axis must be None or an int, got {axis!r}")
    if x.dim() == 0:
        raise ValueError(f"axis={axis} needs a tensor with at least one dimension, got a scalar")
    if not -x.dim() <= axis < x.dim():
        raise ValueError(f"axis={axis} is out of range for a tensor with {x.dim()} dimension(s)")
    return x.movedim(int(axis), 0).reshape(x.shape[axis], -1), int(axis)
