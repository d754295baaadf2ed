"""Costs and the exact bit allocator (scipy.optimize.milp) and Pareto front.

Outside check: the allocator against exhaustive enumeration of every assignment (the
definition of the optimum), written here, on random small instances (<= 6 entries x 4
options, one to three budgets at once).
"""

from __future__ import annotations

import itertools
import math
import re

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from qwidgets.planning.costs import layer_bops, weight_storage_bits
from qwidgets.planning.front import front, hull_front
from qwidgets.planning.solver import pareto_front, plan_budget, solve
from qwidgets.planning.table import SensitivityTable

BITS4 = (2, 4, 6, 8)


def _exhaustive(costs, noise, limit):
    """Least total noise over every assignment with total cost <= limit (None if none fits).

    ``costs`` may be one (entries x options) matrix or a list of them with a list of limits
    (several budgets, all must hold).
    """
    if not isinstance(costs, list):
        costs, limit = [costs], [limit]
    best = None
    layers, k = noise.shape
    for a in itertools.product(range(k), repeat=layers):
        if all(sum(int(c[i, a[i]]) for i in range(layers)) <= lim for c, lim in zip(costs, limit, strict=True)):
            n = sum(float(noise[i, a[i]]) for i in range(layers))
            best = n if best is None else min(best, n)
    return best


def test_noise_below_the_solvers_gap_is_settled():
    # found by the property test below: HiGHS stops within an absolute gap of its scaled
    # objective, which left the second entry on its 1e-9 option; reference: enumeration
    costs = np.array([[1, 2, 2, 2], [25, 25, 25, 25]], dtype=np.int64)
    noise = np.array([[1e-2, 0.0, 0.0, 0.0], [0.0, 0.0, 0.0, 1e-9]])
    choice = solve(list(noise), [list(costs)], [26])
    assert float(noise[[0, 1], choice].sum()) == _exhaustive(costs, noise, 26) == 1e-2


@st.composite
def instances(draw):
    layers = draw(st.integers(1, 6))
    k = draw(st.integers(1, 4))
    costs = np.array(draw(st.lists(st.lists(st.integers(1, 40), min_size=k, max_size=k),
                                   min_size=layers, max_size=layers)), dtype=np.int64)
    # noise from a small set of values too, so ties and dominated options occur
    noise = np.array(draw(st.lists(st.lists(st.sampled_from([0.0, 0.01, 0.1, 0.25, 0.5, 1.0, 2.0])
                                            | st.floats(0, 3), min_size=k, max_size=k),
                                   min_size=layers, max_size=layers)))
    lo, hi = int(costs.min(1).sum()), int(costs.max(1).sum())
    limit = draw(st.integers(lo, hi + 3))
    return costs, noise, limit


@settings(max_examples=150, deadline=None)
@given(instances())
def test_solver_equals_exhaustive_enumeration(inst):
    # reference: exhaustive enumeration of every assignment
    costs, noise, limit = inst
    choice = solve(list(noise), [list(costs)], [limit])
    rows = np.arange(costs.shape[0])
    assert int(costs[rows, choice].sum()) <= limit
    assert float(noise[rows, choice].sum()) == pytest.approx(_exhaustive(costs, noise, limit),
                                                             rel=1e-9, abs=1e-12)


@st.composite
def multi_instances(draw):
    layers = draw(st.integers(1, 5))
    k = draw(st.integers(1, 4))
    n_budgets = draw(st.integers(1, 3))
    mat = st.lists(st.lists(st.integers(1, 60), min_size=k, max_size=k), min_size=layers, max_size=layers)
    costs = [np.array(draw(mat), dtype=np.int64) for _ in range(n_budgets)]
    noise = np.array(draw(st.lists(st.lists(st.sampled_from([0.0, 1e-4, 0.01, 0.1, 0.5, 2.0])
                                            | st.floats(0, 3), min_size=k, max_size=k),
                                   min_size=layers, max_size=layers)))
    limits = [draw(st.integers(int(c.min(1).sum()) - 2, int(c.max(1).sum()) + 2)) for c in costs]
    return costs, noise, limits


@settings(max_examples=120, deadline=None)
@given(multi_instances())
def test_solver_with_several_budgets_equals_exhaustive_enumeration(inst):
    # reference: exhaustive enumeration of every assignment, every budget checked in integers
    costs, noise, limits = inst
    best = _exhaustive(costs, noise, limits)
    choice = solve(list(noise), [list(c) for c in costs], limits)
    if best is None:
        assert choice is None
        return
    rows = np.arange(noise.shape[0])
    for c, lim in zip(costs, limits, strict=True):
        assert int(c[rows, choice].sum()) <= lim
    assert float(noise[rows, choice].sum()) == pytest.approx(best, rel=1e-9, abs=1e-12)


@settings(max_examples=60, deadline=None)
@given(instances())
def test_front_equals_exhaustive_pareto_set(inst):
    # reference: the non-dominated (cost, noise) pairs among all assignments, by enumeration
    costs, noise, _ = inst
    layers, k = costs.shape
    pts = []
    for a in itertools.product(range(k), repeat=layers):
        pts.append((sum(int(costs[i, a[i]]) for i in range(layers)),
                    sum(float(noise[i, a[i]]) for i in range(layers))))
    pts.sort()
    expect, best = [], math.inf
    for c, n in pts:
        if n < best:  # same summation order as the allocator: exact comparison
            expect.append((c, n))
            best = n
    fc, fn, choices = front(list(costs), list(noise))
    assert [int(c) for c in fc] == [c for c, _ in expect]
    np.testing.assert_allclose(fn, [n for _, n in expect], atol=1e-12)
    rows = np.arange(layers)
    for c, ch in zip(fc, choices, strict=True):
        assert int(costs[rows, ch].sum()) == c


@settings(max_examples=80, deadline=None)
@given(instances())
def test_hull_front_points_are_optima_and_include_every_hull_vertex(inst):
    # reference: every assignment enumerated; its lower convex hull computed here
    costs, noise, _ = inst
    layers, k = costs.shape
    pts = {}
    for a in itertools.product(range(k), repeat=layers):
        c = sum(int(costs[i, a[i]]) for i in range(layers))
        n = sum(float(noise[i, a[i]]) for i in range(layers))
        pts[c] = min(pts.get(c, math.inf), n)
    cs = sorted(pts)
    best_upto = {c: min(pts[x] for x in cs if x <= c) for c in cs}
    fc, fn, choices = hull_front(list(costs), list(noise))
    rows = np.arange(layers)
    for c, n, ch in zip(fc, fn, choices, strict=True):
        assert int(costs[rows, ch].sum()) == c
        assert n == pytest.approx(best_upto[int(c)], rel=1e-9, abs=1e-12)  # optimal at its cost
    # vertices of the lower convex hull of the best-noise-per-cost staircase
    stair = [(c, best_upto[c]) for c in cs]
    hull = []
    for p in stair:
        while len(hull) >= 2:
            (c1, n1), (c2, n2) = hull[-2], hull[-1]
            if (n2 - n1) * (p[0] - c1) >= (p[1] - n1) * (c2 - c1) - 1e-12:
                hull.pop()
            else:
                break
        hull.append(p)
    got = {int(c) for c in fc}
    for c, n in hull:
        if n < hull[0][1] or c == hull[0][0]:
            assert c in got or any(abs(float(x) - n) < 1e-12 for x, cc in zip(fn, fc, strict=True)
                                   if cc <= c), (c, n)


def _random_table(rng, layers, bits=BITS4, per_layer_shift=True):
    params = rng.integers(50, 5000, layers)
    shift = rng.normal(0, 4, (layers, 1)) if per_layer_shift else 0
    sq = 6.02 * np.array(bits)[None, :] + shift + rng.normal(0, 1, (layers, len(bits)))
    return SensitivityTable.synthetic(np.sort(sq, axis=1), params=params.tolist(), bits=bits,
                                      macs=(params * rng.integers(1, 50, layers)).tolist())


@pytest.mark.parametrize("seed", range(6))
def test_plan_budget_equals_exhaustive_for_every_budget_kind(seed):
    # reference: exhaustive enumeration over the table's options, costs counted by hand
    rng = np.random.default_rng(seed)
    layers = int(rng.integers(2, 7))
    t = _random_table(rng, layers)
    noise = 10 ** (-t.sqnr_array("model") / 10)
    params = np.array([t.params(n) for n in t.layers])
    macs = np.array([t.macs(n) for n in t.layers])
    b = np.array(t.bits)
    kib_bits = params[:, None] * b[None, :] + 64  # per-tensor grid: one scale and zero point
    cases = [
        ("planned_kib", kib_bits, float(rng.uniform(kib_bits.min(1).sum(), kib_bits.max(1).sum())) / 8192),
        ("mean_bits", kib_bits, float(rng.uniform(2, 8))),  # stored bits per weight, the same count
        ("bops", macs[:, None] * b[None, :] * 8, float(rng.uniform((macs * 16).sum(), (macs * 64).sum()))),
    ]
    for kind, costs, value in cases:
        limit = math.floor(value * (8192 if kind == "planned_kib" else params.sum() if kind == "mean_bits" else 1))
        plan = plan_budget(t, **{kind: value})
        choice = np.array([t.bits.index(plan.bits[n]) for n in t.layers])
        rows = np.arange(layers)
        assert int(costs[rows, choice].sum()) <= limit
        best = _exhaustive(costs, noise, limit)
        assert float(noise[rows, choice].sum()) == pytest.approx(best, rel=1e-12)
        assert plan.predicted_sqnr_db == pytest.approx(-10 * math.log10(best), abs=1e-9)
        # the plan's own cost figures are the same counts
        if kind == "planned_kib":
            assert plan.planned_kib <= value
        elif kind == "mean_bits":
            assert plan.mean_bits <= value + 1e-12
        else:
            assert plan.bops <= value


def _greedy_mean_bits(noise, params, bits, budget_bits):
    """Greedy baseline written here: start every layer at its fewest bits, then repeatedly
    take the single upgrade (one layer to a wider option) with the largest noise reduction per
    added weight bit that still fits the budget, until none fits."""
    choice = [0] * len(params)
    used = sum(p * bits[0] for p in params)
    while True:
        best = None
        for i, p in enumerate(params):
            for j in range(choice[i] + 1, len(bits)):
                extra = p * (bits[j] - bits[choice[i]])
                gain = noise[i, choice[i]] - noise[i, j]
                if used + extra <= budget_bits and gain > 0:
                    rate = gain / extra
                    if best is None or rate > best[0]:
                        best = (rate, i, j, extra)
        if best is None:
            return choice
        _, i, j, extra = best
        choice[i], used = j, used + extra


def test_large_table_is_solved_and_beats_greedy_and_uniform():
    # 200 layers x 8 options (the benchmark's size); the exact optimum can be no worse than any
    # feasible plan: the uniform one at the same budget, and a greedy one written in the test
    rng = np.random.default_rng(7)
    t = _random_table(rng, 200, bits=(2, 3, 4, 5, 6, 8, 10, 12))
    uniform = t.make_plan({n: 5 for n in t.layers})
    noise = 10 ** (-t.sqnr_array("model") / 10)
    params = [t.params(n) for n in t.layers]
    uniform_noise = noise[:, t.bits.index(5)].sum()
    greedy = _greedy_mean_bits(noise, params, t.bits, 5 * sum(params))
    greedy_noise = sum(noise[i, j] for i, j in enumerate(greedy))
    assert sum(p * t.bits[j] for p, j in zip(params, greedy, strict=True)) <= 5 * sum(params)
    # mean bits are stored bits: 5 code bits a weight plus one 64-bit scale and zero point an entry
    five = (5 * sum(params) + 64 * len(params)) / sum(params)
    plan = plan_budget(t, mean_bits=five)
    assert plan.mean_bits <= five
    assert plan.predicted_sqnr_db >= -10 * math.log10(uniform_noise) - 1e-9
    assert plan.predicted_sqnr_db >= -10 * math.log10(greedy_noise) - 1e-9
    assert uniform.mean_bits == pytest.approx(five, rel=1e-12)
    # the solver's noise is what its own bit widths give, by the table
    chosen = sum(noise[i, t.bits.index(plan.bits[n])] for i, n in enumerate(t.layers))
    assert plan.predicted_sqnr_db == pytest.approx(-10 * math.log10(chosen), abs=1e-9)


def test_pareto_front_points_are_plan_budget_optima():
    rng = np.random.default_rng(3)
    t = _random_table(rng, 5)
    front = pareto_front(t, "mean_bits")
    costs = [c for c, _, _ in front]
    sq = [s for _, s, _ in front]
    assert costs == sorted(costs) and sq == sorted(sq)
    total = sum(t.params(n) for n in t.layers)  # stored bits: codes + a 64-bit scale and zero point
    assert costs[0] == pytest.approx(2 + 64 * 5 / total) and costs[-1] == pytest.approx(8 + 64 * 5 / total)
    for c, s, plan in front:
        assert plan.mean_bits == pytest.approx(c)
        assert plan_budget(t, mean_bits=c).predicted_sqnr_db == pytest.approx(s, abs=1e-9)
    thin = pareto_front(t, "mean_bits", max_points=4)
    assert len(thin) <= 4 and thin[0][0] == costs[0] and thin[-1][0] == costs[-1]
    kib = pareto_front(t, "planned_kib")
    assert all(p.planned_kib == pytest.approx(c) for c, _, p in kib)
    bops = pareto_front(t, "bops", assumed_input_bits=4)
    assert all(p.bops == c for c, _, p in bops)


def test_costs_counted_by_hand():
    # 1000 weights at 4 bits + 10 channels x (float32 scale + int32 zero point)
    assert weight_storage_bits(1000, 4, 10) == 4000 + 10 * 64
    assert weight_storage_bits(1000, None) == 32000
    assert layer_bops(10, 4, 8) == 320 and layer_bops(10, None, 8) == 2560


def test_infeasible_budget_states_the_smallest_feasible_one():
    t = SensitivityTable.synthetic(np.array([[10.0, 30.0], [20.0, 40.0]]), params=[1000, 3000],
                                   bits=(4, 8), macs=[5000, 7000])
    with pytest.raises(ValueError, match=r"smallest feasible budget") as e:
        plan_budget(t, planned_kib=0.5)
    need = float(re.search(r"smallest feasible budget is planned_kib=([0-9.]+) ", str(e.value)).group(1))
    assert need == pytest.approx((4000 * 4 + 128) / 8192, abs=1e-4)
    assert plan_budget(t, planned_kib=need).bits == {"layer0": 4, "layer1": 4}
    # stored bits per weight: (4000 x 4 + 2 x 64) / 4000
    with pytest.raises(ValueError, match=r"smallest feasible budget is mean_bits=4\.0320"):
        plan_budget(t, mean_bits=4.03)
    # (5000 + 7000) MACs x 4 weight bits x 8 input bits
    with pytest.raises(ValueError, match=r"bops=100 is infeasible; the smallest feasible budget is bops=384000 "):
        plan_budget(t, bops=100)
    assert plan_budget(t, bops=(5000 + 7000) * 4 * 8).bits == {"layer0": 4, "layer1": 4}


@pytest.mark.parametrize("kwargs, err, msg", [
    ({}, ValueError, "give at least one budget .* got none"),
    ({"mean_bits": 0}, ValueError, "mean_bits must be a finite number > 0, got 0"),
    ({"planned_kib": -2.5}, ValueError, "planned_kib must be a finite number > 0, got -2.5"),
    ({"bops": float("nan")}, ValueError, "bops must be a finite number > 0"),
    ({"bops": float("inf")}, ValueError, "bops must be a finite number > 0"),
    ({"mean_bits": True}, TypeError, "mean_bits must be a number"),
    ({"mean_bits": "4"}, TypeError, "mean_bits must be a number"),
    ({"mean_bits": 4, "assumed_input_bits": 0}, ValueError, "input_bits must be None"),
    ({"mean_bits": 4, "fixed": {"nope": 4}}, ValueError, r"fixed names \['nope'\]"),
    ({"mean_bits": 4, "fixed": {"layer0": 5}}, ValueError, "weight width 5 is not among"),
    ({"mean_bits": 4, "fixed": {"layer0": "8"}}, TypeError, "fixed.*must be a width"),
    ({"mean_bits": 4, "fixed": {"layer0": (8, 8)}}, ValueError, "input width 8 is not among.*separate"),
    ({"mean_bits": 4, "fixed": [4]}, TypeError, "fixed must be a dict"),
    ({"mean_bits": 4, "allowed_bits": (3,)}, ValueError, "allowed_bits holds 3, which was not scanned"),
    ({"mean_bits": 4, "allowed_bits": {"input": (8,)}}, ValueError, "allowed_bits.'input'.: this table has no input"),
    ({"mean_bits": 4, "allowed_bits": {"bias": (8,)}}, ValueError, "allowed_bits keys must be"),
    ({"mean_bits": 4, "allowed_bits": ()}, TypeError, "allowed_bits must be a non-empty tuple"),
])
def test_bad_budgets(kwargs, err, msg):
    t = SensitivityTable.synthetic(np.array([[10.0, 30.0]]), params=[100], bits=(4, 8))
    with pytest.raises(err, match=msg):
        plan_budget(t, **kwargs)


def test_bad_table_and_cost():
    with pytest.raises(TypeError, match="table must be a SensitivityTable"):
        plan_budget({"a": 1}, mean_bits=4)
    t = SensitivityTable.synthetic(np.array([[10.0, 30.0]]), params=[100], bits=(4, 8))
    with pytest.raises(ValueError, match="cost must be one of"):
        pareto_front(t, "kib")
    with pytest.raises(ValueError, match="max_points"):
        pareto_front(t, max_points=1)


def _brute_plan(t, budgets, allowed=None, fixed=None, input_bits=8):
    """Least-noise bit widths by enumerating every assignment; costs counted here by hand."""
    noise = 10 ** (-t.sqnr_array("model") / 10)
    params = np.array([t.params(n) for n in t.layers])
    macs = np.array([t.macs(n) for n in t.layers])
    best, best_bits = None, None
    menus = [[b for b in t.bits if (fixed or {}).get(n, b) == b and (n in (fixed or {}) or allowed is None
                                                                   or b in allowed)]
             for n in t.layers]
    for combo in itertools.product(*menus):
        b = np.array(combo)
        cost = {"planned_kib": float((params * b + 64).sum()) / 8192,
                "mean_bits": float((params * b + 64).sum()) / params.sum(),  # stored bits
                "bops": int((macs * b * input_bits).sum())}
        if all(cost[k] <= v for k, v in budgets.items()):
            n = sum(noise[i, t.bits.index(x)] for i, x in enumerate(combo))
            if best is None or n < best:
                best, best_bits = n, dict(zip(t.layers, combo, strict=True))
    return best, best_bits


@pytest.mark.parametrize("seed", range(5))
def test_two_and_three_budgets_fixed_and_allowed_equal_exhaustive(seed):
    # reference: exhaustive enumeration over the table's options, costs counted by hand
    rng = np.random.default_rng(100 + seed)
    t = _random_table(rng, int(rng.integers(3, 6)))
    lo_k = sum(t.params(n) * 2 + 64 for n in t.layers) / 8192
    hi_k = sum(t.params(n) * 8 + 64 for n in t.layers) / 8192
    lo_b = sum(t.macs(n) * 2 * 8 for n in t.layers)
    hi_b = sum(t.macs(n) * 8 * 8 for n in t.layers)
    budgets = {"planned_kib": float(rng.uniform(lo_k, hi_k)), "bops": float(rng.uniform(lo_b, hi_b))}
    if seed % 2:
        budgets["mean_bits"] = float(rng.uniform(3, 8))
    for fixed, allowed in [(None, None), ({t.layers[0]: 8}, None), (None, (2, 6, 8)),
                           ({t.layers[1]: 2}, (4, 8))]:
        best, bits = _brute_plan(t, budgets, allowed, fixed)
        if best is None:
            with pytest.raises(ValueError, match="infeasible"):
                plan_budget(t, **budgets, fixed=fixed, allowed_bits=allowed)
            continue
        plan = plan_budget(t, **budgets, fixed=fixed, allowed_bits=allowed)
        assert plan.predicted_sqnr_db == pytest.approx(-10 * math.log10(best), abs=1e-7)
        assert plan.planned_kib <= budgets["planned_kib"] and plan.bops <= budgets["bops"]
        if "mean_bits" in budgets:
            assert plan.mean_bits <= budgets["mean_bits"] + 1e-12
        for n, b in (fixed or {}).items():
            assert plan.bits[n] == b
        if allowed is not None:
            assert all(b in allowed for n, b in plan.bits.items() if n not in (fixed or {}))


def test_budgets_infeasible_together_name_the_least_feasible_value(monkeypatch):
    # The table's own options are cheapest in every budget at the narrowest widths, so budgets
    # can only conflict on a menu whose options trade one cost for another. Such a menu, costs
    # set by hand: entry 0 is either cheap in KiB and dear in BOPs, or the reverse.
    import qwidgets.planning.solver as solver_mod
    from qwidgets.planning.choices import Menu

    t = SensitivityTable.synthetic(np.array([[10.0, 30.0]]), params=[8192], bits=(4, 8), macs=[1])
    by_cost = {"planned_kib": [np.array([8192, 3 * 8192])], "bops": [np.array([300, 100])]}

    class Conflict(Menu):
        def costs(self, table, cost):
            return by_cost[cost]

    menu = Conflict(["layer0"], [[(4, None, "tensor", None), (8, None, "tensor", None)]], [np.array([0.1, 0.001])], 8)
    monkeypatch.setattr(solver_mod, "build_menu", lambda *a, **k: menu)
    assert plan_budget(t, planned_kib=3.0, bops=100).bits == {"layer0": 8}
    assert plan_budget(t, planned_kib=1.0, bops=300).bits == {"layer0": 4}
    # each alone is feasible (KiB >= 1, BOPs >= 100); together KiB 1 needs BOPs 300
    with pytest.raises(ValueError, match=r"planned_kib=1 is infeasible together with bops=200; with "
                                         r"bops=200 the smallest feasible budget is planned_kib=3\.0000"):
        plan_budget(t, planned_kib=1.0, bops=200)


def test_large_front_points_are_plan_budget_optima():
    # 200 entries x 8 widths: the front comes from the lower hull; plan_budget (milp) at a
    # point's own cost must find no less noisy plan
    rng = np.random.default_rng(11)
    t = _random_table(rng, 200, bits=(2, 3, 4, 5, 6, 8, 10, 12))
    front_pts = pareto_front(t, "mean_bits", max_points=64)
    assert 2 <= len(front_pts) <= 64
    for c, s, plan in front_pts[:: max(1, len(front_pts) // 4)]:
        assert plan.mean_bits == pytest.approx(c)
        assert plan_budget(t, mean_bits=c).predicted_sqnr_db == pytest.approx(s, abs=1e-6)
