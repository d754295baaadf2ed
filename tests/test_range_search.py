"""The MSE range search from sorted prefix sums against the search it replaced, written here.

Reference: the sweep-then-golden-section search over the clipping fraction (48 geometric
fractions from 1e-4 to 1, the widest of equal minima, 22 golden-section steps), every candidate
grid measured by quantizing every value with torch's own round / clamp (float32, errors summed
in float64) -- the search ``fit_range`` ran before the sorted evaluator, one width at a time.
"""

from __future__ import annotations

import math

import pytest
import torch
from naive_loops import golden_steps_by_hand

from qwidgets import UniformGrid, fit_range, quantize
from qwidgets.core import clip_search
from qwidgets.core.clip_search import GridSpec
from qwidgets.core.fit_groups import fit_together
from qwidgets.core.ranges import RangeFitter, fit_ranges


def _sse_by_quantizing(x, spec, scale, offset):  # x (C, M); scale, offset (C, K) -> (C, K)
    s, o = scale.float()[:, :, None], offset.float()[:, :, None]
    xx = x[:, None, :]
    q = ((xx - o) / s).round().clamp(spec.qmin, spec.qmax) * s + o
    return ((q - xx) ** 2).sum(dim=2, dtype=torch.float64)


def _reference_search(objective, rows):
    t = torch.logspace(-4.0, 0.0, 48, dtype=torch.float64)
    err = objective(t.expand(rows, -1))
    best_i = 47 - err.flip(1).argmin(dim=1)
    return golden_steps_by_hand(objective, t, best_i, err.gather(1, best_i[:, None]).squeeze(1))


def _reference_symmetric(x2d, bits, signed, style):
    spec = GridSpec(bits, signed, True, style)
    a = x2d.abs() if signed else x2d.clamp(min=0)
    r_max = a.amax(dim=1).double()
    r_max = torch.where(r_max > 0, r_max, r_max.max() if bool((r_max > 0).any()) else 1.0)
    tiny = torch.finfo(torch.float32).tiny

    def objective(t):
        return _sse_by_quantizing(x2d, spec, *spec.symmetric_grid((t * r_max[:, None]).clamp(min=tiny)))

    return spec.symmetric_grid(_reference_search(objective, x2d.shape[0]) * r_max)


def _sqnr_db(x, grid):
    x = x.double()
    return 10 * math.log10(float((x ** 2).sum()) / float(((quantize(x.float(), grid).double() - x) ** 2).sum()))


CASES = [((64, 144), "randn"), ((128, 1152), "heavy"), ((300, 40), "randn"), ((1, 200_000), "heavy"),
         ((16, 147), "heavy"), ((8, 5000), "relu")]


def _values(shape, kind, seed):
    gen = torch.Generator().manual_seed(seed)
    x = torch.randn(*shape, generator=gen)
    if kind == "heavy":  # heavy tails: a few large values, the optimum clips them
        x = x * torch.rand(*shape, generator=gen) ** 3 * 4
    if kind == "relu":
        x = x.clamp(min=0)
    return x


@pytest.mark.parametrize("shape,kind", CASES)
@pytest.mark.parametrize("style", ["midtread", "midrise"])
def test_sorted_search_gives_the_grids_of_the_quantizing_search(shape, kind, style):
    x = _values(shape, kind, seed=shape[0] + len(kind))
    bits = (2, 3, 4, 5, 6, 8)
    axis = None if shape[0] == 1 else 0
    grids = fit_ranges(x, bits, "mse", axis=axis, style=style)
    signed = bool((x < 0).any())
    for b, g in zip(bits, grids, strict=True):
        ref_s, ref_o = _reference_symmetric(x, b, signed, style)
        got = g.scale_tensor().double().reshape(-1)
        same = got == ref_s.float().double()
        assert torch.allclose(got, ref_s, rtol=1e-2)
        # the same candidates and steps; the errors are summed differently (prefix sums in
        # float64, or float32 sums of the squares), which can flip a near-tie of the flat
        # minimum's golden-section steps: there the two grids must be equally good
        for r in torch.nonzero(~same).flatten().tolist():
            row = x[r]
            mine = UniformGrid(b, float(got[r]), float(g.offset_tensor().reshape(-1)[r]), signed=signed)
            theirs = UniformGrid(b, float(ref_s[r]), float(ref_o[r]), signed=signed)
            assert abs(_sqnr_db(row, mine) - _sqnr_db(row, theirs)) < 1e-4


def test_pruned_sweep_picks_what_measuring_every_candidate_picks(monkeypatch):
    # the same search with the bound pruning switched off is the reference
    x = _values((200, 300), "heavy", seed=5)
    kw = dict(axis=0)
    pruned = fit_ranges(x, (2, 4, 8), "mse", **kw) + fit_ranges(x, (3, 5), "mse", symmetric=False, **kw)
    calls = []
    original = clip_search.minimise_fraction

    def no_bound(problem):
        calls.append(problem.prune)
        problem.prune = False
        return original(problem)

    monkeypatch.setattr(clip_search, "minimise_fraction", no_bound)
    full = fit_ranges(x, (2, 4, 8), "mse", **kw) + fit_ranges(x, (3, 5), "mse", symmetric=False, **kw)
    assert calls and all(calls)
    for p, f in zip(pruned, full, strict=True):
        assert torch.equal(p.scale_tensor(), f.scale_tensor())
        assert torch.equal(p.offset_tensor(), f.offset_tensor())


def test_pruning_skips_most_sweep_candidates():
    x = _values((64, 576), "randn", seed=6)
    rows = clip_search.SortedRows(x)
    specs = clip_search.GridSpecs((2, 4, 8), True, True, "midtread")
    r = x.abs().amax(1).double()
    obj = clip_search._Objective(rows, specs, lambda t, p: specs.symmetric_grid(t * p.row(r), p.which()))
    measured = []  # candidates measured, per (row, width) pair
    rect, items = obj.error, obj.error_items

    def counted(t):
        measured.append(t.shape[1])
        return rect(t)

    def counted_items(pairs, t):
        measured.append(pairs.numel() / obj.n)
        return items(pairs, t)

    obj.error, obj.error_items = counted, counted_items
    obj.search()
    sweep = sum(measured) - 24  # the golden-section phase measures 24 points
    assert sweep <= 48 // 4


def test_rows_are_fitted_independently_of_each_other():
    # a block or channel fit is a fit of each row: the rows stacked give each row's own grid
    x = _values((12, 256), "heavy", seed=7)
    together = RangeFitter(x, "mse", axis=0, symmetric=False).fit_many((3, 6))
    for r in range(12):
        alone = RangeFitter(x[r:r + 1], "mse", axis=0, symmetric=False, signed=True).fit_many((3, 6))
        for t, a in zip(together, alone, strict=True):
            assert float(t.scale_tensor()[r]) == float(a.scale_tensor()[0])
            assert float(t.offset_tensor()[r]) == float(a.offset_tensor()[0])


def test_fit_many_equals_fit_per_width_and_fit_range():
    x = _values((10, 700), "relu", seed=8)
    fitter = RangeFitter(x, "mse", axis=0)
    many = fitter.fit_many((8, 2, 5))
    for b, g in zip((8, 2, 5), many, strict=True):
        assert torch.equal(g.scale_tensor(), fitter.fit(b).scale_tensor())
        assert torch.equal(g.scale_tensor(), fit_range(x, b, "mse", axis=0).scale_tensor())


@pytest.mark.parametrize("symmetric", [True, False])
def test_fits_searched_together_equal_each_fit_alone(symmetric):
    # three tensors with 300 values a row (one with an all-zero row, which takes its own tensor's
    # widest extent), one with 40, one per tensor: the grids of fit_together are each fit's own
    a = _values((5, 300), "heavy", seed=9)
    a[2] = 0.0
    tensors = [a, _values((7, 300), "randn", seed=10), _values((40,), "relu", seed=11) - 0.5,
               _values((3, 40), "randn", seed=12), _values((2, 300), "relu", seed=13)]
    axes = [0, 0, None, 0, 0]
    fitters = [RangeFitter(t, "mse", axis=ax, symmetric=symmetric) for t, ax in zip(tensors, axes, strict=True)]
    assert len({f.group_key() for f in fitters}) == 3  # 300 values signed, 300 unsigned, 40
    together = fit_together(fitters, (2, 5, 8))
    for t, ax, grids in zip(tensors, axes, together, strict=True):
        alone = RangeFitter(t, "mse", axis=ax, symmetric=symmetric).fit_many((2, 5, 8))
        for g, h in zip(grids, alone, strict=True):
            assert torch.equal(g.scale_tensor(), h.scale_tensor())
            assert torch.equal(g.offset_tensor(), h.offset_tensor())
            assert g.axis == h.axis and g.signed == h.signed


def test_short_rows_measure_every_sweep_candidate_with_the_same_grids(monkeypatch):
    # rows under FLOOR_MIN_VALUES skip the bounds; with the bounds forced on they give the same grids
    x = _values((50, 100), "heavy", seed=14)
    assert x.shape[1] < clip_search.FLOOR_MIN_VALUES
    plain = fit_ranges(x, (2, 5, 8), "mse", axis=0)
    monkeypatch.setattr(clip_search, "FLOOR_MIN_VALUES", 1)
    pruned = fit_ranges(x, (2, 5, 8), "mse", axis=0)
    for p, f in zip(pruned, plain, strict=True):
        assert torch.equal(p.scale_tensor(), f.scale_tensor())


def test_pruning_keeps_the_best_candidate_where_the_bound_is_the_whole_error(monkeypatch):
    # at 1 bit the two clipping runs are every value: the bound equals the error, which rows
    # of fewer than 1024 values measure by float32 rounding (about 1e-7 relative off the float64
    # bound); pruning must still give the grids of measuring every candidate
    x = _values((40, 300), "heavy", seed=15)
    pruned = fit_ranges(x, (1, 2, 8), "mse", axis=0)
    monkeypatch.setattr(clip_search, "FLOOR_MIN_VALUES", 1 << 30)  # no row prunes
    monkeypatch.setattr(clip_search, "PRUNE_MIN_VALUES", 1 << 30)
    full = fit_ranges(x, (1, 2, 8), "mse", axis=0)
    for p, f in zip(pruned, full, strict=True):
        assert torch.equal(p.scale_tensor(), f.scale_tensor())
