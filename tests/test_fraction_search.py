"""The pruned clipping-fraction search against the same search measuring every candidate.

Outside checks: the search with pruning switched off (every one of the 48 sweep candidates
measured, compared with ``torch.equal``: pruning may only skip candidates that cannot win, so
the grids are the same, not close); the floor and clipping bounds against the error of the
values beyond the outermost levels written here as a loop over the values in float64, and
against the exact squared error from :meth:`SortedRows.sse`; the per-pair measurement
against the same grids measured in one rectangle (the same float32 operations per row).
"""

from __future__ import annotations

import pytest
import torch
from hypothesis import example, given, settings
from hypothesis import strategies as st
from naive_loops import golden_steps_by_hand

from qwidgets.core import cell_sums, clip_search, fraction_search
from qwidgets.core.cell_sums import Layout, SortedRows
from qwidgets.core.clip_search import GridSpecs
from qwidgets.core.ranges import RangeFitter


def _rows(seed: int, c: int, m: int, kind: str) -> torch.Tensor:
    gen = torch.Generator().manual_seed(seed)
    x = torch.randn(c, m, generator=gen) * torch.rand(c, 1, generator=gen) * 3
    if kind == "heavy":  # a few large values: the optimum clips them
        x = x * torch.rand(c, m, generator=gen) ** 3
    if kind == "relu":
        x = x.clamp(min=0)
    if kind == "shifted":
        x = x + x.std() * 0.8
    if kind == "zero_row":
        x[0] = 0.0
    return x


def _fit(x, bits, search: str, **kw):
    """The grids of the search (``"pruned"``), of the search before the floor bound, pruned by
    the clipping bound alone (``"before"``), or measuring every candidate (``"full"``)."""
    saved = clip_search.FLOOR_MIN_VALUES, clip_search.PRUNE_MIN_VALUES, clip_search.minimise_fraction
    try:
        clip_search.FLOOR_MIN_VALUES = 1 if search == "pruned" else 1 << 30
        clip_search.PRUNE_MIN_VALUES = 1 << 30 if search == "full" else 1
        if search == "before":
            clip_search.minimise_fraction = fraction_search.minimise_fraction_reference
        return RangeFitter(x, "mse", axis=0, **kw).fit_many(bits)
    finally:
        clip_search.FLOOR_MIN_VALUES, clip_search.PRUNE_MIN_VALUES, clip_search.minimise_fraction = saved


def _assert_same_grids(got, want):
    for p, f in zip(got, want, strict=True):
        assert torch.equal(p.scale_tensor(), f.scale_tensor())
        assert torch.equal(p.offset_tensor(), f.offset_tensor())


@settings(max_examples=60, deadline=None)
@given(seed=st.integers(0, 10_000), c=st.integers(1, 6), m=st.sampled_from([8, 40, 300, 1100]),
       kind=st.sampled_from(["randn", "heavy", "relu", "shifted", "zero_row"]),
       bits=st.lists(st.integers(1, 8), min_size=1, max_size=4, unique=True),
       symmetric=st.booleans(), style=st.sampled_from(["midtread", "midrise"]))
@example(seed=21, c=2, m=1100, kind="zero_row", bits=[7], symmetric=False, style="midrise")
def test_pruned_search_equals_the_search_before(seed, c, m, kind, bits, symmetric, style):
    # the contract: the grids of the search before (same candidates, same tie-breaking). That
    # search masks candidates with the clipping bound; where float32 rounding puts an error
    # below that bound past its margin (an all-zero row on an asymmetric mid-rise grid of 7 or
    # 8 bits), it can differ from measuring every candidate, and so does this one: it falls
    # back to that search there
    x = _rows(seed, c, m, kind)
    pruned = _fit(x, bits, "pruned", symmetric=symmetric, style=style)
    _assert_same_grids(pruned, _fit(x, bits, "before", symmetric=symmetric, style=style))


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 10_000), c=st.integers(1, 6), m=st.sampled_from([40, 300, 1100]),
       kind=st.sampled_from(["randn", "heavy", "relu", "shifted"]),
       bits=st.lists(st.integers(2, 8), min_size=1, max_size=4, unique=True),
       symmetric=st.booleans(), style=st.sampled_from(["midtread", "midrise"]))
def test_pruned_search_equals_measuring_every_candidate(seed, c, m, kind, bits, symmetric, style):
    x = _rows(seed, c, m, kind)
    pruned = _fit(x, bits, "pruned", symmetric=symmetric, style=style)
    _assert_same_grids(pruned, _fit(x, bits, "full", symmetric=symmetric, style=style))


def _beyond_levels(x, lo_level, hi_level):
    """Squared error of the values below the lowest level and above the highest, float64, by a
    loop over each row's values (the outside reference for the floor bound)."""
    below, above = [], []
    for row, lo, hi in zip(x.double(), lo_level.tolist(), hi_level.tolist(), strict=True):
        below.append(sum((v - lo) ** 2 for v in row.tolist() if v < lo))
        above.append(sum((v - hi) ** 2 for v in row.tolist() if v > hi))
    return torch.tensor(below, dtype=torch.float64), torch.tensor(above, dtype=torch.float64)


@pytest.mark.parametrize("signed,style", [(True, "midtread"), (True, "midrise"), (False, "midtread"),
                                          (False, "midrise")])
def test_floor_bound_is_below_the_clipping_bound_and_the_error_and_falls_with_t(signed, style):
    x = _rows(3, 5, 700, "heavy")
    if not signed:
        x = x.abs()
    rows, specs = SortedRows(x), GridSpecs((2, 4), signed, True, style)
    r = x.abs().amax(1).double()
    t = fraction_search.sweep_fractions()
    s, o = specs.symmetric_grid(t * r[:, None, None].expand(-1, 2, -1))
    below, above = rows.clamp_sse(specs.layout, s, o)
    clip, err = rows.clip_sse(specs.layout, s, o), rows.sse(specs.layout, s, o)
    tol = 1e-9 * rows.total2[:, None, None]  # float64 prefix sums: rounding far below this
    assert bool((below + above <= clip + tol).all())
    # sse rounds these rows in float32 (about 1e-7 relative off float64): the search's margin
    assert bool((clip * (1 - 1e-5) <= err + tol).all())
    lo_level, hi_level = s * specs.layout.low + o, s * specs.layout.high + o
    for j in (0, 1):
        ref_below, ref_above = _beyond_levels(x, lo_level[:, j, 30], hi_level[:, j, 30])
        assert torch.allclose(below[:, j, 30], ref_below, rtol=1e-9, atol=1e-9)
        assert torch.allclose(above[:, j, 30], ref_above, rtol=1e-9, atol=1e-9)
    # the top level moves outwards with t: the error above it can only fall (up to rounding)
    assert bool((above.diff(dim=2) <= tol).all())
    if signed:  # so does the bottom level of a signed grid; unsigned mid-rise's rises with t
        assert bool((below.diff(dim=2) <= tol).all())


def test_rows_measured_one_pair_at_a_time_equal_the_rectangle():
    x = _rows(4, 30, 600, "heavy")
    rows = SortedRows(x)
    lay = Layout([-128, -8, 0], [127, 7, 15])  # every width rounded directly on 600 values
    assert all(rows.direct_widths(lay))
    gen = torch.Generator().manual_seed(5)
    scale = (torch.rand(30, 3, 4, generator=gen, dtype=torch.float64) + 0.1) * 0.05
    offset = torch.where(torch.arange(4) % 2 == 0, 0.0, scale * 0.5)  # centred and shifted grids
    rect = rows.sse(lay, scale, offset)
    for j in range(3):
        r = torch.arange(30).repeat_interleave(4)
        got = rows.sse_rows(lay.part((j,)), r, scale[:, j].reshape(-1), offset[:, j].reshape(-1))
        assert torch.equal(got, rect[:, j].reshape(-1))
        assert torch.equal(rows.sse(lay.part((j,)), scale[:, j:j + 1], offset[:, j:j + 1]), rect[:, j:j + 1])


def test_a_width_measured_alone_by_runs_equals_its_column():
    x = _rows(6, 8, 5000, "randn")
    rows = SortedRows(x)
    lay = Layout([-2, -4, 0, -128], [1, 3, 7, 127])
    assert rows.direct_widths(lay) == [False, False, False, True]
    gen = torch.Generator().manual_seed(7)
    scale = (torch.rand(8, 4, 5, generator=gen, dtype=torch.float64) + 0.1) * 0.5
    offset = scale * 0.25
    rect = rows.sse(lay, scale, offset)
    for j in range(4):
        alone = rows.sse(lay.part((j,)), scale[:, j:j + 1], offset[:, j:j + 1])
        assert torch.equal(alone, rect[:, j:j + 1])


def test_a_bound_that_fails_where_checked_gives_the_reference_search(monkeypatch):
    # a clipping "bound" above the error (invalid on purpose): the pruned sweep finds it out at
    # the point it picks and runs the reference search, which masks with that bound; so the
    # grids are exactly the reference search's, even with a bound that does not hold
    x = _rows(8, 12, 400, "heavy")
    rows = SortedRows(x)
    monkeypatch.setattr(SortedRows, "clip_sse", lambda self, lay, s, o: self.sse(lay, s, o) * 1.5 + 1e-3)
    specs = GridSpecs((2, 3, 6), True, True, "midtread")
    r = x.abs().amax(1).double()
    fallback = []
    reference = fraction_search.minimise_fraction_reference

    def counted(problem):
        fallback.append(True)
        return reference(problem)

    monkeypatch.setattr(fraction_search, "minimise_fraction_reference", counted)
    got = clip_search.search_symmetric(rows, specs, r)
    assert fallback
    monkeypatch.setattr(clip_search, "minimise_fraction", reference)
    assert torch.equal(got, clip_search.search_symmetric(rows, specs, r))


def test_long_rows_are_summed_in_pieces_the_same_way_in_both_measurements(monkeypatch):
    monkeypatch.setattr(cell_sums, "_ROW_SUM", 64)  # rows of 200 values: four pieces
    x = _rows(9, 6, 200, "randn")
    rows = SortedRows(x)
    lay = Layout([-8], [7])
    s = torch.full((6, 1, 1), 0.3, dtype=torch.float64)
    rect = rows.sse(lay, s, torch.zeros_like(s))
    got = rows.sse_rows(lay, torch.arange(6), s.reshape(-1), torch.zeros(6, dtype=torch.float64))
    assert torch.equal(got, rect.reshape(-1))
    q = (x / s.float().reshape(6, 1)).round().clamp(-8, 7) * s.float().reshape(6, 1)
    assert torch.allclose(got, ((q - x).double() ** 2).sum(dim=1), rtol=1e-5)


def test_golden_steps_pick_what_comparing_both_inner_points_picks():
    # staircase objectives (many exact ties, flat stretches) around each row's own minimum
    gen = torch.Generator().manual_seed(11)
    centre = torch.rand(500, 1, generator=gen, dtype=torch.float64)
    step = torch.rand(500, 1, generator=gen, dtype=torch.float64) * 1e-3 + 1e-6

    def evaluate(t):
        return torch.floor((t - centre) ** 2 / step) * step

    t = fraction_search.sweep_fractions()
    err = evaluate(t.expand(500, -1))
    best_i = 47 - err.flip(1).argmin(dim=1)
    best_e = err.gather(1, best_i[:, None]).squeeze(1)
    got = fraction_search._golden(evaluate, t, best_i, best_e)
    assert torch.equal(got, golden_steps_by_hand(evaluate, t, best_i, best_e))
