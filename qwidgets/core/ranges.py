"""fit_range: choose a uniform grid for a tensor (min-max, percentile or MSE-optimal clipping).

Every method first finds a clipping range per tensor (or per channel), then maps it to a grid
with one rule (``GridSpec`` in ``clip_search``), so the three methods differ only in the range they pick:

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

The MSE search (``clip_search``) is one batched 1-D search over the clipping range for all
channels at once: a coarse geometric sweep of candidate ranges, then a golden-section refinement
around the best candidate, every step a tensor operation over ``(channels, candidates, values)``
in memory-sized chunks (no Python loop over channels). ``fit_ranges`` fits several bit widths
to one tensor: the extents, the search sample and its sorted copy are computed once for all.
"""

from __future__ import annotations

from collections.abc import Sequence
from numbers import Real

import torch

from . import clip_search
from .blocks import BlockRows, check_block_size, round_scales
from .checks import as_input, check_axis, check_bits, check_choice
from .clip_search import GridSpec, GridSpecs, search_asymmetric, search_sample, search_symmetric
from .device_rules import DeviceRules, check_rules, power_of_two_fit
from .extents import asym_extent, sym_extent
from .grid import UniformGrid

__all__ = ["fit_range", "fit_ranges", "fit_ranges_unchecked", "search_group", "RangeFitter", "METHODS",
           "STYLES"]

METHODS = ("minmax", "percentile", "mse")
STYLES = ("midtread", "midrise")


def fit_range(
    x: torch.Tensor,
    bits: int,
    method: str = "mse",
    *,
    signed: bool | None = None,
    symmetric: bool = True,
    style: str = "midtread",
    axis: int | None = None,
    block_size: int | None = None,
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
        of Linear / Conv layers are quantized per output channel along axis 0. With
        ``block_size``, the blocked axis (the input axis: 1 for a Linear or Conv weight)
    block_size : None, or ``g``: one grid per block of ``g`` consecutive values along ``axis``
        (the last block may be short), every block fitted on its own values exactly as a
        per-tensor fit of that block would be, all blocks at once (blocks are the rows of the
        search). The scales are rounded to float16 where they are stored at 16 bits
        (``rules.scale_bits``, 16 without rules), so the scale stored is the scale used; the
        offset keeps its ratio to the scale (an integer zero point stays one).
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
    exactly (sorted values and prefix sums when a row holds >= 512 values per grid level) on
    every value, or on a seeded random subset of 2**24 of them for larger tensors.

    >>> import torch
    >>> g = fit_range(torch.tensor([-1.0, 0.2, 0.5]), 3, "minmax")
    >>> round(g.scale, 4), g.offset, g.signed
    (0.3333, 0.0, True)
    >>> [round(v, 4) for v in fit_range(torch.tensor([[0.0, 2.0], [1.0, 3.0]]), 2, "minmax", axis=0).scale.tolist()]
    [0.6667, 1.0]
    >>> fit_range(torch.tensor([[1.0, 2.0, 3.0, -7.0, 0.5]]), 4, "minmax", axis=1, block_size=2).scale.tolist()
    [[0.28564453125, 1.0, 0.0714111328125]]
    """
    bits = check_bits(bits)
    return fit_ranges(x, (bits,), method, signed=signed, symmetric=symmetric, style=style, axis=axis,
                      block_size=block_size, percentile=percentile, rules=rules, role=role)[0]


def fit_ranges(
    x: torch.Tensor,
    bits: Sequence[int],
    method: str = "mse",
    *,
    signed: bool | None = None,
    symmetric: bool = True,
    style: str = "midtread",
    axis: int | None = None,
    block_size: int | None = None,
    percentile: float = 99.99,
    rules: DeviceRules | None = None,
    role: str = "weight",
) -> list[UniformGrid]:
    """:func:`fit_range` for several bit widths at once: one grid per entry of ``bits``, in order.

    The grids are exactly those of ``fit_range(x, b, ...)`` for each ``b``; the clipping
    extents, the MSE search sample and its sorted copy with prefix sums are computed once and
    shared by every bit width (the sort dominates fitting a wide tensor).

    >>> import torch
    >>> x = torch.randn(4, 300, generator=torch.Generator().manual_seed(0))
    >>> grids = fit_ranges(x, (2, 4, 8), "mse", axis=0)
    >>> all(torch.equal(g.scale, fit_range(x, b, "mse", axis=0).scale) for g, b in zip(grids, (2, 4, 8)))
    True
    """
    return _fit_ranges(x, bits, method, signed, symmetric, style, axis, block_size, percentile, rules,
                       role, check=True)


def fit_ranges_unchecked(x: torch.Tensor, bits: Sequence[int], method: str = "mse",
                         **options) -> list[UniformGrid]:
    """:func:`fit_ranges` (the same keywords) for a caller that checked ``x``'s values (finite)
    at its own public boundary: the same grids, without a second NaN / inf scan of ``x``."""
    unknown = sorted(set(options) - set(_FIT_DEFAULTS))
    if unknown:
        raise TypeError(f"fit_ranges_unchecked got unknown keyword(s) {unknown}; "
                        f"expected some of {sorted(_FIT_DEFAULTS)}")
    return _fit_ranges(x, bits, method, **{**_FIT_DEFAULTS, **options}, check=False)


_FIT_DEFAULTS = dict(signed=None, symmetric=True, style="midtread", axis=None, block_size=None,
                     percentile=99.99, rules=None, role="weight")  # fit_ranges' keywords and their defaults


def _fit_ranges(x, bits, method, signed, symmetric, style, axis, block_size, percentile, rules,
                role, *, check: bool) -> list[UniformGrid]:
    if isinstance(bits, (str, bytes)) or not isinstance(bits, Sequence):
        raise TypeError(f"bits must be a sequence of ints in 1..16, got {bits!r}")
    bits = [check_bits(b, "bits") for b in bits]
    fitter = RangeFitter(x, method, signed=signed, symmetric=symmetric, style=style, axis=axis,
                         block_size=block_size, percentile=percentile, rules=rules, role=role,
                         check_finite=check)
    return fitter.fit_many(bits)


class RangeFitter:
    """:func:`fit_range` for one tensor at any bit width, asked one width at a time.

    Takes the arguments of :func:`fit_range` less ``bits``; ``.fit(bits)`` returns exactly
    ``fit_range(x, bits, ...)``. The clipping extents, the MSE search sample and its sorted
    copy with prefix sums are made once, on the first width that needs them, and kept: a
    widget that refits at each new bit width pays for the sort once (the sort dominates
    fitting a wide tensor; a width then costs the search alone). The fitter keeps a reference
    to ``x``: ``x`` must not change while the fitter is used. ``check_finite=False``: the
    caller has checked that ``x`` holds no NaN or inf (no second scan).

    >>> import torch
    >>> x = torch.randn(4, 300, generator=torch.Generator().manual_seed(0))
    >>> f = RangeFitter(x, "mse", axis=0)
    >>> torch.equal(f.fit(3).scale, fit_range(x, 3, "mse", axis=0).scale), f.signed
    (True, True)
    """

    def __init__(self, x: torch.Tensor, method: str = "mse", *, signed: bool | None = None,
                 symmetric: bool = True, style: str = "midtread", axis: int | None = None,
                 block_size: int | None = None, percentile: float = 99.99,
                 rules: DeviceRules | None = None, role: str = "weight", check_finite: bool = True):
        method = check_choice(method, METHODS, "method")
        style = check_choice(style, STYLES, "style")
        block_size = check_block_size(block_size)
        self.rules, self.role = check_rules(rules), role
        if self.rules is not None:
            symmetric, style, axis = rules.fit_options(role, symmetric=symmetric, style=style, axis=axis)
        if signed is not None and not isinstance(signed, bool):
            raise TypeError(f"signed must be None, True or False, got {signed!r}")
        if not isinstance(symmetric, bool):
            raise TypeError(f"symmetric must be True or False, got {symmetric!r}")
        if block_size is not None and axis is None:
            raise ValueError(f"block_size={block_size} needs axis, the blocked axis (1 for a Linear "
                             "or Conv weight, 0 for a weight stored [in, out])")
        self._pct = _check_percentile(percentile)
        x, _ = as_input(x, check_finite=bool(check_finite))
        if x.numel() == 0:
            raise ValueError(f"x is empty (shape {tuple(x.shape)}); there is nothing to fit")
        if block_size is None:
            x2d, self.axis = _channels_first(x.detach(), axis)
            self._blocks, parts = None, [x2d]
        else:  # blocks as rows: one 2-D view of the full blocks, one of the short last blocks
            self.axis = check_axis(axis, x.dim()) % x.dim()
            self._blocks = BlockRows(x.detach(), self.axis, block_size)
            parts = self._blocks.parts
        if signed is None:
            signed = bool(x.detach().min() < 0)
        self.x, self.method, self.signed, self.symmetric, self.style = x, method, signed, symmetric, style
        self.block_size = block_size
        self._scale_bits = 16 if self.rules is None else self.rules.scale_bits
        with torch.no_grad():
            self._parts = [_RowSet(p.float(), method) for p in parts]
        self.digest: str | None = None  # of x's values, set by whoever needs it (grid_cache)

    def release(self) -> None:
        """Let the search's copies go (the sorted copy and prefix sums, and the float32 copy of a
        half-precision tensor): a fitter used once. A later fit raises."""
        self._parts = None

    def options_key(self) -> tuple:
        """Every option besides the values and the bit width that shapes this fitter's grids."""
        return (self.method, self.signed, self.symmetric, self.style, self.axis, self._pct,
                self.rules, self.role, self.block_size, self._scale_bits)

    def fit(self, bits: int) -> UniformGrid:
        """The grid ``fit_range(x, bits, ...)`` gives, with the shared parts reused."""
        return self.fit_many((bits,))[0]

    def fit_many(self, bits: Sequence[int]) -> list[UniformGrid]:
        """``[fit(b) for b in bits]``, the MSE searches of all widths run together (the same grids)."""
        if self._parts is None:
            raise RuntimeError("this RangeFitter was released (release()): make a new one to fit")
        specs = self._specs(bits)
        if specs is None:
            return []
        with torch.no_grad():
            fitted = [p.pairs(specs, self.symmetric, self._pct) for p in self._parts]  # per part, per width
            return self._grids(specs, fitted)

    def group_key(self) -> tuple | None:
        """What fitters whose MSE searches can run as one (:func:`fit_together`) share: every
        option but the axis, the row length and the device; None for a fitter that searches
        alone (blocks, a sampled search, another method)."""
        part = self._parts[0]
        if self.method != "mse" or self._blocks is not None or part.sample is not part.xf:
            return None
        return self.options_key()[:4] + self.options_key()[5:] + (part.xf.shape[1], str(part.xf.device))

    def _specs(self, bits) -> GridSpecs | None:
        bs = [check_bits(b, "bits") for b in bits]
        if self.rules is not None:
            bs = [self.rules.check_bits(b, self.role) for b in bs]
        if not bs:
            return None
        return GridSpecs(bs, self.signed, self.symmetric, self.style, self._parts[0].xf.device)

    def _grids(self, specs: GridSpecs, fitted: list) -> list[UniformGrid]:
        """The grids from the (scale, offset) pairs of each part and width."""
        grids = []
        for j, spec in enumerate(specs.specs):
            if self._blocks is None:
                s, o = fitted[0][j]
                grids.append(_make_grid(spec, s, o, self.axis, self.x.device))
                continue
            s, o = (self._blocks.assemble(*v) for v in zip(*(f[j] for f in fitted), strict=True))
            s, o = round_scales(s, o, self._scale_bits)
            grids.append(UniformGrid(spec.bits, s.to(self.x.device, torch.float32),
                                     o.to(self.x.device, torch.float32) + 0.0, signed=self.signed,
                                     axis=self.axis, block_size=self.block_size))
        if self.rules is not None and self.rules.pow2_scales:
            grids = [power_of_two_fit(self.x, g, self.method) for g in grids]
        return grids


def search_group(fitters: list, bits) -> list[list[UniformGrid]]:
    """``[f.fit_many(bits) for f in fitters]`` for fitters of one
    :meth:`~RangeFitter.group_key`, their MSE searches run as one over all their rows (the same
    grids: each row's search reads its own row only)."""
    first = fitters[0]
    if len(fitters) == 1:
        return [first.fit_many(bits)]
    specs = first._specs(bits)
    if specs is None:
        return [[] for _ in fitters]
    parts = [f._parts[0] for f in fitters]
    with torch.no_grad():
        merged = _RowSet(None, "mse")
        merged.sample = torch.cat([p.sample for p in parts])
        # each tensor's own extents (an all-zero row takes its tensor's widest extent)
        extents = [p.extent_for(specs, first.symmetric, first._pct) for p in parts]
        merged.extent = (torch.cat(extents) if first.symmetric
                         else tuple(torch.cat(v) for v in zip(*extents, strict=True)))
        fitted = merged.pairs(specs, first.symmetric, first._pct)
        sizes = [p.sample.shape[0] for p in parts]
        split = [[(s_, o_) for s_, o_ in zip(s.split(sizes), o.split(sizes), strict=True)] for s, o in fitted]
        return [f._grids(specs, [[split[j][k] for j in range(len(split))]]) for k, f in enumerate(fitters)]


class _RowSet:
    """One 2-D view (rows: channels or blocks) with what every width reuses: the extents, the
    MSE search sample and its sorted copy with prefix sums (made by the first search)."""

    def __init__(self, xf: torch.Tensor | None, method: str):
        self.xf, self.method = xf, method
        self.sample = search_sample(xf) if method == "mse" and xf is not None else None
        self.rows = None  # SortedRows, or the sample of a large search (sorted in chunks)
        self.extent = None

    def extent_for(self, specs: GridSpecs, symmetric: bool, pct: float):
        """The clipping extents (symmetric: r per row; else (lo, hi)), made once."""
        if self.extent is None:
            self.extent = (sym_extent(self.xf, specs.specs[0], self.method, pct) if symmetric
                           else asym_extent(self.xf, self.method, pct))
        return self.extent

    def pairs(self, specs: GridSpecs, symmetric: bool, pct: float) -> list:
        """(scale, offset) per row, float64, for each width of ``specs``."""
        method, n = self.method, len(specs.specs)
        if method == "mse" and self.rows is None:
            self.rows = clip_search.sorted_rows(self.sample)
        if symmetric:
            r = self.extent_for(specs, symmetric, pct)
            r = search_symmetric(self.rows, specs, r) if method == "mse" else r[:, None].expand(-1, n)
            return [spec.symmetric_grid(r[:, j]) for j, spec in enumerate(specs.specs)]
        lo, hi = self.extent_for(specs, symmetric, pct)
        if method == "mse":
            lo, hi = search_asymmetric(self.rows, specs, lo, hi)
        else:
            lo, hi = lo[:, None].expand(-1, n), hi[:, None].expand(-1, n)
        return [spec.asymmetric_grid(lo[:, j], hi[:, j]) for j, spec in enumerate(specs.specs)]


def _make_grid(spec: GridSpec, scale: torch.Tensor, offset: torch.Tensor, axis, device) -> UniformGrid:
    if axis is None:
        s, o = float(scale.reshape(())), float(offset.reshape(()))
        return UniformGrid(spec.bits, s, o + 0.0, signed=spec.signed)
    s = scale.reshape(-1).to(device=device, dtype=torch.float32)
    o = offset.reshape(-1).to(device=device, dtype=torch.float32) + 0.0  # no -0.0 offsets
    return UniformGrid(spec.bits, s, o, signed=spec.signed, axis=axis)


# ---------------------------------------------------------------------------- validation
def _check_percentile(p) -> float:
    if isinstance(p, bool) or not isinstance(p, Real):
        raise TypeError(f"percentile must be a number in (0, 100], got {p!r}")
    p = float(p)
    if not (0.0 < p <= 100.0):  # also refuses NaN
        raise ValueError(f"percentile must be in (0, 100], got {p}")
    return p


def _channels_first(x: torch.Tensor, axis):
    """``x`` as (channels, values): one row for a per-tensor fit."""
    axis = check_axis(axis, x.dim())
    if axis is None:
        return x.reshape(1, -1), None
    return x.movedim(axis, 0).reshape(x.shape[axis], -1), axis


_MOVED = {"fit_together": "qwidgets.core.fit_groups", "GROUP_VALUES": "qwidgets.core.fit_groups"}


def __getattr__(name: str):
    """Names moved to :mod:`qwidgets.core.fit_groups`: the old place works for one release and
    warns once (CHANGELOG.md)."""
    if name not in _MOVED:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    import importlib

    from .renamed import warn_renamed

    warn_renamed(f"qwidgets.core.ranges.{name}", f"{_MOVED[name]}.{name}", "qwidgets.core.ranges")
    return getattr(importlib.import_module(_MOVED[name]), name)
