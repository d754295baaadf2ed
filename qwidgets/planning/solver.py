"""The allocator: one option (weight width, input width) per entry, least predicted noise,
under any combination of budgets.

The objective is the additive-noise prediction (see :mod:`qwidgets.planning.choices`): the
sum over entries and sides of each choice's model-output noise power; the predicted SQNR is
``10 log10(signal / that sum)``. With several budgets this is a multiple-choice knapsack with
several constraints, solved exactly as a mixed-integer linear programme by
``scipy.optimize.milp`` (HiGHS): one binary variable per (entry, option), one equality row per
entry (exactly one option), one row per budget. The Pareto front for one budget is the exact
dynamic programme over (cost, noise) states in :mod:`qwidgets.planning.front`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from scipy.optimize import Bounds, LinearConstraint, linprog, milp
from scipy.sparse import csr_matrix

from ..core.checks import check_int
from ..core.device_rules import DeviceRules
from .choices import (
    Menu,
    build_menu,
    ceil_unit,
    check_budgets,
    check_cost,
    in_unit,
    limit,
)
from .device_checks import rules_allowed_bits
from .front import front, thin
from .old_names import budget_keywords, cost_name
from .plan import Plan
from .table import SensitivityTable


def plan_budget(table: SensitivityTable, *, model_kib: float | None = None,
                planned_kib: float | None = None, mean_bits: float | None = None,
                bops: float | None = None, fixed: Mapping[str, int | tuple[int, int]] | None = None,
                allowed_bits: Sequence[int] | Mapping[str, Sequence[int]] | None = None,
                assumed_input_bits: int | None = 8, rules: DeviceRules | None = None,
                **renamed: Any) -> Plan:
    """The plan with the least predicted model-output noise that meets every budget given.

    Budgets (give one or more; all must hold), each named after the :class:`Plan` attribute
    it limits: ``model_kib`` (weight storage of the whole model, KiB: the planned entries as
    planned, every floating-point weight the table does not plan at its stored width,
    :meth:`SensitivityTable.unplanned_bits`; what the device stores), ``planned_kib`` (weight
    storage of the planned entries only, KiB), ``mean_bits`` (mean weight bits per planned
    weight) and ``bops`` (bit operations per sample: MACs x weight bits x input bits). With a
    table scanned with ``quantize="separate"`` each entry gets a weight width and an input
    width.

    ``fixed`` pins entries: ``{"conv1": 8}`` pins a weight width (the input width of a table
    that quantized inputs only), ``{"conv1": (8, 8)}`` the weight and the input width.
    ``allowed_bits`` restricts the menu of the other entries: ``{"weight": (4, 8), "input":
    (8,)}``, or a plain tuple for the weight widths. ``assumed_input_bits`` is the input width
    counted in BOPs where inputs stay float (None: float32), kept on the plan under that name.
    The result is the exact optimum of the additive-noise objective. With ``rules``
    (:class:`qwidgets.DeviceRules`) only the widths in the device's menus are chosen, and a
    table whose grids break the rules is refused. A budget that cannot be met raises
    ValueError naming it and the smallest value that can be met (with the other budgets held).
    The previous release's ``weight_kib`` / ``kib_scope`` / ``input_bits`` still work for one
    release and warn once (see CHANGELOG.md).

    >>> import numpy as np
    >>> from qwidgets import SensitivityTable
    >>> t = SensitivityTable.synthetic(np.array([[10.0, 30.0], [20.0, 40.0]]), params=[100, 100],
    ...                                bits=(4, 8))
    >>> p = plan_budget(t, mean_bits=6)
    >>> p.bits, round(p.predicted_sqnr_db, 2), p.mean_bits
    ({'layer0': 8, 'layer1': 4}, 19.59, 6.0)
    >>> plan_budget(t, mean_bits=8, fixed={"layer0": 4}).bits
    {'layer0': 4, 'layer1': 8}
    """
    given = {"model_kib": model_kib, "planned_kib": planned_kib, "mean_bits": mean_bits,
             "bops": bops, "assumed_input_bits": assumed_input_bits}
    for k, v in budget_keywords(renamed, "plan_budget").items():
        if k != "assumed_input_bits" and given[k] is not None:
            raise TypeError(f"plan_budget() got {k} twice (once under its old name); give {k} only")
        given[k] = v
    assumed_input_bits = given.pop("assumed_input_bits")
    budgets = check_budgets(**given)
    allowed_bits = rules_allowed_bits(table, rules, allowed_bits, assumed_input_bits)
    menu = build_menu(table, fixed=fixed, allowed_bits=allowed_bits, assumed_input_bits=assumed_input_bits)
    costs = {k: menu.costs(table, k) for k in budgets}
    other = {k: table.unplanned_bits() if k == "model_kib" else 0
             for k in budgets}  # exact integers: bits of the weights the table does not plan
    limits = {k: limit(k, v, table) - other[k] for k, v in budgets.items()}
    for k, v in budgets.items():  # each budget alone
        need = sum(int(c.min()) for c in costs[k])
        if need > limits[k]:
            rest = (f"; the model's other weights take {other[k] / 8192:.4f} KiB at their stored width "
                    "(planned_kib budgets the planned entries only)") if other[k] else ""
            raise ValueError(f"{k}={v:g} is infeasible; the smallest feasible budget is "
                             f"{k}={ceil_unit(need + other[k], k, table)} (every entry at its cheapest "
                             f"option{rest})")
    choice = solve(menu.noise, [costs[k] for k in budgets], [limits[k] for k in budgets])
    if choice is None:  # each budget alone can be met, together they cannot
        k = next(iter(budgets))
        others = [j for j in budgets if j != k]
        need = least_cost(costs[k], [costs[j] for j in others], [limits[j] for j in others]) + other[k]
        held = " and ".join(f"{j}={budgets[j]:g}" for j in others)
        raise ValueError(f"{k}={budgets[k]:g} is infeasible together with {held}; with {held} the "
                         f"smallest feasible budget is {k}={ceil_unit(need, k, table)}")
    return make_plan(table, menu, choice)


def pareto_front(table: SensitivityTable, cost: str = "model_kib", *,
                 assumed_input_bits: int | None = 8, max_points: int | None = 512,
                 fixed: Mapping[str, int | tuple[int, int]] | None = None,
                 allowed_bits: Sequence[int] | Mapping[str, Sequence[int]] | None = None,
                 rules: DeviceRules | None = None, **renamed: Any) -> list[tuple[float, float, Plan]]:
    """Every Pareto-optimal plan for one budget: ``[(cost, predicted_sqnr_db, Plan), ...]`` by
    rising cost.

    ``cost``: ``"model_kib"``, ``"planned_kib"``, ``"mean_bits"`` or ``"bops"``, the keyword of
    :func:`plan_budget` and the :class:`Plan` attribute of that name: each point's cost is
    its plan's attribute (``getattr(plan, cost)``). Each point is the exact optimum of
    :func:`plan_budget` at its own cost; no other plan is both cheaper and less noisy.
    The front of a large model can hold tens of thousands of points: with more than
    ``max_points`` it is thinned to that many, spread evenly in cost, both ends kept (``None``
    keeps every point). ``assumed_input_bits``, ``fixed``, ``allowed_bits`` and ``rules`` as
    in :func:`plan_budget`.

    >>> import numpy as np
    >>> from qwidgets import SensitivityTable
    >>> t = SensitivityTable.synthetic(np.array([[10.0, 30.0], [20.0, 40.0]]), params=[100, 100],
    ...                                bits=(4, 8))
    >>> [(c, round(s, 2)) for c, s, _ in pareto_front(t, "mean_bits")]
    [(4.0, 9.59), (6.0, 19.59), (8.0, 29.59)]
    """
    if "weight_kib" in renamed:  # a budget keyword: pareto_front takes none
        raise TypeError("pareto_front() got an unexpected keyword argument 'weight_kib'")
    cost = check_cost(cost_name(cost, renamed, "pareto_front"))
    assumed_input_bits = budget_keywords(renamed, "pareto_front").get("assumed_input_bits",
                                                                      assumed_input_bits)
    check_int(max_points, "max_points", minimum=2, none_ok=True)
    allowed_bits = rules_allowed_bits(table, rules, allowed_bits, assumed_input_bits)
    menu = build_menu(table, fixed=fixed, allowed_bits=allowed_bits, assumed_input_bits=assumed_input_bits)
    front_c, _, choices = front(menu.costs(table, cost), menu.noise)
    if cost == "model_kib":
        front_c = front_c + table.unplanned_bits()  # exact integers: bits of the other weights
    out = []
    for j in thin(front_c, max_points):
        plan = make_plan(table, menu, choices[j])
        out.append((in_unit(int(front_c[j]), cost, table), plan.predicted_sqnr_db, plan))
    return out


def _flat(rows: list) -> np.ndarray:
    return np.concatenate([np.asarray(r, dtype=float) for r in rows])


def _choice_matrix(sizes: list) -> csr_matrix:
    """The rows 'exactly one option per entry' over the flattened option variables."""
    n = int(sum(sizes))
    entry = np.repeat(np.arange(len(sizes)), sizes)
    return csr_matrix((np.ones(n), (entry, np.arange(n))), shape=(len(sizes), n))


def _budget_rows(costs: list, limits: list) -> tuple[np.ndarray, np.ndarray]:
    """Budget rows divided by their limits (each row's scale near 1 for the solver)."""
    a = np.vstack([_flat(c) for c in costs])
    lim = np.array(limits, dtype=float)
    scale = np.maximum(lim, 1.0)
    return a / scale[:, None], lim / scale


def _objective(noise: list, sizes: list, a_one, a_b, b_b) -> np.ndarray:
    """Noise shifted by each entry's least noise (a constant) and scaled so the relaxation's
    optimum is about 1: HiGHS stops within an absolute gap of 1e-6, so the scale sets how
    close to the optimum the answer is (relative 1e-6 of the shifted objective or better)."""
    c = _flat([n - n.min() for n in noise])
    if not np.any(c > 0):
        return c
    lp = linprog(c, A_ub=a_b, b_ub=b_b, A_eq=a_one, b_eq=np.ones(len(sizes)), bounds=(0, 1),
                 method="highs")
    scale = lp.fun if lp.status == 0 and lp.fun > 0 else float(c[c > 0].min())
    return c / max(scale, float(c.max()) * 1e-9)  # coefficients within nine decades


def solve(noise: list, costs: list, limits: list) -> np.ndarray | None:
    """Option index per entry minimising the summed noise with every cost row <= its limit
    (None when no choice meets every budget). Exact (the integer feasibility is re-checked in
    integers; the solver's tolerances never let a budget be exceeded)."""
    sizes = [len(n) for n in noise]
    a_one = _choice_matrix(sizes)
    a_b, b_b = _budget_rows(costs, limits)
    c = _objective(noise, sizes, a_one, a_b, b_b)
    starts = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    rhs = b_b.copy()
    for _ in range(8):
        res = milp(c, integrality=np.ones(c.size), bounds=Bounds(0, 1),
                   constraints=[LinearConstraint(a_one, 1, 1), LinearConstraint(a_b, -np.inf, rhs)],
                   options={"mip_rel_gap": 0.0})
        if res.status == 2 or res.x is None:  # infeasible
            return None
        choice = np.array([int(np.argmax(res.x[s:s + k])) for s, k in zip(starts, sizes, strict=True)])
        over = [sum(int(costs[j][i][k]) for i, k in enumerate(choice)) - limits[j]
                for j in range(len(costs))]
        if all(o <= 0 for o in over):
            return _polish(choice, noise, costs, limits)
        # within the solver's feasibility tolerance but over in integers: tighten and repeat
        for j, o in enumerate(over):
            if o > 0:
                rhs[j] -= (o + 0.5) / max(float(limits[j]), 1.0)
    return None


def _polish(choice: np.ndarray, noise: list, costs: list, limits: list) -> np.ndarray:
    """Entry by entry, a less noisy option that keeps every budget, until none is left. HiGHS
    stops within an absolute gap of its scaled objective, so an entry whose noise is below
    that gap (1e-9 next to 1e-2, say) may be left on a noisier option than needed."""
    totals = [sum(int(c[i][k]) for i, k in enumerate(choice)) for c in costs]
    improved = True
    while improved:
        improved = False
        for i, k in enumerate(choice):
            for j in np.argsort(noise[i], kind="stable"):
                if noise[i][j] >= noise[i][k]:
                    break
                new = [t - int(c[i][k]) + int(c[i][j]) for t, c in zip(totals, costs, strict=True)]
                if all(t <= lim for t, lim in zip(new, limits, strict=True)):
                    choice[i], totals, improved = int(j), new, True
                    break
    return choice


def least_cost(cost: list, other_costs: list, other_limits: list) -> int:
    """The least total of ``cost`` over choices meeting the other budgets (exact integers)."""
    choice = solve(cost_as_noise(cost), other_costs, other_limits)
    if choice is None:
        raise ValueError("the other budgets cannot be met either")
    return int(sum(int(c[k]) for c, k in zip(cost, choice, strict=True)))


def cost_as_noise(cost: list) -> list:
    return [np.asarray(c, dtype=float) for c in cost]


def make_plan(table: SensitivityTable, menu: Menu, choice: np.ndarray) -> Plan:
    noise = sum(float(n[int(k)]) for n, k in zip(menu.noise, choice, strict=True))
    predicted = math.inf if noise == 0 else -10.0 * math.log10(noise)
    picked = [menu.options[i][int(k)] for i, k in enumerate(choice)]
    q = table.quantize
    if q == "input":
        bits = {n: ib for n, (_, ib) in zip(menu.names, picked, strict=True)}
        return table.make_plan(bits, assumed_input_bits=menu.assumed_input_bits, predicted_sqnr_db=predicted)
    bits = {n: wb for n, (wb, _) in zip(menu.names, picked, strict=True)}
    if q == "separate":
        inputs = {n: ib for n, (_, ib) in zip(menu.names, picked, strict=True)}
        return table.make_plan(bits, chosen_input_bits=inputs, predicted_sqnr_db=predicted,
                               assumed_input_bits=menu.assumed_input_bits)
    return table.make_plan(bits, assumed_input_bits=menu.assumed_input_bits, predicted_sqnr_db=predicted)
