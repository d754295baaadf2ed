"""error_stats and grid_usage against hand-computed worked examples (numpy, float64)."""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
import torch

from qwidgets.core import metrics
from qwidgets.core.grid import UniformGrid
from qwidgets.core.metrics import ErrorStats, FixedReference, error_stats, grid_usage
from qwidgets.core.rounding import quantize


def numpy_stats(ref: np.ndarray, app: np.ndarray) -> dict:
    """The definitions written out by hand in numpy (float64)."""
    ref, app = ref.astype(np.float64).ravel(), app.astype(np.float64).ravel()
    e = app - ref
    return {
        "mse": np.mean(e**2),
        "rmse": np.sqrt(np.mean(e**2)),
        "max_abs": np.max(np.abs(e)),
        "sqnr_db": 10 * np.log10(np.sum(ref**2) / np.sum(e**2)),
        "rel_err": np.linalg.norm(e) / np.linalg.norm(ref),
        "cosine": ref @ app / (np.linalg.norm(ref) * np.linalg.norm(app)),
        "n": ref.size,
    }


def test_worked_example_by_hand():
    # ref = (1, -1), approx = (1, -0.9): error (0, 0.1)
    s = error_stats(torch.tensor([1.0, -1.0], dtype=torch.float64), torch.tensor([1.0, -0.9], dtype=torch.float64))
    assert s.mse == pytest.approx(0.01 / 2)
    assert s.rmse == pytest.approx(math.sqrt(0.005))
    assert s.max_abs == pytest.approx(0.1)
    assert s.sqnr_db == pytest.approx(10 * math.log10(2 / 0.01))  # 23.0103 dB
    assert s.rel_err == pytest.approx(math.sqrt(0.01 / 2))
    assert s.cosine == pytest.approx(1.9 / (math.sqrt(2) * math.sqrt(1.81)))
    assert s.n == 2


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_against_numpy_definitions(seed):
    rng = np.random.default_rng(seed)
    ref = rng.normal(size=(40, 7)).astype(np.float32)
    app = quantize(torch.from_numpy(ref), UniformGrid(4, 0.3)).numpy()
    s = error_stats(torch.from_numpy(ref), torch.from_numpy(app))
    for key, val in numpy_stats(ref, app).items():
        assert getattr(s, key) == pytest.approx(val, rel=1e-12), key


def test_zero_error_gives_infinite_sqnr():
    x = torch.tensor([0.5, -2.0, 3.0])
    s = error_stats(x, x.clone())
    assert s.sqnr_db == math.inf and s.mse == 0.0 and s.rel_err == 0.0 and s.cosine == pytest.approx(1.0)
    z = error_stats(torch.zeros(4), torch.zeros(4))
    assert z.sqnr_db == math.inf and z.cosine == 1.0


def test_zero_reference_with_error():
    s = error_stats(torch.zeros(3), torch.tensor([0.0, 1.0, 0.0]))
    assert s.sqnr_db == -math.inf and s.rel_err == math.inf and s.cosine == 0.0
    assert s.mse == pytest.approx(1 / 3)


def test_stats_are_frozen_and_serialisable():
    s = error_stats(torch.tensor([1.0, 2.0]), torch.tensor([1.0, 2.5]))
    assert isinstance(s, ErrorStats)
    with pytest.raises(dataclasses.FrozenInstanceError):
        s.mse = 0.0
    d = s.to_dict()
    assert set(d) == {"mse", "rmse", "max_abs", "sqnr_db", "rel_err", "cosine", "n"}
    assert "SQNR" in str(s)


def test_low_precision_and_integer_inputs():
    ref = torch.tensor([1.0, 2.0, 3.0])
    assert error_stats(ref.half(), ref.bfloat16()).sqnr_db == math.inf
    assert error_stats(torch.tensor([1, 2, 3]), ref).mse == 0.0


def test_bad_input_names_the_argument():
    with pytest.raises(ValueError, match="same shape"):
        error_stats(torch.zeros(3), torch.zeros(4))
    with pytest.raises(ValueError, match="empty"):
        error_stats(torch.zeros(0), torch.zeros(0))
    with pytest.raises(ValueError, match=r"reference holds 1 NaN"):
        error_stats(torch.tensor([math.nan, 1.0]), torch.zeros(2))
    with pytest.raises(ValueError, match=r"approx holds 0 NaN and 1 inf"):
        error_stats(torch.zeros(2), torch.tensor([math.inf, 1.0]))
    with pytest.raises(TypeError, match="approx must be a torch.Tensor"):
        error_stats(torch.zeros(2), [0.0, 0.0])


def test_inputs_are_never_modified():
    ref, app = torch.randn(50), torch.randn(50)
    keep = ref.clone(), app.clone()
    error_stats(ref, app)
    grid_usage(ref, UniformGrid(3, 0.2))
    assert torch.equal(ref, keep[0]) and torch.equal(app, keep[1])


# ------------------------------------------------------------------ grid usage
def test_grid_usage_worked_example():
    # grid -2, -1, 0, 1; values 0 and 0.1 -> code 0; 5 is beyond 1.5 -> clipped high, code 1
    u = grid_usage(torch.tensor([0.0, 0.1, 5.0]), UniformGrid(2, 1.0))
    assert (u.clipped_fraction, u.clipped_low, u.clipped_high) == (1 / 3, 0.0, 1 / 3)
    assert (u.bins_used, u.n_bins, u.used_fraction) == (2, 4, 0.5)


def test_grid_usage_counts_half_a_step_beyond_the_ends_as_clipped():
    g = UniformGrid(3, 1.0)  # -4..3, unclipped inputs in [-4.5, 3.5]
    u = grid_usage(torch.tensor([-4.5, -4.6, 3.5, 3.6, 0.0]), g)
    assert (u.clipped_low, u.clipped_high) == (1 / 5, 1 / 5)
    assert u.bins_used == 3  # -4, 3, 0


def test_grid_usage_per_channel_counts_levels_per_channel():
    g = UniformGrid(2, torch.tensor([1.0, 0.1]), axis=1)
    x = torch.tensor([[0.0, 0.0], [1.0, 0.0], [-2.0, 0.1], [9.0, -0.5]])
    u = grid_usage(x, g)
    # channel 0 codes {0, 1, -2, 1(clipped)} -> 3 levels; channel 1 codes {0, 0, 1, -2(clipped)} -> 3
    assert (u.bins_used, u.n_bins) == (6, 8)
    assert u.clipped_high == 1 / 8 and u.clipped_low == 1 / 8


# ------------------------------------------------------------------ large tensors (sliced path)
@pytest.mark.parametrize("axis", [None, 0, 1])
def test_large_tensors_match_numpy_across_slice_boundaries(axis):
    """Tensors far larger than one slice give the numpy definitions (float64, numpy.round is
    also round-half-to-even)."""
    rng = np.random.default_rng(7)
    x = rng.normal(size=(3, 100_003)).astype(np.float32)
    if axis is None:
        g = UniformGrid(3, 0.45, 0.05)
        s, o = 0.45, 0.05
    else:
        n = x.shape[axis]
        sv = rng.uniform(0.2, 0.6, n).astype(np.float32)
        ov = rng.uniform(-0.1, 0.1, n).astype(np.float32)
        g = UniformGrid(3, torch.from_numpy(sv), torch.from_numpy(ov), axis=axis)
        shape = [1, 1]
        shape[axis] = n
        s, o = sv.reshape(shape), ov.reshape(shape)
    xt = torch.from_numpy(x)
    app = quantize(xt, g).numpy()
    st = error_stats(xt, torch.from_numpy(app))
    for key, val in numpy_stats(x, app).items():
        assert getattr(st, key) == pytest.approx(val, rel=1e-9), key
    t = (x - o) / s  # float32, as the quantizer computes it
    codes = np.clip(np.round(t), g.qmin, g.qmax).astype(np.int64)
    u = grid_usage(xt, g)
    assert u.clipped_low == (t < g.qmin - 0.5).mean() and u.clipped_high == (t > g.qmax + 0.5).mean()
    if axis is None:
        assert u.bins_used == np.unique(codes).size
    else:
        per = np.moveaxis(codes, axis, 0).reshape(x.shape[axis], -1)
        assert u.bins_used == sum(np.unique(r).size for r in per)


@pytest.mark.parametrize("keep", [True, False])
@pytest.mark.parametrize("shape", [(7,), (256, 1031), (3, 65536)])
def test_fixed_reference_gives_error_stats_bit_for_bit(shape, keep, monkeypatch):
    """Reference: error_stats on the same pair (and numpy's definitions written out above, to
    float64 rounding). FixedReference keeps the reference's float64 slices (or, past
    KEEP_FLOAT64 values, converts them each call) and their powers; the figures are equal,
    not just close: the same slices summed in the same order. Slices of 65536 values, so the
    larger shapes span several, one ending short."""
    if not keep:
        monkeypatch.setattr(metrics, "KEEP_FLOAT64", 0)
    gen = torch.Generator().manual_seed(sum(shape))
    ref = torch.randn(shape, generator=gen)
    fixed = FixedReference(ref)
    for scale in (0.9, 1.0, 1.3):
        for app in (ref * scale + 0.01 * torch.randn(shape, generator=gen), (ref * scale).double(),
                    (ref * scale).half()):
            assert fixed.stats(app) == error_stats(ref, app)
    e = fixed.stats(ref * 1.1)
    want = numpy_stats(ref.numpy(), (ref * 1.1).numpy())
    assert e.sqnr_db == pytest.approx(want["sqnr_db"], abs=1e-9) and e.n == want["n"]


def test_fixed_reference_refuses_what_error_stats_refuses():
    ref = torch.randn(5, 4)
    fixed = FixedReference(ref)
    with pytest.raises(ValueError, match="same shape"):
        fixed.stats(torch.zeros(4, 5))
    bad = ref.clone()
    bad[1, 2] = float("nan")
    with pytest.raises(ValueError, match="approx holds 1 NaN"):
        fixed.stats(bad)
    with pytest.raises(ValueError, match="reference holds"):
        FixedReference(bad)
    with pytest.raises(ValueError, match="empty"):
        FixedReference(torch.zeros(0))
