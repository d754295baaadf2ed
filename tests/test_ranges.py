"""fit_range: published optimum quantizers, the 6 dB-per-bit rule, numpy percentiles, properties."""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
from conftest import F32_EPS
from hypothesis import given, settings
from hypothesis import strategies as st

from qwidgets import UniformGrid, fit_range, quantize
from qwidgets.core.cell_sums import SortedRows as _SortedRows
from qwidgets.core.clip_search import GridSpec as _Spec
from qwidgets.core.clip_search import GridSpecs as _Specs


def _mse(x, grid):
    return float(((quantize(x, grid).double() - x.double()) ** 2).mean())


# ---------------------------------------------------------------------------- outside checks
# Max, J. (1960), "Quantizing for minimum distortion", IRE Trans. Information Theory: optimum
# equally spaced (mid-rise) quantizer for a unit Gaussian, N levels: step and mean squared error.
MAX_1960 = {1: (1.596, 0.3634), 2: (0.9957, 0.1188), 3: (0.5860, 0.03744)}


@pytest.fixture(scope="module")
def gaussian():
    return torch.randn(1_000_000, generator=torch.Generator().manual_seed(1960))


@pytest.mark.parametrize("bits", [1, 2, 3])
def test_mse_fit_matches_max_1960_optimum_uniform_gaussian_quantizer(gaussian, bits):
    step, distortion = MAX_1960[bits]
    grid = fit_range(gaussian, bits, "mse", style="midrise")
    assert grid.scale == pytest.approx(step, rel=0.01)
    assert _mse(gaussian, grid) == pytest.approx(distortion, rel=0.01)
    # the mid-rise grid is symmetric about zero: levels +-step/2, +-3 step/2, ...
    assert grid.offset == pytest.approx(grid.scale / 2)
    assert grid.levels.sum().abs().item() < 1e-5


@pytest.mark.parametrize("style", ["midtread", "midrise"])
def test_minmax_sqnr_rises_six_db_per_bit_between_6_and_12_bits(style):
    # textbook rule for uniform quantization of a smooth signal: about 6.02 dB per added bit
    t = torch.linspace(0, 1, 200_001, dtype=torch.float64)
    signal = (torch.sin(2 * math.pi * 3 * t) + 0.5 * torch.sin(2 * math.pi * 7.3 * t + 1)).float()
    sqnr = []
    for bits in range(6, 13):
        grid = fit_range(signal, bits, "minmax", style=style)
        err = (quantize(signal, grid) - signal).double()
        sqnr.append(10 * math.log10(float((signal.double() ** 2).sum() / (err**2).sum())))
    slope = np.polyfit(np.arange(6, 13), sqnr, 1)[0]
    assert slope == pytest.approx(6.02, abs=0.1)
    assert all(b > a for a, b in zip(sqnr, sqnr[1:], strict=False))


def test_percentile_matches_numpy_linear_percentile():
    # reference: numpy.percentile (linear interpolation, its default)
    x = torch.randn(7, 3001, generator=torch.Generator().manual_seed(3)) * torch.arange(1, 8)[:, None]
    p = 99.3
    sym = fit_range(x, 8, "percentile", percentile=p, axis=0)
    want = np.percentile(np.abs(x.numpy()).astype(np.float64), p, axis=1)
    np.testing.assert_allclose((sym.scale.double() * sym.qmax).numpy(), want, rtol=1e-6)

    flat = x[2]
    asym = fit_range(flat, 8, "percentile", percentile=p, symmetric=False)
    lo, hi = np.percentile(flat.numpy().astype(np.float64), [100 - p, p])
    # the finest grid with an integer zero point that covers [lo, hi]
    assert (hi - lo) / 255 <= asym.scale <= (hi - lo) / 254
    glo, ghi = asym.clip_range
    assert lo - asym.scale <= glo <= lo + 1e-6 and hi - 1e-6 <= ghi <= hi + asym.scale


def test_percentile_100_is_minmax():
    x = torch.randn(1000, generator=torch.Generator().manual_seed(4))
    a = fit_range(x, 5, "percentile", percentile=100)
    b = fit_range(x, 5, "minmax")
    assert a.scale == pytest.approx(b.scale, rel=1e-12)


# ---------------------------------------------------------------------------- grid rules
def test_minmax_symmetric_rules():
    x = torch.tensor([-2.0, 0.3, 1.0])
    g = fit_range(x, 4, "minmax")
    assert (g.signed, g.offset, g.zero_point) == (True, 0.0, 0)
    assert g.scale == pytest.approx(2.0 / 7)  # largest |x| on the top code (common practice)
    r = fit_range(x, 4, "minmax", style="midrise")
    assert r.scale == pytest.approx(2 * 2.0 / 16)  # overload point 2.0 = 8 bins of the half range
    assert r.offset == pytest.approx(r.scale / 2)
    assert not r.has_zero_point()


def test_unsigned_chosen_for_nonnegative_data():
    relu = torch.rand(500, generator=torch.Generator().manual_seed(0)) * 3
    g = fit_range(relu, 8, "minmax")
    assert not g.signed and g.offset == 0.0
    assert g.scale == pytest.approx(float(relu.max()) / 255)
    assert fit_range(relu, 8, "minmax", signed=True).signed
    assert fit_range(relu - 0.1, 8, "minmax").signed


@pytest.mark.parametrize("method", ["minmax", "percentile", "mse"])
@pytest.mark.parametrize("signed", [None, True, False])
def test_asymmetric_midtread_has_integer_zero_point(method, signed):
    x = torch.randn(4000, generator=torch.Generator().manual_seed(5)) * 0.7 + 1.3
    g = fit_range(x, 4, method, symmetric=False, signed=signed)
    z = g.zero_point  # raises if offset is not -Z * scale
    assert g.qmin <= z <= g.qmax
    assert 0.0 in [round(v, 6) for v in g.levels.tolist()]


def test_asymmetric_minmax_covers_the_data():
    x = torch.tensor([-0.5, 0.1, 3.5])
    g = fit_range(x, 3, "minmax", symmetric=False)
    lo, hi = g.clip_range
    assert lo <= -0.5 and hi >= 3.5
    # 1 step below zero, 6 above: scale = max(0.5 / 1, 3.5 / 6) (finest covering grid, Z = -3)
    assert g.scale == pytest.approx(3.5 / 6) and g.zero_point == -3
    m = fit_range(x, 3, "minmax", symmetric=False, style="midrise")
    half = m.offset / m.scale - 0.5
    assert half == pytest.approx(round(half), abs=1e-5)  # zero on a bin edge
    assert (quantize(x, m) - x).abs().max() <= m.scale / 2 + 1e-6


def test_per_channel_returns_float32_vectors_and_matches_single_channel_fits():
    w = torch.randn(6, 50, generator=torch.Generator().manual_seed(6)) * torch.logspace(-2, 1, 6)[:, None]
    for method in ("minmax", "percentile", "mse"):
        g = fit_range(w, 4, method, axis=0)
        assert g.axis == 0 and g.scale.dtype == torch.float32 and g.scale.shape == (6,)
        for i in range(6):
            one = fit_range(w[i], 4, method, signed=True)
            assert float(g.scale[i]) == pytest.approx(one.scale, rel=1e-5)
    # axis other than 0, negative axis
    g1 = fit_range(w.T, 4, "minmax", axis=-1)
    assert g1.axis == -1 and g1.scale.shape == (6,)
    torch.testing.assert_close(g1.scale, fit_range(w, 4, "minmax", axis=0).scale)


def test_per_tensor_grid_holds_plain_floats():
    g = fit_range(torch.randn(100), 6, "mse", symmetric=False)
    assert isinstance(g.scale, float) and isinstance(g.offset, float)


def test_all_zero_data_and_channels_get_a_positive_scale():
    for method in ("minmax", "percentile", "mse"):
        assert fit_range(torch.zeros(10), 4, method).clip_range == (0.0, 1.0)  # documented 1.0
    w = torch.zeros(3, 8)
    w[1] = torch.linspace(-1, 1, 8)
    g = fit_range(w, 4, "minmax", axis=0)
    assert float(g.scale.min()) > 0
    assert torch.equal(quantize(w[0], UniformGrid(4, float(g.scale[0]))), w[0])


def test_low_precision_and_integer_inputs():
    x = torch.randn(300, generator=torch.Generator().manual_seed(7))
    g16 = fit_range(x.half(), 8, "minmax")
    assert g16.scale == pytest.approx(float(x.half().float().abs().max()) / 127, rel=1e-6)
    gi = fit_range(torch.arange(-5, 6), 4, "minmax")
    assert gi.scale == pytest.approx(5 / 7)


# ---------------------------------------------------------------------------- MSE search
@pytest.mark.parametrize("bits", [2, 4, 6])
@pytest.mark.parametrize("style", ["midtread", "midrise"])
def test_mse_search_is_as_good_as_a_dense_brute_force_scan(bits, style):
    x = torch.distributions.Laplace(0.0, 1.0).sample((20_000,))
    g = fit_range(x, bits, "mse", style=style)
    r_max = float(x.abs().max())
    # brute force: 3000 clip ranges through quantize itself
    spec = _Spec(bits, True, True, style)
    r = torch.linspace(r_max / 3000, r_max, 3000, dtype=torch.float64)
    s, o = (v.float()[:, None] for v in spec.symmetric_grid(r))
    best = math.inf
    for i in range(0, 3000, 250):  # same arithmetic as quantize, written out, 250 grids at a time
        q = torch.clamp(torch.round((x - o[i : i + 250]) / s[i : i + 250]), -(2 ** (bits - 1)),
                        2 ** (bits - 1) - 1) * s[i : i + 250] + o[i : i + 250]
        best = min(best, float(((q.double() - x.double()) ** 2).mean(dim=1).min()))
    assert _mse(x, g) <= best * (1 + 1e-3)
    assert _mse(x, g) <= _mse(x, fit_range(x, bits, "minmax", style=style))


def test_asymmetric_mse_beats_symmetric_on_skewed_data():
    x = torch.distributions.Exponential(1.0).sample((20_000,)) - 0.3  # skewed, a few negatives
    sym = fit_range(x, 3, "mse")
    asym = fit_range(x, 3, "mse", symmetric=False)
    assert _mse(x, asym) < _mse(x, sym)
    assert _mse(x, asym) <= _mse(x, fit_range(x, 3, "minmax", symmetric=False))


def test_sorted_error_evaluator_agrees_with_quantizing():
    # reference: each row quantized directly with torch's round / clamp, errors summed in float64
    x = torch.randn(5, 4000, generator=torch.Generator().manual_seed(8)).float()
    for specs in (_Specs((3, 1, 8), True, True, "midtread"), _Specs((4, 2), False, False, "midrise")):
        w = len(specs.specs)
        scale = torch.rand(5, w, 7, dtype=torch.float64) * 0.5 + 0.05
        offset = (torch.rand(5, w, 7, dtype=torch.float64) - 0.5) * 0.3
        fast = _SortedRows(x).sse(specs.layout, scale, offset)
        for j, spec in enumerate(specs.specs):
            s, o = scale[:, j, :, None], offset[:, j, :, None]
            q = ((x[:, None, :].double() - o) / s).round().clamp(spec.qmin, spec.qmax) * s + o
            slow = ((q - x[:, None, :].double()) ** 2).sum(dim=2)
            torch.testing.assert_close(fast[:, j], slow, rtol=1e-4, atol=1e-6)


# ---------------------------------------------------------------------------- properties
finite = st.floats(-1e3, 1e3, allow_nan=False, allow_infinity=False, width=32)


@settings(max_examples=60, deadline=None)
@given(
    values=st.lists(finite, min_size=1, max_size=200),
    bits=st.integers(1, 8),
    method=st.sampled_from(["minmax", "percentile", "mse"]),
    symmetric=st.booleans(),
    style=st.sampled_from(["midtread", "midrise"]),
)
def test_fit_range_properties(values, bits, method, symmetric, style):
    x = torch.tensor(values, dtype=torch.float32)
    before = x.clone()
    g = fit_range(x, bits, method, symmetric=symmetric, style=style, percentile=99.0)
    assert torch.equal(x, before)  # input untouched
    assert g.scale > 0 and math.isfinite(g.offset)
    assert g.signed == bool((x < 0).any())
    levels = g.levels.double()
    if style == "midtread":
        assert (levels.abs() <= 1e-6 * g.scale).any()  # zero is a grid point
    elif g.signed or not symmetric:
        # zero midway between two neighbouring grid points
        below, above = levels[levels < 0], levels[levels > 0]
        if len(below) and len(above):
            # float32 levels are offset + k * scale, each rounded at the magnitude of its terms
            # (unit roundoff 2^-24), so two levels near zero cancel to within that
            f32 = 4 * F32_EPS * (abs(g.offset) + float(levels.abs().max()))
            assert float(above.min() + below.max()) == pytest.approx(0.0, abs=1e-5 * g.scale + f32)
    # 1-bit mid-tread grids ({-s, 0} or {0, s}) cannot cover data of both signs (documented)
    both_signs = bool((x < 0).any()) and bool((x > 0).any())
    if method == "minmax" and not (bits == 1 and style == "midtread" and both_signs):
        err = (quantize(x, g) - x).abs().max()
        assert float(err) <= g.scale / 2 * (1 + 1e-4) + 1e-6  # nothing clipped


# ---------------------------------------------------------------------------- bad input
@pytest.mark.parametrize(
    "kwargs, exc, words",
    [
        ({"method": "kl"}, ValueError, "method must be one of"),
        ({"style": "midpoint"}, ValueError, "style must be one of"),
        ({"method": "percentile", "percentile": 0}, ValueError, "percentile must be in (0, 100]"),
        ({"method": "percentile", "percentile": 100.5}, ValueError, "got 100.5"),
        ({"percentile": float("nan")}, ValueError, "percentile must be in"),
        ({"percentile": True}, TypeError, "percentile must be a number"),
        ({"bits": 0}, ValueError, "bits must be in 1..16"),
        ({"bits": 4.0}, TypeError, "bits must be an int"),
        ({"axis": 2}, ValueError, "axis=2 is out of range"),
        ({"axis": "0"}, TypeError, "axis must be None or an int"),
        ({"signed": 1}, TypeError, "signed must be None, True or False"),
        ({"symmetric": None}, TypeError, "symmetric must be True or False"),
    ],
)
def test_bad_arguments_are_named(kwargs, exc, words):
    args = {"bits": 4, "method": "mse", **kwargs}
    with pytest.raises(exc, match=None) as info:
        fit_range(torch.randn(3, 4), args.pop("bits"), args.pop("method"), **args)
    assert words in str(info.value)


def test_bad_data_is_refused():
    with pytest.raises(ValueError, match="x is empty"):
        fit_range(torch.empty(0), 4)
    with pytest.raises(ValueError, match="1 NaN and 1 inf"):
        fit_range(torch.tensor([1.0, float("nan"), float("inf")]), 4)
    with pytest.raises(TypeError, match="x must be a torch.Tensor"):
        fit_range([1.0, 2.0], 4)
    with pytest.raises(ValueError, match="at least one dimension"):
        fit_range(torch.tensor(1.0), 4, axis=0)


def test_large_tensors_search_a_seeded_subset(monkeypatch):
    import qwidgets.core.clip_search as ranges

    x = torch.randn(4, 20_000, generator=torch.Generator().manual_seed(9))
    full = fit_range(x, 3, "mse", axis=0)
    monkeypatch.setattr(ranges, "SEARCH_CAP", 4 * 5000)
    sub = fit_range(x, 3, "mse", axis=0)
    assert torch.equal(sub.scale, fit_range(x, 3, "mse", axis=0).scale)  # deterministic
    # the error curve is flat at its minimum: the subset's grid is near-optimal on all values
    for i in range(4):
        on_all = _mse(x[i], UniformGrid(3, float(sub.scale[i])))
        assert on_all <= _mse(x[i], UniformGrid(3, float(full.scale[i]))) * 1.01


# ---------------------------------------------------------------------------- several widths at once
@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 10_000), method=st.sampled_from(["minmax", "percentile", "mse"]),
       symmetric=st.booleans(), style=st.sampled_from(["midtread", "midrise"]),
       per_channel=st.booleans(), cols=st.sampled_from([7, 300, 3000]))
def test_fit_ranges_equals_fitting_each_width_separately(seed, method, symmetric, style, per_channel, cols):
    # source: fit_range itself, called once per bit width (the grids must be identical, bit for bit)
    from qwidgets.core.ranges import fit_ranges

    x = torch.randn(3, cols, generator=torch.Generator().manual_seed(seed)) * 2 + 0.3
    bits = (1, 2, 3, 4, 6, 8)
    kw = dict(symmetric=symmetric, style=style, axis=0 if per_channel else None)
    together = fit_ranges(x, bits, method, **kw)
    for b, g in zip(bits, together, strict=True):
        alone = fit_range(x, b, method, **kw)
        assert g.bits == alone.bits and g.signed == alone.signed
        assert torch.equal(torch.as_tensor(g.scale), torch.as_tensor(alone.scale))
        assert torch.equal(torch.as_tensor(g.offset), torch.as_tensor(alone.offset))


def test_fit_ranges_checks_bits():
    from qwidgets.core.ranges import fit_ranges

    with pytest.raises(TypeError, match="bits must be a sequence"):
        fit_ranges(torch.randn(10), 4)
    with pytest.raises(ValueError, match="bits"):
        fit_ranges(torch.randn(10), (4, 0))


# ------------------------------------------------------------------ RangeFitter
@pytest.mark.parametrize("method", ["mse", "minmax", "percentile"])
@pytest.mark.parametrize("symmetric,axis", [(True, None), (False, None), (True, 0), (False, 0)])
def test_range_fitter_gives_fit_range_grids_and_sorts_once(method, symmetric, axis, monkeypatch):
    """Reference: fit_range called afresh for each width (the public function). The fitter asked
    widths one at a time, in a walking order, returns the same grids, and sorts the values
    at most once (torch.Tensor.sort counted)."""
    from qwidgets.core.ranges import RangeFitter

    gen = torch.Generator().manual_seed(3)
    x = torch.randn(8, 4096, generator=gen) * torch.linspace(0.5, 2.0, 8)[:, None] + 0.3
    widths = (4, 6, 5, 3, 7, 2, 8, 4)
    expected = [fit_range(x, b, method, symmetric=symmetric, axis=axis) for b in widths]
    sorts = []
    original = torch.Tensor.sort

    def counted(self, *args, **kwargs):
        sorts.append(self.shape)
        return original(self, *args, **kwargs)

    monkeypatch.setattr(torch.Tensor, "sort", counted)
    fitter = RangeFitter(x, method, symmetric=symmetric, axis=axis)
    got = [fitter.fit(b) for b in widths]
    assert len(sorts) <= 1
    for g, e in zip(got, expected, strict=True):
        assert (g.bits, g.signed, g.axis) == (e.bits, e.signed, e.axis)
        assert torch.equal(g.scale_tensor(), e.scale_tensor())
        assert torch.equal(g.offset_tensor(), e.offset_tensor())


def test_range_fitter_bad_input():
    from qwidgets.core.ranges import RangeFitter

    with pytest.raises(ValueError, match="method"):
        RangeFitter(torch.ones(10), "median")
    with pytest.raises(TypeError, match="signed"):
        RangeFitter(torch.ones(10), signed=1)
    with pytest.raises(ValueError, match="empty"):
        RangeFitter(torch.ones(0))
    with pytest.raises(ValueError, match="bits"):
        RangeFitter(torch.ones(10)).fit(0)


def test_fit_ranges_unchecked_takes_fit_ranges_keywords_and_gives_its_grids():
    # reference: fit_ranges itself (the checked entry point), keyword for keyword
    import inspect

    from qwidgets.core.ranges import fit_ranges, fit_ranges_unchecked

    keywords = {k for k, v in inspect.signature(fit_ranges).parameters.items() if v.kind is v.KEYWORD_ONLY}
    x = torch.randn(6, 40, generator=torch.Generator().manual_seed(3))
    options = dict(axis=0, symmetric=False, percentile=99.0)
    for method in ("minmax", "percentile", "mse"):
        a = fit_ranges(x, (2, 5), method, **options)
        b = fit_ranges_unchecked(x, (2, 5), method, **options)
        assert all(torch.equal(g.scale, h.scale) and torch.equal(g.offset, h.offset) for g, h in zip(a, b, strict=True))
    with pytest.raises(TypeError, match="per_channel"):
        fit_ranges_unchecked(x, (4,), per_channel=True)
    with pytest.raises(TypeError, match="unknown"):
        fit_ranges_unchecked(x, (4,), **{k: None for k in keywords | {"zz"}})
