"""Speed of the allocator (scipy.optimize.milp) and of the one-budget Pareto front.

Run:  .venv/bin/python benchmarks/bench_planning.py   (prints a table, writes results/planning.json)

Cases (synthetic tables: about 6 dB per bit with a per-entry offset and noise, as scans give):
- plan_budget on 200 entries x 6 weight widths x 4 input widths (quantize="separate": 24
  options per entry) under two budgets at once (weight KiB and BOPs), three budget levels;
- the one-budget Pareto front of 200 entries x 8 widths, by the method pareto_front uses
  (lower-hull vertices at this size) against the alternatives measured in the same run: the
  dynamic programme over every Pareto point (stopped at a time limit) and one milp per front
  point (timed on a sample of points, scaled to the front's size).

Baseline for the ratios: the linear-programming relaxation of the same two-budget problem
(scipy.optimize.linprog, HiGHS), timed in the same run: the floor any exact method starts
from. Times are wall-clock medians; CPU seconds of this process are given beside them, since
the machine is shared.
"""

from __future__ import annotations

import json
import statistics
import sys
import time
from pathlib import Path

import numpy as np
from scipy.optimize import linprog

from qwidgets.planning.choices import build_menu, limit
from qwidgets.planning.front import _pareto_step, hull_front
from qwidgets.planning.solver import pareto_front, plan_budget
from qwidgets.planning.table import SensitivityTable

RESULTS = Path(__file__).parent / "results" / "planning.json"


def separate_table(n: int, wbits, ibits, seed: int) -> SensitivityTable:
    rng = np.random.default_rng(seed)
    params = np.exp(rng.uniform(np.log(1e3), np.log(1e6), n)).astype(int)
    off = rng.normal(0, 3, (n, 1))
    sw = np.sort(6.02 * np.array(wbits)[None] + off + 10 + rng.normal(0, 0.5, (n, len(wbits))), 1)
    si = np.sort(6.02 * np.array(ibits)[None] + off + 14 + rng.normal(0, 0.5, (n, len(ibits))), 1)
    return SensitivityTable.synthetic(sw, params=params.tolist(), bits=wbits, input_sqnr_db=si,
                                      input_bits=ibits, macs=(params * rng.integers(1, 200, n)).tolist())


def weight_table(n: int, bits, seed: int) -> SensitivityTable:
    rng = np.random.default_rng(seed)
    params = np.exp(rng.uniform(np.log(1e3), np.log(1e6), n)).astype(int)
    sq = 6.02 * np.array(bits)[None] + rng.normal(0, 3, (n, 1)) + rng.normal(0, 0.5, (n, len(bits)))
    return SensitivityTable.synthetic(np.sort(sq, 1), params=params.tolist(), bits=bits,
                                      macs=(params * rng.integers(1, 200, n)).tolist())


def timed(fn, repeat=3):
    walls, cpus, out = [], [], None
    for _ in range(repeat):
        w, c = time.perf_counter(), time.process_time()
        out = fn()
        walls.append(time.perf_counter() - w)
        cpus.append(time.process_time() - c)
    return statistics.median(walls), statistics.median(cpus), out


def lp_relaxation(t, budgets):
    menu = build_menu(t)
    rows = [np.concatenate(menu.costs(t, k)).astype(float) / limit(k, v, t) for k, v in budgets.items()]
    c = np.concatenate(menu.noise)
    sizes = [len(n) for n in menu.noise]
    a_eq = np.zeros((len(sizes), c.size))
    start = 0
    for i, k in enumerate(sizes):
        a_eq[i, start:start + k] = 1
        start += k
    return linprog(c, A_ub=np.vstack(rows), b_ub=np.ones(len(rows)), A_eq=a_eq, b_eq=np.ones(len(sizes)),
                   bounds=(0, 1), method="highs")


def main() -> None:
    rows, out = [], {}
    t = separate_table(200, (2, 3, 4, 5, 6, 8), (4, 5, 6, 8), seed=0)
    kib_all = sum(t.params(n) * 8 + 64 for n in t.layers) / 8192
    bops_all = sum(t.macs(n) * 8 * 8 for n in t.layers)
    out["plan_budget_200x6x4_two_budgets"] = []
    for frac_k, frac_b in ((0.45, 0.35), (0.6, 0.5), (0.75, 0.6)):
        budgets = {"planned_kib": frac_k * kib_all, "bops": frac_b * bops_all}
        wall_lp, cpu_lp, _ = timed(lambda b=budgets: lp_relaxation(t, b))
        wall, cpu, plan = timed(lambda b=budgets: plan_budget(t, **b))
        label = f"plan_budget 200x6x4, KiB {frac_k:.0%} + BOPs {frac_b:.0%} of 8/8-bit"
        rows.append((label, wall, cpu, wall / wall_lp, f"{plan.predicted_sqnr_db:.2f} dB; LP relaxation {wall_lp:.3f} s"))
        out["plan_budget_200x6x4_two_budgets"].append(
            {"kib_frac": frac_k, "bops_frac": frac_b, "wall_s": wall, "cpu_s": cpu, "lp_wall_s": wall_lp,
             "ratio_to_lp": wall / wall_lp, "predicted_db": plan.predicted_sqnr_db})

    w = weight_table(200, (2, 3, 4, 5, 6, 8, 10, 12), seed=1)
    wall, cpu, front = timed(lambda: pareto_front(w, "planned_kib"))
    menu = build_menu(w)
    costs = menu.costs(w, "planned_kib")
    wall_hull, _, hull = timed(lambda: hull_front(costs, menu.noise))
    # the dynamic programme over every Pareto point, stopped after 5 s
    c, n = np.zeros(1, np.int64), np.zeros(1)
    t0, done = time.perf_counter(), 0
    for ci, ni in zip(costs, menu.noise, strict=True):
        c, n, _, _ = _pareto_step(c, n, ci, ni)
        done += 1
        if time.perf_counter() - t0 > 5:
            break
    dp_s = time.perf_counter() - t0
    # one milp per front point, timed on 5 points
    pts = front[:: max(1, len(front) // 5)][:5]
    t0 = time.perf_counter()
    for cst, _, _ in pts:
        plan_budget(w, planned_kib=cst)
    per_milp = (time.perf_counter() - t0) / len(pts)
    rows.append((f"pareto_front 200x8 ({len(front)} points, lower hull)", wall, cpu, float("nan"),
                 f"hull alone {wall_hull:.3f} s, {hull[0].size} vertices"))
    rows.append(("  alternative: dynamic programme, every point", dp_s, float("nan"), dp_s / wall,
                 f"stopped after {done} of 200 entries, {c.size} states"))
    rows.append(("  alternative: one milp per front point", per_milp * len(front), float("nan"),
                 per_milp * len(front) / wall, f"{per_milp:.3f} s a point x {len(front)} points"))
    out["pareto_front_200x8"] = {"wall_s": wall, "cpu_s": cpu, "points": len(front), "hull_s": wall_hull,
                                 "dp_s": dp_s, "dp_entries_done": done, "dp_states": int(c.size),
                                 "milp_per_point_s": per_milp}
    width = max(len(r[0]) for r in rows)
    print(f"{'case':<{width}}  {'wall s':>8}  {'cpu s':>8}  {'ratio':>8}  note")
    for name, s, cp, ratio, note in rows:
        print(f"{name:<{width}}  {s:>8.3f}  {cp:>8.3f}  {ratio:>8.2f}  {note}")
    RESULTS.parent.mkdir(exist_ok=True)
    RESULTS.write_text(json.dumps(out, indent=2))
    print(f"wrote {RESULTS}; ratio: plan_budget / LP relaxation, alternatives / pareto_front", file=sys.stderr)


if __name__ == "__main__":
    main()
