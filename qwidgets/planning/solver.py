"""The allocator picks one scanned bit width per layer so as to minimise the model-output noise
predicted by the additive noise model: quantizing layer ``i`` at ``b`` bits adds noise power
``signal / 10**(SQNR_i(b) / 10)`` (its model-scope SQNR, measured by :func:`qwidgets.scan`), and
the noise powers of the layers add up, so the predicted SQNR is
``10 log10(signal / sum of noise powers)``. That is a multiple-choice knapsack; it is solved
exactly by a dynamic programme over Pareto-optimal (cost, noise) states, pruned by
feasibility and by a linear-programming lower bound (the greedy solution of the convex-hull
relaxation), which never discards a state that could still beat the best plan found.
"""

from __future__ import annotations

import math
from fractions import Fraction
from numbers import Integral, Real

import numpy as np

from .costs import COSTS, FLOAT_BITS, layer_bops, weight_storage_bits
from .table import SensitivityTable

_MAX_NOISE = 1e12  # noise power relative to the signal, cap (SQNR >= -120 dB) to keep sums finite


def plan_budget(table, *, weight_kib: float | None = None, mean_bits: float | None = None,
                bops: float | None = None, input_bits: int | None = 8, kib_scope: str = "model"):
    """The plan with the least predicted model-output noise that fits one budget.

    Give exactly one of ``weight_kib`` (weight storage, KiB: with ``kib_scope="model"``, the
    default, of the whole model, every floating-point weight the table does not plan counted
    at its stored width (:meth:`SensitivityTable.unplanned_bits`); with ``"planned"``, of the
    planned entries only),
    ``mean_bits`` (mean weight bits per parameter) or ``bops`` (bit operations per sample).
    ``input_bits`` is the width of the layers' inputs assumed for BOPs when the table chose only
    weight widths (``quantize="weight"``; None: float inputs); tables that scanned input grids
    use the chosen width. The result is the exact optimum of the additive-noise objective
    (see the module docstring); ties go to the cheaper plan.

    >>> import numpy as np
    >>> from qwidgets import SensitivityTable
    >>> t = SensitivityTable.synthetic(np.array([[10.0, 30.0], [20.0, 40.0]]), params=[100, 100],
    ...                                bits=(4, 8))
    >>> p = plan_budget(t, mean_bits=6)
    >>> p.bits, round(p.predicted_sqnr_db, 2)
    ({'layer0': 8, 'layer1': 4}, 19.59)
    """
    cost, value = _one_budget(weight_kib=weight_kib, mean_bits=mean_bits, bops=bops)
    if kib_scope not in ("model", "planned"):
        raise ValueError(f"kib_scope must be 'model' or 'planned', got {kib_scope!r}")
    input_bits = _check_input_bits(input_bits)
    _check_table(table)
    noise = _noise_matrix(table)
    costs, unit = _cost_matrix(table, cost, input_bits)
    fixed = table.unplanned_bits() if (cost == "weight_kib" and kib_scope == "model") else 0
    limit = _limit(cost, value, table) - fixed
    need = int(costs.min(axis=1).sum())
    if need > limit:
        rest = (f"; the model's other weights take {fixed / 8192:.4f} KiB at their stored width "
                "(kib_scope='planned' budgets the planned entries only)") if fixed else ""
        raise ValueError(
            f"{cost}={value:g} is infeasible; the smallest feasible budget is "
            f"{cost}={_ceil_unit(need + fixed, unit, cost)} (every layer at its cheapest scanned "
            f"option{rest})"
        )
    choice = _solve(costs, noise, limit)
    return _plan(table, choice, noise, input_bits)


def pareto_front(table, cost: str = "weight_kib", *, input_bits: int | None = 8,
                 max_points: int | None = 512, kib_scope: str = "model") -> list:
    """Every Pareto-optimal plan: ``[(cost, predicted_sqnr_db, Plan), ...]`` by rising cost.

    ``cost``: ``"weight_kib"``, ``"mean_bits"`` or ``"bops"``. Each point is the exact optimum
    of :func:`plan_budget` at its own cost; no other plan is both cheaper and less noisy.
    The front of a large model can hold tens of thousands of points: with more than
    ``max_points`` it is thinned to that many, spread evenly in cost, both ends kept (``None``
    keeps every point). ``kib_scope`` as in :func:`plan_budget`: weight KiB of the whole model
    (default) or of the planned entries only.

    >>> import numpy as np
    >>> from qwidgets import SensitivityTable
    >>> t = SensitivityTable.synthetic(np.array([[10.0, 30.0], [20.0, 40.0]]), params=[100, 100],
    ...                                bits=(4, 8))
    >>> [(c, round(s, 2)) for c, s, _ in pareto_front(t, "mean_bits")]
    [(4.0, 9.59), (6.0, 19.59), (8.0, 29.59)]
    """
    cost = _check_cost(cost)
    input_bits = _check_input_bits(input_bits)
    if kib_scope not in ("model", "planned"):
        raise ValueError(f"kib_scope must be 'model' or 'planned', got {kib_scope!r}")
    if max_points is not None and (isinstance(max_points, bool) or not isinstance(max_points, Integral)
                                   or max_points < 2):
        raise ValueError(f"max_points must be None or an int >= 2, got {max_points!r}")
    noise = _noise_matrix(table)
    costs, unit = _cost_matrix(table, cost, input_bits)
    front_c, _, choices = _front(costs, noise)
    if cost == "weight_kib" and kib_scope == "model":
        front_c = front_c + table.unplanned_bits()  # exact integers: bits of the other weights
    keep = _thin(front_c, max_points)
    out = []
    for j in keep:
        plan = _plan(table, choices[j], noise, input_bits)
        out.append((_in_unit(int(front_c[j]), unit, cost), plan.predicted_sqnr_db, plan))
    return out


def _one_budget(**budgets) -> tuple[str, float]:
    given = {k: v for k, v in budgets.items() if v is not None}
    if len(given) != 1:
        names = ", ".join(budgets)
        got = ", ".join(given) if given else "none"
        raise ValueError(f"give exactly one budget ({names}); got {got}")
    (name, value), = given.items()
    if isinstance(value, bool) or not isinstance(value, Real):
        raise TypeError(f"{name} must be a number, got {value!r} ({type(value).__name__})")
    if not math.isfinite(value) or value <= 0:
        raise ValueError(f"{name} must be a finite number > 0, got {value}")
    return name, float(value)


def _check_cost(cost) -> str:
    if cost not in COSTS:
        raise ValueError(f"cost must be one of {', '.join(map(repr, COSTS))}, got {cost!r}")
    return cost


def _check_input_bits(input_bits) -> int | None:
    if input_bits is None:
        return None
    if isinstance(input_bits, bool) or not isinstance(input_bits, Integral) or not 1 <= input_bits <= 16:
        raise ValueError(f"input_bits must be None (float inputs) or an int in 1..16, got {input_bits!r}")
    return int(input_bits)


def _check_table(table):
    if not isinstance(table, SensitivityTable):
        raise TypeError(f"table must be a SensitivityTable, got {type(table).__name__}")
    return table


def _noise_matrix(table) -> np.ndarray:
    """Model-output noise power of each (layer, option), relative to the signal power."""
    _check_table(table)
    sq = table.sqnr_array("model")
    if sq is None:
        raise ValueError("the table holds no model-scope SQNR; plan budgets need it: "
                         "scan with scope='model' or scope='both'")
    with np.errstate(over="ignore"):
        noise = np.power(10.0, -sq / 10.0)
    return np.minimum(noise, _MAX_NOISE)


def _cost_matrix(table, cost: str, input_bits) -> tuple[np.ndarray, int]:
    """Integer cost of each (layer, option) and the divisor that turns it into the unit."""
    qw = table.quantize in ("weight", "both")
    qi = table.quantize in ("input", "both")
    rows = []
    for name in table.layers:
        p, ch, macs = table.params(name), table.weight_channels(name), table.macs(name)
        row = []
        for b in table.bits:
            wb = b if qw else None
            if cost == "weight_kib":
                row.append(weight_storage_bits(p, wb, ch))
            elif cost == "mean_bits":
                row.append(p * (b if qw else FLOAT_BITS))
            else:
                row.append(layer_bops(macs, wb, b if qi else input_bits))
        rows.append(row)
    costs = np.array(rows, dtype=np.int64)
    unit = 8192 if cost == "weight_kib" else (_total_params(table) if cost == "mean_bits" else 1)
    return costs, unit


def _total_params(table) -> int:
    return sum(table.params(n) for n in table.layers)


def _limit(cost: str, value: float, table) -> int:
    """The budget as an integer bound on the summed integer costs.

    Computed in exact fractions; the factor ``1 + 2**-50`` (a few float ulps) lets a budget
    that is a float rounding of an exact cost, e.g. ``mean_bits = total_bits / params``, admit
    that cost.
    """
    v = Fraction(value) * (1 + Fraction(1, 2**50))
    if cost == "weight_kib":
        return math.floor(v * 8192)
    if cost == "mean_bits":
        return math.floor(v * _total_params(table))
    return math.floor(v)


def _in_unit(c: int, unit: int, cost: str):
    return c if cost == "bops" else c / unit


def _ceil_unit(c: int, unit: int, cost: str) -> str:
    if cost == "bops":
        return str(c)
    # round up in the last printed digit, so the stated budget really is feasible
    return f"{math.ceil(c / unit * 1e4) / 1e4:.4f}"


def _pareto_step(c, n, costs_i, noise_i, extra_keep=None):
    """All (state, option) sums, sorted by cost, dominated ones dropped."""
    k = costs_i.shape[0]
    cc = (c[:, None] + costs_i[None, :]).ravel()
    nn = (n[:, None] + noise_i[None, :]).ravel()
    par = np.repeat(np.arange(c.shape[0]), k)
    opt = np.tile(np.arange(k), c.shape[0])
    if extra_keep is not None:
        keep = extra_keep(cc, nn)
        cc, nn, par, opt = cc[keep], nn[keep], par[keep], opt[keep]
    order = np.lexsort((nn, cc))
    cc, nn, par, opt = cc[order], nn[order], par[order], opt[order]
    if cc.size == 0:
        return cc, nn, par, opt
    best_before = np.minimum.accumulate(nn)
    keep = np.empty(cc.size, dtype=bool)
    keep[0] = True
    keep[1:] = nn[1:] < best_before[:-1]  # strictly less noise than every cheaper state
    return cc[keep], nn[keep], par[keep], opt[keep]


def _backtrack(parents, idx: np.ndarray) -> np.ndarray:
    """Option indices (points x layers) of the final states ``idx``."""
    n_layers = len(parents)
    out = np.empty((idx.size, n_layers), dtype=np.int64)
    for i in range(n_layers - 1, -1, -1):
        par, opt = parents[i]
        out[:, i] = opt[idx]
        idx = par[idx]
    return out


def _front(costs: np.ndarray, noise: np.ndarray):
    """The exact Pareto front: (costs, noises, choices) sorted by rising cost."""
    c, n = np.zeros(1, np.int64), np.zeros(1)
    parents = []
    for i in range(costs.shape[0]):
        c, n, par, opt = _pareto_step(c, n, costs[i], noise[i])
        parents.append((par, opt))
    return c, n, _backtrack(parents, np.arange(c.size))


def _solve(costs: np.ndarray, noise: np.ndarray, limit: int) -> np.ndarray:
    """Exact multiple-choice knapsack: one option per layer, total cost <= limit, least noise.

    A dynamic programme over Pareto-optimal (cost, noise) states, layer by layer, that drops
    every state whose noise plus the relaxation's lower bound for the remaining layers exceeds
    a threshold. With the threshold at a known feasible plan's noise that is exact. Tighter
    thresholds, between the root lower bound and that plan, prune far more: a pass that
    still ends in a plan at or under its threshold has kept every prefix of the optimum (their
    bounds are at most the optimum), so its result is optimal too; a pass that ends in
    nothing is repeated with a doubled margin.
    """
    n_layers = costs.shape[0]
    bound = _LowerBound(costs, noise)
    incumbent = _complete(costs, noise, limit, bound, 0, np.zeros(0, np.int64))
    best = float(noise[np.arange(n_layers), incumbent].sum())
    root = float(bound(0, np.array([limit]))[0])
    gap = best - root
    margin = gap / 16
    while margin < gap:
        found = _bounded_pass(costs, noise, limit, bound, root + margin)
        if found is not None:
            return found
        margin *= 2
    found = _bounded_pass(costs, noise, limit, bound, best)
    return incumbent if found is None else found


def _bounded_pass(costs, noise, limit: int, bound: _LowerBound, threshold: float):
    """The least-noise plan among states whose bound stays within ``threshold`` (None if none)."""
    min_rest = np.concatenate([np.cumsum(costs.min(axis=1)[::-1])[::-1], [0]])
    tol = abs(threshold) * 1e-9 + 1e-300  # float slack in the bound's sums: never prune the optimum

    c, n = np.zeros(1, np.int64), np.zeros(1)
    parents = []
    for i in range(costs.shape[0]):
        def keep(cc, nn, i=i):
            ok = cc + min_rest[i + 1] <= limit
            ok &= nn + bound(i + 1, limit - cc) <= threshold + tol
            return ok

        c, n, par, opt = _pareto_step(c, n, costs[i], noise[i], keep)
        parents.append((par, opt))
        if c.size == 0:
            return None
    j = int(np.argmin(n))
    if n[j] > threshold + tol:
        return None
    return _backtrack(parents, np.array([j]))[0]


def _complete(costs: np.ndarray, noise: np.ndarray, budget: int, bound: _LowerBound, first: int,
              prefix: np.ndarray) -> np.ndarray:
    """``prefix`` (options of layers before ``first``) completed greedily within ``budget``.

    The relaxation's greedy order rounded down (hull segments by noise removed per unit cost,
    each taken while it fits), then single upgrades that remove the most noise within what is
    left. A feasible choice, the start for the bound's pruning.
    """
    sub_c, sub_n = costs[first:], noise[first:]
    rows = np.arange(sub_c.shape[0])
    cur = np.array(bound.start[first:], dtype=np.int64)
    slack = budget - int(sub_c[rows, cur].sum())
    blocked = set()
    for layer, a, b in bound.order:
        layer -= first
        if layer < 0 or layer in blocked or cur[layer] != a:
            continue
        step = int(sub_c[layer, b] - sub_c[layer, a])
        if step <= slack:
            cur[layer] = b
            slack -= step
        else:
            blocked.add(layer)  # later segments of this layer build on this one
    for _ in range(sub_c.size):
        dc = sub_c - sub_c[rows, cur][:, None]
        dn = sub_n - sub_n[rows, cur][:, None]
        dn = np.where((dc <= slack) & (dn < 0), dn, 0.0)
        flat = int(np.argmin(dn)) if dn.size else 0
        if not dn.size or dn.flat[flat] >= 0:
            break
        i, k = divmod(flat, sub_c.shape[1])
        slack -= int(dc[i, k])
        cur[i] = k
    return np.concatenate([np.asarray(prefix, dtype=np.int64), cur])


class _LowerBound:
    """LP-relaxation lower bound on the noise of layers ``i..`` given a remaining budget.

    Each layer's options are reduced to the lower convex hull of its (cost, noise) points;
    taking hull segments in order of noise removed per unit cost (fractionally for the last)
    is the optimum of the relaxation, hence a lower bound on any integer choice.
    """

    def __init__(self, costs: np.ndarray, noise: np.ndarray):
        n_layers = costs.shape[0]
        base_c = np.zeros(n_layers)
        base_n = np.zeros(n_layers)
        segs = []  # (layer, cost step, noise removed, efficiency)
        ends = []  # (layer, option at the segment's start, option at its end)
        self.start = []  # each layer's hull start: its cheapest, least noisy option
        for i in range(n_layers):
            hull = _lower_hull(costs[i].astype(float), noise[i])
            self.start.append(hull[0])
            base_c[i], base_n[i] = costs[i, hull[0]], noise[i, hull[0]]
            for a, b in zip(hull[:-1], hull[1:], strict=True):
                dc = float(costs[i, b] - costs[i, a])
                dn = float(noise[i, a] - noise[i, b])
                segs.append((i, dc, dn, dn / dc))
                ends.append((i, a, b))
        seg = np.array(segs, dtype=float).reshape(-1, 4)
        # the relaxation's greedy order (segments of one layer stay in order: convex hull)
        self.order = [ends[j] for j in np.argsort(-seg[:, 3], kind="stable")]
        self._stages = []
        for i in range(n_layers + 1):
            s = seg[seg[:, 0] >= i]
            s = s[np.argsort(-s[:, 3], kind="stable")]
            self._stages.append((base_c[i:].sum(), base_n[i:].sum(), np.cumsum(s[:, 1]),
                                 np.cumsum(s[:, 2]), s[:, 3]))

    def __call__(self, i: int, remaining: np.ndarray) -> np.ndarray:
        c0, n0, cum_c, cum_n, eff = self._stages[i]
        r = remaining.astype(float) - c0
        if cum_c.size == 0:
            return np.full(r.shape, n0)
        k = np.searchsorted(cum_c, r, side="right")
        prev = np.maximum(k - 1, 0)
        took_c = np.where(k > 0, cum_c[prev], 0.0)
        took_n = np.where(k > 0, cum_n[prev], 0.0)
        part = np.where(k < cum_c.size, eff[np.minimum(k, cum_c.size - 1)], 0.0)
        gain = took_n + np.maximum(r - took_c, 0.0) * part
        return np.where(r < 0, np.inf, n0 - gain)


def _lower_hull(c: np.ndarray, n: np.ndarray) -> list[int]:
    """Indices of the lower-left convex hull of points (c, n), by rising cost, falling noise."""
    pts: list[int] = []
    for j in np.lexsort((n, c)):
        if pts and n[j] >= n[pts[-1]]:
            continue  # no cheaper-or-equal point is noisier: dominated
        while len(pts) >= 2:
            a, b = pts[-2], pts[-1]
            if (n[b] - n[a]) * (c[j] - c[a]) >= (n[j] - n[a]) * (c[b] - c[a]):
                pts.pop()  # b lies on or above the segment a -> j
            else:
                break
        pts.append(int(j))
    return pts


def _thin(front_c: np.ndarray, max_points: int | None) -> list[int]:
    if max_points is None or front_c.size <= max_points:
        return list(range(front_c.size))
    targets = np.linspace(float(front_c[0]), float(front_c[-1]), max_points)
    idx = np.clip(np.searchsorted(front_c, targets), 0, front_c.size - 1)
    lower = np.clip(idx - 1, 0, front_c.size - 1)
    pick = np.where(np.abs(front_c[lower] - targets) < np.abs(front_c[idx] - targets), lower, idx)
    return sorted(set(pick.tolist()) | {0, front_c.size - 1})


def _plan(table, choice, noise: np.ndarray, input_bits):
    total = float(noise[np.arange(len(choice)), choice].sum())
    predicted = math.inf if total == 0 else -10.0 * math.log10(total)
    bits = {name: table.bits[int(k)] for name, k in zip(table.layers, choice, strict=True)}
    return table.make_plan(bits, input_bits=input_bits, predicted_sqnr_db=predicted)
