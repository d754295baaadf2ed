"""Relaxed quantization: bin probabilities, concrete / Gumbel-max samples, expectation, gradients."""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from qwidgets.core.grid import UniformGrid
from qwidgets.core.relaxed import (
    bin_probabilities,
    expected_quantize,
    relaxed_quantize,
    relaxed_views,
)
from qwidgets.core.rounding import quantize, to_codes


def scipy_bin_probabilities(x, grid: UniformGrid, noise) -> np.ndarray:
    """Reference: differences of scipy.stats.logistic.cdf at the bin edges, in float64.

    Scale, offset and noise are taken as the float32 numbers the float32 computation sees.
    """
    s = np.float64(np.float32(grid.scale))
    o = np.float64(np.float32(grid.offset))
    n = np.float64(np.float32(noise))
    k = np.arange(grid.qmin, grid.qmax + 1, dtype=np.float64)
    g = s * k + o
    edges = np.concatenate([[-np.inf], g[:-1] + s / 2, [np.inf]])  # K + 1 edges
    xv = np.asarray(x, dtype=np.float64)[:, None]
    cdf = stats.logistic.cdf(edges[None, :], loc=xv, scale=n)
    return np.diff(cdf, axis=1)


# ------------------------------------------------------------------ SciPy reference
@pytest.mark.parametrize(
    "bits,signed,scale,offset,noise",
    [(2, True, 0.5, 0.0, 0.2), (4, True, 0.1, 0.03, 0.05), (4, False, 0.3, -0.6, 0.6),
     (8, True, 0.02, 0.0, 0.004), (8, False, 0.01, -1.0, 0.1), (3, True, 1.0, 0.0, 1e-3)],
)
def test_bin_probabilities_equal_scipy_logistic_cdf_differences(bits, signed, scale, offset, noise):
    """Reference: scipy.stats.logistic.cdf differences (float64); max |diff| <= 1e-5 for float32."""
    grid = UniformGrid(bits, scale, offset=offset, signed=signed)
    lo, hi = grid.clip_range
    gen = torch.Generator().manual_seed(bits)
    x = (lo - 3 * scale + (hi - lo + 6 * scale) * torch.rand(3000, generator=gen)).float()
    x = torch.cat([x, grid.levels, grid.levels + scale / 2, torch.tensor([-1e4, 1e4])])
    probs, codes = bin_probabilities(x, grid, noise)
    assert probs.dtype == torch.float32 and probs.shape == (x.numel(), grid.n_levels)
    assert codes.dtype == torch.int64 and codes.tolist() == list(range(grid.qmin, grid.qmax + 1))
    ref = scipy_bin_probabilities(x.numpy(), grid, noise)
    assert np.abs(probs.double().numpy() - ref).max() <= 1e-5
    assert torch.allclose(probs.double().sum(-1), torch.ones(x.numel(), dtype=torch.float64), atol=1e-5)


def test_per_channel_bin_probabilities_equal_scipy():
    """Reference: scipy.stats.logistic.cdf, one grid and one noise width per channel."""
    scale = torch.tensor([0.1, 0.25, 0.05])
    offset = torch.tensor([0.0, 0.1, -0.2])
    noise = torch.tensor([0.03, 0.2, 0.01])
    grid = UniformGrid(4, scale, offset=offset, axis=1)
    x = torch.randn(200, 3, generator=torch.Generator().manual_seed(0))
    probs, _ = bin_probabilities(x, grid, noise)
    assert probs.shape == (200, 3, 16)
    for c in range(3):
        gc = UniformGrid(4, float(scale[c]), offset=float(offset[c]))
        ref = scipy_bin_probabilities(x[:, c].numpy(), gc, float(noise[c]))
        assert np.abs(probs[:, c].double().numpy() - ref).max() <= 1e-5


@pytest.mark.parametrize("window", [1, 3, 5, 7])
@pytest.mark.parametrize("bits,signed", [(3, True), (4, False), (8, True)])
def test_window_rows_are_full_rows_restricted_and_renormalised(bits, signed, window):
    """Windowed rows equal the full rows restricted to the window and renormalised, also at
    the grid ends where the window shifts inward (codes stay in [qmin, qmax])."""
    grid = UniformGrid(bits, 0.1, offset=0.02, signed=signed)
    lo, hi = grid.clip_range
    x = torch.cat([
        torch.linspace(lo - 1.0, hi + 1.0, 2001),  # well beyond both ends too
        grid.levels[:3], grid.levels[-3:], torch.tensor([lo + 0.04, hi - 0.04]),
    ])
    noise = 0.07
    full, kf = bin_probabilities(x, grid, noise)
    win, kw = bin_probabilities(x, grid, noise, window=window)
    assert win.shape == (x.numel(), window) and kw.shape == (x.numel(), window)
    assert int(kw.min()) >= grid.qmin and int(kw.max()) <= grid.qmax
    assert bool((kw.diff(dim=-1) == 1).all())  # consecutive codes
    nearest = to_codes(x, grid)
    assert bool(((kw[:, 0] <= nearest) & (nearest <= kw[:, -1])).all())
    centred = (nearest - window // 2 >= grid.qmin) & (nearest + window // 2 <= grid.qmax)
    assert torch.equal(kw[centred, window // 2], nearest[centred])  # centred where it fits
    restricted = full.gather(1, kw - grid.qmin).double()
    expect = restricted / restricted.sum(-1, keepdim=True)
    assert torch.allclose(win.double(), expect, rtol=1e-5, atol=1e-7)


@pytest.mark.parametrize("window", [3, 5, 33])
@pytest.mark.parametrize("per_channel", [False, True])
def test_window_without_gradient_equals_the_per_bin_path_with_one(window, per_channel):
    """Without a gradient the windowed bins are computed for all bins at once; with one, bin
    by bin (a cheaper backward). The two are the same float32 arithmetic element for element,
    so probabilities, expectations and seeded samples are bit-identical (torch.equal), also at
    the grid ends where the window shifts inward."""
    if per_channel:
        grid = UniformGrid(8, torch.tensor([0.02, 0.05, 0.011]), torch.tensor([0.0, 0.1, -0.03]), axis=1)
        noise = torch.tensor([0.007, 0.02, 0.004])
    else:
        grid, noise = UniformGrid(8, 0.02, offset=0.013, signed=False), 0.009
    c_lo, c_hi = grid.clip_range
    lo, hi = float(torch.as_tensor(c_lo).min()), float(torch.as_tensor(c_hi).max())
    x = torch.linspace(lo - 0.5, hi + 0.5, 1203).reshape(401, 3)
    xg = x.clone().requires_grad_(True)
    for f in (lambda v: bin_probabilities(v, grid, noise, window=window)[0],
              lambda v: expected_quantize(v, grid, noise, window=window),
              lambda v: relaxed_quantize(v, grid, noise, 0.4, window=window,
                                         generator=torch.Generator().manual_seed(3))):
        assert torch.equal(f(x), f(xg).detach())


def test_window_equal_to_the_grid_is_the_full_distribution():
    grid = UniformGrid(2, 0.5)
    x = torch.linspace(-2, 2, 101)
    full, _ = bin_probabilities(x, grid, 0.3)
    win, kw = bin_probabilities(x, grid, 0.3, window=3)
    assert torch.equal(kw[0], torch.tensor([-2, -1, 0])) and torch.equal(kw[-1], torch.tensor([-1, 0, 1]))
    win4 = bin_probabilities(x, UniformGrid(3, 0.5), 0.3, window=7)[0]
    assert win4.shape == (101, 7)
    assert torch.allclose(full.sum(-1), torch.ones(101))


# ------------------------------------------------------------------ Gumbel-max sampling
@pytest.mark.parametrize("window", [None, 5])
def test_gumbel_max_frequencies_match_bin_probabilities(window):
    """Gumbel (1954) max trick: argmax(log P + G) ~ Categorical(P). SciPy chi-square, p >= 0.001."""
    grid = UniformGrid(4, 0.25)
    noise, x0 = 0.2, 0.37
    n = 40_000
    x = torch.full((n,), x0)
    gen = torch.Generator().manual_seed(1234)
    y = relaxed_quantize(x, grid, noise, temperature=0.5, hard=True, window=window, generator=gen)
    k = to_codes(y, grid)
    assert torch.equal(quantize(y, grid), y)  # every sample is a grid value
    p, codes = bin_probabilities(torch.tensor([x0], dtype=torch.float64), grid, noise, window=window)
    p, codes = p[0].numpy(), codes.reshape(-1, p.shape[-1])[0].numpy()
    observed = np.array([(k == c).sum().item() for c in codes], dtype=np.float64)
    assert observed.sum() == n  # no sample outside the columns
    expected = n * p / p.sum()
    big = expected >= 5  # merge the sparse tail bins into one cell (usual chi-square practice)
    obs = np.append(observed[big], observed[~big].sum())
    exp = np.append(expected[big], expected[~big].sum())
    if exp[-1] == 0:
        obs, exp = obs[:-1], exp[:-1]
    assert stats.chisquare(obs, exp * obs.sum() / exp.sum()).pvalue >= 0.001
    # repeatable with the same seed
    again = relaxed_quantize(x, grid, noise, 0.5, hard=True, window=window,
                             generator=torch.Generator().manual_seed(1234))
    assert torch.equal(again, y)


# ------------------------------------------------------------------ limits
def test_temperature_to_zero_gives_one_hot_samples_on_the_grid():
    """Concrete distribution (Maddison et al. 2017; Jang et al. 2017): as temperature -> 0 the
    relaxed sample becomes the Gumbel-max one-hot choice."""
    grid = UniformGrid(4, 0.2, offset=0.05)
    x = torch.linspace(-2, 2, 4001)
    dist = []
    for t in (2.0, 0.5, 0.1, 0.01, 1e-6):
        y = relaxed_quantize(x, grid, 0.1, t, window=5, generator=torch.Generator().manual_seed(7))
        dist.append(float((y - quantize(y, grid)).abs().mean()))
        hard = relaxed_quantize(x, grid, 0.1, t, hard=True, window=5,
                                generator=torch.Generator().manual_seed(7))
        if t == 1e-6:
            # same Gumbel draws: the soft sample is the hard one up to float32 rounding of s*k+o
            assert torch.allclose(y, hard, rtol=0, atol=4e-7)
    assert all(a >= b for a, b in zip(dist, dist[1:], strict=False))  # closer to the grid as t falls
    assert float((y - quantize(y, grid)).abs().max()) <= 4e-7 and dist[0] > 0.01


def test_noise_to_zero_expectation_approaches_hard_quantize():
    grid = UniformGrid(5, 0.1, offset=-0.03)
    x = torch.linspace(-2.5, 2.5, 5001)
    t = (x - grid.offset) / grid.scale
    away = (t - t.floor() - 0.5).abs() > 0.01  # a .5 tie has expectation halfway between two levels
    q = quantize(x, grid)
    # away from ties by 0.001 (absolute), the neighbour's weight is ~exp(-0.001 / noise)
    errs = [float((expected_quantize(x, grid, n) - q)[away].abs().max()) for n in (0.05, 0.01, 1e-3, 1e-5)]
    assert all(a > b for a, b in zip(errs, errs[1:], strict=False))
    assert errs[-1] <= 1e-6
    assert float((expected_quantize(x, grid, 1e-5, window=3) - q)[away].abs().max()) <= 1e-6


def test_expected_quantize_is_the_probability_weighted_grid_value():
    grid = UniformGrid(3, 0.5, offset=0.1)
    x = torch.linspace(-3, 3, 301, dtype=torch.float64)
    p, _ = bin_probabilities(x, grid, 0.4)
    assert torch.allclose(expected_quantize(x, grid, 0.4), p @ grid.levels.double(), atol=1e-6)


# ------------------------------------------------------------------ gradients
def _grid_fn(per_channel: bool):
    def make(s, o):
        return UniformGrid(4, s, offset=o, axis=1 if per_channel else None)
    return make


@pytest.mark.parametrize("per_channel", [False, True])
@pytest.mark.parametrize("window", [None, 3])
def test_gradcheck_float64(per_channel, window):
    """torch.autograd.gradcheck (finite differences, float64) w.r.t. x, scale, offset, noise."""
    make = _grid_fn(per_channel)
    c = 3
    # values kept away from the half-steps where a window would move
    x = (torch.tensor([[-0.31, 0.12, 0.47], [0.05, -0.52, 0.26]], dtype=torch.float64)).requires_grad_()
    shape = (c,) if per_channel else ()
    s = torch.full(shape, 0.2, dtype=torch.float64).requires_grad_()
    o = torch.full(shape, 0.013, dtype=torch.float64).requires_grad_()
    n = torch.full(shape, 0.09, dtype=torch.float64).requires_grad_()

    def probs(x, s, o, n):
        return bin_probabilities(x, make(s, o), n, window=window)[0]

    def expect(x, s, o, n):
        return expected_quantize(x, make(s, o), n, window=window)

    def sample(x, s, o, n):  # the generator is re-seeded per call, so the noise is fixed
        return relaxed_quantize(x, make(s, o), n, 0.7, window=window,
                                generator=torch.Generator().manual_seed(3))

    for fn in (probs, expect, sample):
        assert torch.autograd.gradcheck(fn, (x, s, o, n), eps=1e-6, atol=1e-5, rtol=1e-4)


def test_hard_sample_has_the_straight_through_gradient_of_the_soft_sample():
    grid_s = torch.tensor(0.2, requires_grad=True)
    x = torch.randn(50, generator=torch.Generator().manual_seed(0), requires_grad=True)
    grads = []
    for hard in (False, True):
        x.grad, grid_s.grad = None, None
        y = relaxed_quantize(x, UniformGrid(4, grid_s), 0.1, 0.5, hard=hard, window=5,
                             generator=torch.Generator().manual_seed(5))
        (y * torch.arange(50.0)).sum().backward()
        grads.append((x.grad.clone(), grid_s.grad.clone()))
    assert torch.allclose(grads[0][0], grads[1][0]) and torch.allclose(grads[0][1], grads[1][1])


@settings(max_examples=40, deadline=None)
@given(
    bits=st.integers(2, 8),
    scale=st.floats(1e-3, 5.0),
    noise_ratio=st.floats(1e-4, 50.0),
    spread=st.floats(0.0, 1e4),
    window=st.sampled_from([None, 1, 3]),
    hard=st.booleans(),
)
def test_gradients_are_finite_even_far_in_the_tails(bits, scale, noise_ratio, spread, window, hard):
    """Values far outside the grid and tiny / huge noise: no NaN or inf in outputs or gradients."""
    x = (torch.linspace(-1, 1, 64) * spread * scale).requires_grad_()
    s = torch.tensor(scale, requires_grad=True)
    o = torch.tensor(0.3 * scale, requires_grad=True)
    n = torch.tensor(noise_ratio * scale, requires_grad=True)
    grid = UniformGrid(bits, s, offset=o)
    p, _ = bin_probabilities(x, grid, n, window=window)
    y = relaxed_quantize(x, grid, n, 0.3, hard=hard, window=window,
                         generator=torch.Generator().manual_seed(0))
    e = expected_quantize(x, grid, n, window=window)
    assert bool(torch.isfinite(p).all() and torch.isfinite(y).all() and torch.isfinite(e).all())
    (p.sum() + y.sum() + e.sum()).backward()
    for t in (x, s, o, n):
        if window == 1 and t is not s and t is not o:
            continue  # a one-bin window does not depend on x or the noise (its P is 1)
        assert t.grad is not None and bool(torch.isfinite(t.grad).all())


def sigmoid_bin_probabilities(x: torch.Tensor, s, o, n, qmin: int, qmax: int) -> torch.Tensor:
    """Reference written here: P_k = sigmoid((e_k+1 - x) / n) - sigmoid((e_k - x) / n) in
    float64 with torch.sigmoid, the outer edges at -inf / +inf; rows are values, columns codes."""
    k = torch.arange(qmin, qmax + 1, dtype=torch.float64)
    inner = (k[:-1] + 0.5) * s + o
    edges = torch.cat([torch.tensor([-math.inf]), inner, torch.tensor([math.inf])]).double()
    cdf = torch.sigmoid((edges[None, :] - x.double()[:, None]) / n)
    return cdf[:, 1:] - cdf[:, :-1]


@pytest.mark.parametrize("window", [None, 3, 5])
@pytest.mark.parametrize("noise_ratio", [0.05, 0.4, 3.0])
def test_values_clipped_hundreds_of_steps_past_the_grid_keep_exact_probabilities(window, noise_ratio):
    """Values 50 to 5000 steps past either end (where exp would leave the normal float range)
    against float64 torch.sigmoid differences written in the test: the same probabilities to
    1e-6, the expectation on the end levels, and the gradient in x of the expectation equal to
    the float64 reference's (autograd through the sigmoid differences)."""
    grid = UniformGrid(4, 0.25, offset=0.05)
    s, o, n = 0.25, 0.05, noise_ratio * 0.25
    lo, hi = grid.clip_range
    steps = torch.tensor([50.0, 400.0, 5000.0])
    x = torch.cat([lo - steps * s, hi + steps * s, torch.linspace(lo - 1.0, hi + 1.0, 41)])
    probs, codes = bin_probabilities(x, grid, n, window=window)
    ref = sigmoid_bin_probabilities(x, s, o, n, grid.qmin, grid.qmax)
    if window is not None:  # the reference restricted to the window and renormalised
        ref = ref.gather(1, codes - grid.qmin)
        ref = ref / ref.sum(1, keepdim=True)
    assert (probs.double() - ref).abs().max() <= 1e-6
    # far past the ends the end bin holds all the probability (1 to float32's resolution)
    end = codes[:6] if window is not None else codes.expand(6, -1)
    mass = torch.where(end == torch.tensor([[grid.qmin]] * 3 + [[grid.qmax]] * 3), probs[:6], 0.0)
    assert torch.allclose(mass.double().sum(1), torch.ones(6, dtype=torch.float64), atol=1e-6)
    # the expectation and its gradient in x
    xg = x.clone().requires_grad_()
    e = expected_quantize(xg, grid, n, window=window)
    e.sum().backward()
    xr = x.double().clone().requires_grad_()
    pr = sigmoid_bin_probabilities(xr, s, o, n, grid.qmin, grid.qmax)
    levels = torch.arange(grid.qmin, grid.qmax + 1, dtype=torch.float64) * s + o
    if window is not None:
        pr = pr.gather(1, codes - grid.qmin)
        pr = pr / pr.sum(1, keepdim=True)
        er = (pr * levels[codes - grid.qmin]).sum(1)
    else:
        er = pr @ levels
    er.sum().backward()
    assert (e.double() - er).abs().max() <= 1e-5
    assert torch.allclose(e[:3].double(), torch.full((3,), lo, dtype=torch.float64), atol=1e-6)
    assert torch.allclose(e[3:6].double(), torch.full((3,), hi, dtype=torch.float64), atol=1e-6)
    assert torch.allclose(xg.grad.double(), xr.grad, atol=1e-4, rtol=1e-4)


# ------------------------------------------------------------------ bad input and dtypes
@pytest.mark.parametrize("noise", [0.0, -0.1, math.inf, math.nan, torch.tensor(-1.0)])
def test_bad_noise(noise):
    with pytest.raises(ValueError, match="noise must be"):
        bin_probabilities(torch.zeros(3), UniformGrid(4, 0.1), noise)


@pytest.mark.parametrize("temperature", [0.0, -1.0, math.inf, math.nan])
def test_bad_temperature(temperature):
    with pytest.raises(ValueError, match="temperature must be"):
        relaxed_quantize(torch.zeros(3), UniformGrid(4, 0.1), 0.1, temperature)


def test_bad_noise_and_temperature_types_and_sizes():
    grid = UniformGrid(4, 0.1)
    with pytest.raises(TypeError, match="noise must be a float"):
        expected_quantize(torch.zeros(3), grid, "0.1")
    with pytest.raises(TypeError, match="temperature must be a float"):
        relaxed_quantize(torch.zeros(3), grid, 0.1, None)
    with pytest.raises(ValueError, match="noise has 3 values but the grid is per-tensor"):
        bin_probabilities(torch.zeros(3), grid, torch.tensor([0.1, 0.1, 0.1]))
    pc = UniformGrid(4, torch.tensor([0.1, 0.2]), axis=0)
    with pytest.raises(ValueError, match="noise has 3 values but the tensor has 2 channels"):
        bin_probabilities(torch.zeros(2, 5), pc, torch.tensor([0.1, 0.1, 0.1]))
    with pytest.raises(ValueError, match="temperature must be a single value"):
        relaxed_quantize(torch.zeros(3), grid, 0.1, torch.tensor([0.5, 0.5]))
    with pytest.raises(TypeError, match="hard must be a bool"):
        relaxed_quantize(torch.zeros(3), grid, 0.1, 0.5, hard=1)
    with pytest.raises(TypeError, match="generator must be a torch.Generator"):
        relaxed_quantize(torch.zeros(3), grid, 0.1, 0.5, generator=0)


@pytest.mark.parametrize(
    "window,exc,match",
    [(2, ValueError, "window must be an odd int >= 1, got 2"),
     (0, ValueError, "window must be an odd int >= 1, got 0"),
     (-3, ValueError, "window must be an odd int"),
     (5, ValueError, r"window=5 is larger than the grid \(4 levels at 2 bits\)"),
     (3.0, TypeError, "window must be None or an odd int"),
     (True, TypeError, "window must be None or an odd int")],
)
def test_bad_window(window, exc, match):
    for fn in (lambda: bin_probabilities(torch.zeros(3), UniformGrid(2, 0.1), 0.1, window=window),
               lambda: expected_quantize(torch.zeros(3), UniformGrid(2, 0.1), 0.1, window=window),
               lambda: relaxed_quantize(torch.zeros(3), UniformGrid(2, 0.1), 0.1, 1.0, window=window)):
        with pytest.raises(exc, match=match):
            fn()


def test_full_table_too_large_asks_for_a_window():
    with pytest.raises(ValueError, match="pass window=3 or 5"):
        bin_probabilities(torch.zeros(1 << 13), UniformGrid(16, 0.1), 0.1)


def test_non_finite_x_and_axis_errors():
    with pytest.raises(ValueError, match=r"x holds 1 NaN and 0 inf value\(s\) out of 3"):
        expected_quantize(torch.tensor([0.0, math.nan, 1.0]), UniformGrid(4, 0.1), 0.1)
    with pytest.raises(ValueError, match=r"x.shape\[1\] = 4"):
        relaxed_quantize(torch.zeros(2, 4), UniformGrid(4, torch.tensor([0.1, 0.2]), axis=1), 0.1, 1.0)
    with pytest.raises(ValueError, match="out of range"):
        bin_probabilities(torch.zeros(4), UniformGrid(4, torch.tensor([0.1] * 4), axis=1), 0.1)


@pytest.mark.parametrize("dtype", [torch.float16, torch.bfloat16])
def test_low_precision_in_float32_out_in_input_dtype(dtype):
    x = torch.linspace(-1, 1, 33).to(dtype)
    grid = UniformGrid(4, 0.125)
    p, _ = bin_probabilities(x, grid, 0.05, window=3)
    assert p.dtype == dtype
    assert torch.equal(p, bin_probabilities(x.float(), grid, 0.05, window=3)[0].to(dtype))
    assert expected_quantize(x, grid, 0.05).dtype == dtype
    y = relaxed_quantize(x, grid, 0.05, 0.5, generator=torch.Generator().manual_seed(0))
    y32 = relaxed_quantize(x.float(), grid, 0.05, 0.5, generator=torch.Generator().manual_seed(0))
    assert y.dtype == dtype and torch.equal(y, y32.to(dtype))


def test_integer_input_is_cast_to_float32():
    """Documented behaviour (qwidgets.core.checks.as_input): integer tensors are cast to float32."""
    x = torch.tensor([-1, 0, 2])
    grid = UniformGrid(3, 1.0)
    e = expected_quantize(x, grid, 0.01)
    assert e.dtype == torch.float32 and e.tolist() == pytest.approx([-1.0, 0.0, 2.0], abs=1e-6)


def test_inputs_are_never_modified():
    x = torch.randn(1000, requires_grad=True)
    s = torch.tensor(0.1, requires_grad=True)
    o = torch.tensor(0.02, requires_grad=True)
    n = torch.tensor(0.05, requires_grad=True)
    keep = [t.detach().clone() for t in (x, s, o, n)]
    grid = UniformGrid(5, s, offset=o)
    gen = torch.Generator().manual_seed(0)
    for w in (None, 5):
        bin_probabilities(x, grid, n, window=w)
        expected_quantize(x, grid, n, window=w)
        relaxed_quantize(x, grid, n, 0.5, hard=True, window=w, generator=gen).sum().backward()
    for a, b in zip((x, s, o, n), keep, strict=True):
        assert torch.equal(a.detach(), b)


# ------------------------------------------------------------------ one table for three views
@settings(max_examples=40, deadline=None)
@given(bits=st.integers(2, 8), signed=st.booleans(), window=st.sampled_from([None, 1, 3, 5]),
       noise_steps=st.floats(0.05, 3.0), temperature=st.floats(0.05, 2.0), shift=st.floats(-0.6, 0.6),
       seed=st.integers(0, 2**31 - 1))
def test_relaxed_views_equal_the_three_calls(bits, signed, window, noise_steps, temperature, shift, seed):
    """Reference: expected_quantize, relaxed_quantize (the same generator seed) and
    bin_probabilities called on their own (whose tables are checked against SciPy above);
    values beyond the clip range on both sides included. Joined inputs may round the last
    bit of an elementwise function differently: compared to float32 resolution."""
    grid = UniformGrid(bits, 0.05, shift * 0.05, signed=signed)
    if window is not None and window > grid.n_levels:
        window = None  # (a window wider than the grid is refused, tested above)
    lo, hi = grid.clip_range
    span = hi - lo
    curve = torch.linspace(lo - 0.3 * span, hi + 0.3 * span, 257)
    samples = torch.linspace(lo - 0.2 * span, hi + 0.2 * span, 41).expand(3, -1)
    probe = torch.tensor([lo + 0.37 * span])
    noise = noise_steps * 0.05
    e, s, (p, k) = relaxed_views(curve, samples, probe, grid, noise, temperature, window=window,
                                 generator=torch.Generator().manual_seed(seed))
    tol = dict(rtol=1e-5, atol=1e-6)
    torch.testing.assert_close(e, expected_quantize(curve, grid, noise, window=window), **tol)
    torch.testing.assert_close(s, relaxed_quantize(samples, grid, noise, temperature, window=window,
                                                   generator=torch.Generator().manual_seed(seed)), **tol)
    p2, k2 = bin_probabilities(probe, grid, noise, window=window)
    torch.testing.assert_close(p, p2, **tol)
    assert torch.equal(k.expand(p.shape), k2.expand(p2.shape))


def test_relaxed_views_refuses_channel_grids_and_mixed_dtypes():
    x = torch.zeros(4)
    with pytest.raises(ValueError, match="per-tensor grid"):
        relaxed_views(x, x, x, UniformGrid(4, torch.ones(4), axis=0), 0.1, 0.5)
    with pytest.raises(ValueError, match="share a dtype"):
        relaxed_views(x, x.double(), x, UniformGrid(4, 0.1), 0.1, 0.5)
    with pytest.raises(ValueError, match="temperature"):
        relaxed_views(x, x, x, UniformGrid(4, 0.1), 0.1, 0.0)
