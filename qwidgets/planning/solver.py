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
from dataclasses import replace
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
                bops: float | None = None, fixed: Mapping[str, int | tuple[int, int] | Mapping] | None = None,
                allowed_bits: Sequence[int] | Mapping[str, Sequence[int]] | None = None,
                assumed_input_bits: int | None = 8, rules: DeviceRules | None = None,
                allowed_granularity: Sequence | None = None,
                allowed_input_granularity: Sequence[str] | None = None, **renamed: Any) -> Plan:
    """The plan with the least predicted model-output noise that meets every budget given.

    Budgets (give one or more; all must hold), each named after the :class:`Plan` attribute
    it limits: ``model_kib`` (weight storage of the whole model, KiB: the planned entries as
    planned, every floating-point weight the table does not plan at its stored width,
    :meth:`SensitivityTable.unplanned_bits`; what the device stores), ``planned_kib`` (weight
    storage of the planned entries only, KiB), ``mean_bits`` (stored bits per planned weight:
    codes plus scales and zero points) and ``bops`` (bit operations per sample: MACs x weight
    bits x input bits). With a table scanned with ``quantize="separate"`` each entry gets a
    weight width and an input width. With a table scanned at several granularities
    (``scan(..., granularity=("channel", 32, 128))``) each entry gets a weight width and a
    granularity together: one option per (bits, granularity) pair, block grids paying for
    their scales (and zero points) in storage and mean bits (block scales at
    ``rules.scale_bits``, 16 without rules).

    ``fixed`` pins entries: ``{"conv1": 8}`` pins a weight width (the input width of a table
    that quantized inputs only), ``{"conv1": (8, 8)}`` the weight and the input width,
    ``{"fc": {"bits": 4, "granularity": 128}}`` a width and a granularity (either alone too).
    ``allowed_bits`` restricts the menu of the other entries: ``{"weight": (4, 8), "input":
    (8,)}``, or a plain tuple for the weight widths; ``allowed_granularity`` (e.g.
    ``("channel", 128)``) the granularities of entries whose granularity is not pinned. With a
    table that measured inputs per token too (``scan(..., input_granularity=("tensor",
    "token"))``) each planned input also gets a granularity, ``"tensor"`` or ``"token"``
    (:attr:`Plan.input_granularity`; a token grid stores nothing and costs the BOPs of its
    width): pin it with ``{"fc": {"input_bits": 8, "input_granularity": "token"}}``, restrict
    it with ``allowed_input_granularity=("tensor",)``.
    ``assumed_input_bits`` is the input width counted in BOPs where inputs stay float (None:
    float32), kept on the plan under that name.
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
    >>> p = plan_budget(t, mean_bits=6.64)  # stored bits: 8 + 4 code bits, a 64-bit scale and zero point each
    >>> p.bits, round(p.predicted_sqnr_db, 2), p.mean_bits
    ({'layer0': 8, 'layer1': 4}, 19.59, 6.64)
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
    menu = build_menu(table, fixed=fixed, allowed_bits=allowed_bits, assumed_input_bits=assumed_input_bits,
                      allowed_granularity=allowed_granularity, scale_bits=_scale_bits(rules),
                      allowed_input_granularity=allowed_input_granularity)
    costs = {k: menu.costs(table, k) for k in budgets}
    pairs = {k: menu.pair_costs(table, k) for k in budgets}  # attention's products (BOPs)
    other = {k: table.unplanned_bits() if k == "model_kib" else 0
             for k in budgets}  # exact integers: bits of the weights the table does not plan
    limits = {k: limit(k, v, table) - other[k] for k, v in budgets.items()}
    for k, v in budgets.items():  # each budget alone
        need = sum(int(c.min()) for c in costs[k]) + sum(int(m.min()) for _, _, m in pairs[k])
        if need > limits[k]:
            rest = (f"; the model's other weights take {other[k] / 8192:.4f} KiB at their stored width "
                    "(planned_kib budgets the planned entries only)") if other[k] else ""
            raise ValueError(f"{k}={v:g} is infeasible; the smallest feasible budget is "
                             f"{k}={ceil_unit(need + other[k], k, table)} (every entry at its cheapest "
                             f"option{rest})")
    choice = solve(menu.noise, [costs[k] for k in budgets], [limits[k] for k in budgets],
                   pairs=_pair_rows(pairs, list(budgets)))
    if choice is None:  # each budget alone can be met, together they cannot
        k = next(iter(budgets))
        others = [j for j in budgets if j != k]
        need = least_cost(costs[k], [costs[j] for j in others], [limits[j] for j in others],
                          pairs=_pair_rows(pairs, [k] + others)) + other[k]
        held = " and ".join(f"{j}={budgets[j]:g}" for j in others)
        raise ValueError(f"{k}={budgets[k]:g} is infeasible together with {held}; with {held} the "
                         f"smallest feasible budget is {k}={ceil_unit(need, k, table)}")
    return make_plan(table, menu, choice)


def pareto_front(table: SensitivityTable, cost: str = "model_kib", *,
                 assumed_input_bits: int | None = 8, max_points: int | None = 512,
                 fixed: Mapping[str, int | tuple[int, int] | Mapping] | None = None,
                 allowed_bits: Sequence[int] | Mapping[str, Sequence[int]] | None = None,
                 rules: DeviceRules | None = None, allowed_granularity: Sequence | None = None,
                 allowed_input_granularity: Sequence[str] | None = None,
                 **renamed: Any) -> list[tuple[float, float, Plan]]:
    """Every Pareto-optimal plan for one budget: ``[(cost, predicted_sqnr_db, Plan), ...]`` by
    rising cost.

    ``cost``: ``"model_kib"``, ``"planned_kib"``, ``"mean_bits"`` or ``"bops"``, the keyword of
    :func:`plan_budget` and the :class:`Plan` attribute of that name: each point's cost is
    its plan's attribute (``getattr(plan, cost)``). Each point is the exact optimum of
    :func:`plan_budget` at its own cost; no other plan is both cheaper and less noisy.
    The front of a large model can hold tens of thousands of points: with more than
    ``max_points`` it is thinned to that many, spread evenly in cost, both ends kept (``None``
    keeps every point). ``assumed_input_bits``, ``fixed``, ``allowed_bits``,
    ``allowed_granularity``, ``allowed_input_granularity`` and ``rules`` as in
    :func:`plan_budget`: the front runs over bits and granularities together.

    >>> import numpy as np
    >>> from qwidgets import SensitivityTable
    >>> t = SensitivityTable.synthetic(np.array([[10.0, 30.0], [20.0, 40.0]]), params=[100, 100],
    ...                                bits=(4, 8))
    >>> [(c, round(s, 2)) for c, s, _ in pareto_front(t, "mean_bits")]
    [(4.64, 9.59), (6.64, 19.59), (8.64, 29.59)]
    """
    if "weight_kib" in renamed:  # a budget keyword: pareto_front takes none
        raise TypeError("pareto_front() got an unexpected keyword argument 'weight_kib'")
    cost = check_cost(cost_name(cost, renamed, "pareto_front"))
    assumed_input_bits = budget_keywords(renamed, "pareto_front").get("assumed_input_bits",
                                                                      assumed_input_bits)
    check_int(max_points, "max_points", minimum=2, none_ok=True)
    allowed_bits = rules_allowed_bits(table, rules, allowed_bits, assumed_input_bits)
    menu = build_menu(table, fixed=fixed, allowed_bits=allowed_bits, assumed_input_bits=assumed_input_bits,
                      allowed_granularity=allowed_granularity, scale_bits=_scale_bits(rules),
                      allowed_input_granularity=allowed_input_granularity)
    costs = menu.costs(table, cost)
    pairs = menu.pair_costs(table, cost)
    for i, j, share_i, share_j in menu.pair_shares(table, cost):  # an additive bound of the products
        costs[i] = costs[i] + share_i
        costs[j] = costs[j] + share_j
    front_c, _, choices = front(costs, menu.noise)
    if cost == "model_kib":
        front_c = front_c + table.unplanned_bits()  # exact integers: bits of the other weights
    out = []
    for j in thin(front_c, max_points):
        plan = make_plan(table, menu, choices[j])
        c = plan.bops if pairs else in_unit(int(front_c[j]), cost, table)
        out.append((c, plan.predicted_sqnr_db, plan))
    return out


def _pair_rows(pairs: dict, order: list) -> list:
    """Per product: ``(i, j, [matrix for each budget row in order, or None])``."""
    by_ij: dict = {}
    for r, k in enumerate(order):
        for i, j, m in pairs.get(k, []):
            by_ij.setdefault((i, j), [None] * len(order))[r] = m
    return [(i, j, rows) for (i, j), rows in by_ij.items()]
def _scale_bits(rules) -> int:
    return 16 if rules is None else rules.scale_bits


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


def _objective(c: np.ndarray, a_eq, b_eq, a_ub, b_ub) -> np.ndarray:
    """The objective scaled so the relaxation's optimum is about 1: HiGHS stops within an
    absolute gap of 1e-6, so the scale sets how close to the optimum the answer is (relative
    1e-6 of the shifted objective or better). ``c``: noise shifted by each entry's least noise
    (a constant)."""
    if not np.any(c > 0):
        return c
    lp = linprog(c, A_ub=a_ub, b_ub=b_ub, A_eq=a_eq, b_eq=b_eq, bounds=(0, 1), method="highs")
    scale = lp.fun if lp.status == 0 and lp.fun > 0 else float(c[c > 0].min())
    return c / max(scale, float(c.max()) * 1e-9)  # coefficients within nine decades


def _pair_columns(sizes: list, pairs: list, n_rows: int, scale: np.ndarray):
    """The product variables: one per (option of i, option of j) of each pair, linked to the
    option variables by ``sum_b z[a, b] = x_i[a]`` and ``sum_a z[a, b] = x_j[b]`` (with one-hot
    ``x`` these force ``z`` to the one pair chosen, so a product's cost is exact)."""
    starts = np.concatenate([[0], np.cumsum(sizes)[:-1]]).astype(int)
    nx = int(sum(sizes))
    nz = sum(sizes[i] * sizes[j] for i, j, _ in pairs)
    budget = np.zeros((n_rows, nz))
    link_rows, link_cols, link_vals = [], [], []
    row = off = 0
    for i, j, mats in pairs:
        ni, nj = sizes[i], sizes[j]
        for r, m in enumerate(mats):
            if m is not None:
                budget[r, off:off + ni * nj] = np.asarray(m, dtype=float).reshape(-1) / scale[r]
        for a in range(ni):  # sum_b z[a, b] - x_i[a] = 0
            link_rows += [row] * (nj + 1)
            link_cols += [nx + off + a * nj + b for b in range(nj)] + [starts[i] + a]
            link_vals += [1.0] * nj + [-1.0]
            row += 1
        for b in range(nj):  # sum_a z[a, b] - x_j[b] = 0
            link_rows += [row] * (ni + 1)
            link_cols += [nx + off + a * nj + b for a in range(ni)] + [starts[j] + b]
            link_vals += [1.0] * ni + [-1.0]
            row += 1
        off += ni * nj
    link = csr_matrix((link_vals, (link_rows, link_cols)), shape=(row, nx + nz))
    return budget, link, nz


def solve(noise: list, costs: list, limits: list, pairs: list | None = None,
          pair_objective: list | None = None) -> np.ndarray | None:
    """Option index per entry minimising the summed noise with every cost row <= its limit
    (None when no choice meets every budget). Exact (the integer feasibility is re-checked in
    integers; the solver's tolerances never let a budget be exceeded).

    ``pairs``: ``(i, j, [matrix or None per cost row])`` for costs that depend on the options of
    two entries together (attention's products: BOPs ``MACs x a x b``), modelled exactly with
    one variable per pair of options; ``pair_objective``: a matrix per pair added to the
    objective (least_cost)."""
    pairs = pairs or []
    sizes = [len(n) for n in noise]
    starts = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    a_one = _choice_matrix(sizes)
    a_b, b_b = _budget_rows(costs, limits)
    scale = np.maximum(np.array(limits, dtype=float), 1.0)
    c = _flat([n - n.min() for n in noise])
    if pairs:
        zb, link, nz = _pair_columns(sizes, pairs, len(costs), scale)
        a_one = csr_matrix(np.hstack([a_one.toarray(), np.zeros((len(sizes), nz))]))
        a_eq = csr_matrix(np.vstack([a_one.toarray(), link.toarray()]))
        b_eq = np.concatenate([np.ones(len(sizes)), np.zeros(link.shape[0])])
        a_b = np.hstack([a_b, zb])
        cz = np.zeros(nz) if pair_objective is None else np.concatenate(
            [np.asarray(m, dtype=float).reshape(-1) for m in pair_objective])
        c = np.concatenate([c, cz])
    else:
        a_eq, b_eq, nz = a_one, np.ones(len(sizes)), 0
    c = _objective(c, a_eq, b_eq, a_b, b_b)
    integrality = np.concatenate([np.ones(c.size - nz), np.zeros(nz)])
    rhs = b_b.copy()
    for _ in range(8):
        res = milp(c, integrality=integrality, bounds=Bounds(0, 1),
                   constraints=[LinearConstraint(a_eq, b_eq, b_eq), LinearConstraint(a_b, -np.inf, rhs)],
                   options={"mip_rel_gap": 0.0})
        if res.status == 2 or res.x is None:  # infeasible
            return None
        choice = np.array([int(np.argmax(res.x[s:s + k])) for s, k in zip(starts, sizes, strict=True)])
        over = [sum(int(costs[j][i][k]) for i, k in enumerate(choice)) - limits[j]
                + sum(int(mats[j][choice[a], choice[b]]) for a, b, mats in pairs if mats[j] is not None)
                for j in range(len(costs))]
        if all(o <= 0 for o in over):
            return _polish(choice, noise, costs, limits, pairs)
        # within the solver's feasibility tolerance but over in integers: tighten and repeat
        for j, o in enumerate(over):
            if o > 0:
                rhs[j] -= (o + 0.5) / max(float(limits[j]), 1.0)
    return None


def _polish(choice: np.ndarray, noise: list, costs: list, limits: list, pairs: list = ()) -> np.ndarray:
    """Entry by entry, a less noisy option that keeps every budget, until none is left. HiGHS
    stops within an absolute gap of its scaled objective, so an entry whose noise is below
    that gap (1e-9 next to 1e-2, say) may be left on a noisier option than needed. ``pairs``
    (see :func:`solve`): an entry of a pair changes its products' costs too."""
    paired: dict = {}
    for a, b, mats in pairs:
        paired.setdefault(a, []).append((a, b, mats))
        paired.setdefault(b, []).append((a, b, mats))

    def pair_cost(i, k, r):  # entry i's products' share of cost row r with option k
        out = 0
        for a, b, mats in paired.get(i, ()):
            if mats[r] is not None:
                out += int(mats[r][k if a == i else choice[a], k if b == i else choice[b]])
        return out

    totals = [sum(int(c[i][k]) for i, k in enumerate(choice))
              + sum(int(m[r][choice[a], choice[b]]) for a, b, m in pairs if m[r] is not None)
              for r, c in enumerate(costs)]
    improved = True
    while improved:
        improved = False
        for i, k in enumerate(choice):
            for j in np.argsort(noise[i], kind="stable"):
                if noise[i][j] >= noise[i][k]:
                    break
                new = [t - int(c[i][k]) + int(c[i][j]) - pair_cost(i, k, r) + pair_cost(i, j, r)
                       for r, (t, c) in enumerate(zip(totals, costs, strict=True))]
                if all(t <= lim for t, lim in zip(new, limits, strict=True)):
                    choice[i], totals, improved = int(j), new, True
                    break
    return choice


def least_cost(cost: list, other_costs: list, other_limits: list, pairs: list | None = None) -> int:
    """The least total of ``cost`` over choices meeting the other budgets (exact integers).
    ``pairs``: as :func:`solve`'s, with the matrices of ``cost`` first, then the others'."""
    pairs = pairs or []
    choice = solve(cost_as_noise(cost), other_costs, other_limits,
                   pairs=[(i, j, mats[1:]) for i, j, mats in pairs],
                   pair_objective=[np.zeros((len(cost[i]), len(cost[j]))) if mats[0] is None else mats[0]
                                   for i, j, mats in pairs])
    if choice is None:
        raise ValueError("the other budgets cannot be met either")
    return int(sum(int(c[k]) for c, k in zip(cost, choice, strict=True))
               + sum(int(mats[0][choice[i], choice[j]]) for i, j, mats in pairs if mats[0] is not None))


def cost_as_noise(cost: list) -> list:
    return [np.asarray(c, dtype=float) for c in cost]


def make_plan(table: SensitivityTable, menu: Menu, choice: np.ndarray) -> Plan:
    """The plan of one choice per entry; entries ``fixed`` pinned are recorded as pinned (their
    width was not chosen by the budget, and may lie outside ``allowed_bits``)."""
    plan = _table_plan(table, menu, choice)
    if not menu.pinned:
        return plan
    entries = {n: ({**d, "pinned": True} if n in menu.pinned else d) for n, d in plan.entries.items()}
    return replace(plan, entries=entries)


def _table_plan(table: SensitivityTable, menu: Menu, choice: np.ndarray) -> Plan:
    noise = sum(float(n[int(k)]) for n, k in zip(menu.noise, choice, strict=True))
    predicted = math.inf if noise == 0 else -10.0 * math.log10(noise)
    picked = [menu.options[i][int(k)] for i, k in enumerate(choice)]
    q = table.quantize
    if q == "input":
        bits = {n: o[1] for n, o in zip(menu.names, picked, strict=True)}
        return table.make_plan(bits, assumed_input_bits=menu.assumed_input_bits, predicted_sqnr_db=predicted)
    bits = {n: ib if wb is None else wb for n, (wb, ib, _, _) in zip(menu.names, picked, strict=True)}
    grans = {n: o[2] for n, o in zip(menu.names, picked, strict=True)}
    if q == "separate":
        inputs = {n: o[1] for n, o in zip(menu.names, picked, strict=True)}
        return table.make_plan(bits, chosen_input_bits=inputs, predicted_sqnr_db=predicted,
                               assumed_input_bits=menu.assumed_input_bits, granularity=grans,
                               scale_bits=menu.scale_bits,
                               input_granularity={n: o[3] for n, o in zip(menu.names, picked, strict=True)})
    return table.make_plan(bits, assumed_input_bits=menu.assumed_input_bits, predicted_sqnr_db=predicted,
                           granularity=grans, scale_bits=menu.scale_bits)
