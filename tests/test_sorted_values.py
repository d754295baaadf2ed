"""SortedValues: the figures of error_stats / grid_usage from a sorted copy with prefix sums.

Checked against a naive loop written here (round each value, sum the squares in float64) and
against the core functions on the same grids."""

from __future__ import annotations

import math

import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

from qwidgets import UniformGrid, error_stats, fit_range, grid_usage, quantize
from qwidgets.core.grid import grid_params
from qwidgets.core.sorted_values import MAX_LEVELS, SortedValues


def _naive(values, grid):
    """A loop written here: each value to its nearest grid value (clamped), sums in float64."""
    sig = err = 0.0
    codes = set()
    clipped = 0
    s, o = float(grid.scale), float(grid.offset)
    for v in values.reshape(-1).tolist():
        t = (v - o) / s
        k = min(max(round(t), grid.qmin), grid.qmax)
        clipped += t < grid.qmin - 0.5 or t > grid.qmax + 0.5
        codes.add(k)
        q = k * s + o
        sig += v * v
        err += (q - v) ** 2
    return 10 * math.log10(sig / err), len(codes), clipped / values.numel()


@pytest.mark.parametrize("bits", [2, 3, 5, 8])
def test_matches_a_naive_loop(bits):
    torch.manual_seed(bits)
    x = torch.randn(3000) * 0.7 + 0.1
    g = fit_range(x, bits, "mse")
    stats, usage = SortedValues(x).measure(g)
    sqnr, used, clipped = _naive(x, g)
    assert stats.sqnr_db == pytest.approx(sqnr, abs=1e-6)
    assert usage.bins_used == used and usage.clipped_fraction == pytest.approx(clipped)


@settings(max_examples=25, deadline=None)
@given(bits=st.integers(1, 10), factor=st.floats(0.05, 20.0), shift=st.floats(-3.0, 3.0),
       signed=st.booleans(), per_channel=st.booleans(), seed=st.integers(0, 1000))
def test_same_figures_as_the_core_functions(bits, factor, shift, signed, per_channel, seed):
    """Property: on any grid the figures equal error_stats / grid_usage (float64 rounding)."""
    torch.manual_seed(seed)
    x = torch.randn(6, 50) * 0.2
    g = fit_range(x, bits, "minmax", signed=signed, axis=0 if per_channel else None)
    g = g.replace(scale=g.scale * factor, offset=g.offset + shift * g.scale)
    stats, usage = SortedValues(x, axis=0 if per_channel else None).measure(g)
    ref = error_stats(x, quantize(x, g))
    assert stats.sqnr_db == pytest.approx(ref.sqnr_db, abs=1e-6)
    assert stats.mse == pytest.approx(ref.mse, rel=1e-6, abs=1e-15)
    assert stats.cosine == pytest.approx(ref.cosine, abs=1e-9)
    assert stats.max_abs == pytest.approx(ref.max_abs, rel=1e-6, abs=1e-12)
    expected = grid_usage(x, g)
    # A value exactly on a rounding threshold (a minmax grid's extreme value, moved by half a
    # step) is a tie that float32 steps and float64 thresholds may round either way: each such
    # value may move one count. Elsewhere the figures are equal.
    s_, o_ = (p.double() for p in grid_params(x, g))
    t = (x.double() - o_) / s_
    ties = int(((t - t.round()).abs() - 0.5).abs().le(1e-6).sum())
    n = x.numel()
    assert usage.n_bins == expected.n_bins and abs(usage.bins_used - expected.bins_used) <= ties
    for name in ("clipped_low", "clipped_high"):
        assert abs(getattr(usage, name) - getattr(expected, name)) * n <= ties + 1e-9, name
    if ties == 0:
        assert usage == expected


def test_many_levels_are_measured_directly():
    x = torch.linspace(-1, 1, 501)
    g = UniformGrid(12, 2 / 4095)
    assert g.n_levels > MAX_LEVELS
    stats, usage = SortedValues(x).measure(g)
    assert stats == error_stats(x, quantize(x, g)) and usage == grid_usage(x, g)


def test_bad_input():
    with pytest.raises(ValueError, match="values is empty"):
        SortedValues(torch.zeros(0))
    with pytest.raises(TypeError, match="grid must be a UniformGrid"):
        SortedValues(torch.ones(3)).measure("grid")
    with pytest.raises(ValueError, match="grid.axis must be None"):
        SortedValues(torch.ones(3, 2)).measure(UniformGrid(4, torch.ones(3), axis=0))
