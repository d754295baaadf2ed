"""refine_plan on the demo model at the board's weight budget: time, and what it buys.

Run:  .venv/bin/python benchmarks/bench_refine.py   (prints a table, writes results/refine.json)

The demo classifier (qwidgets.demo.load_demo), with its BatchNorm folded as the demo plans it,
is scanned on 256 training snippets and planned
with plan_budget(model_kib=BOARD_WEIGHT_BUDGET_KIB) (the whole model, the value in
qwidgets/demo.py, printed with the results); refine_plan then runs 200 steps (batch 64) on the same
256 snippets. Reported: the wall time of the refinement (target: 30 s on two cores), and the
model-output SQNR and accuracy on the 1,500 held-out snippets before and after.

Baseline, measured in the same run: 200 steps of ordinary float training of a copy of the
same model (Adam, cross-entropy, the same batch size, one torch thread like refine_plan), so
the ratio says what a refinement step costs against a plain training step whatever the load.
Machine load (1-minute load average) is recorded beside the figures, and the CPU time of both
(refine_plan runs small models on one torch thread, so its CPU time is about its wall time on
an idle core).
"""

from __future__ import annotations

import copy
import json
import os
import time
from pathlib import Path

import torch
from torch import nn

from qwidgets.demo import BOARD_WEIGHT_BUDGET_KIB, accuracy, load_demo
from qwidgets.model.folding import fold_batchnorm
from qwidgets.planning.evaluate import evaluate_plan
from qwidgets.planning.refining import refine_plan
from qwidgets.planning.scanning import scan
from qwidgets.planning.solver import plan_budget

RESULTS = Path(__file__).parent / "results" / "refine.json"
STEPS = 200
BATCH = 64
TARGET_S = 30.0


def float_training(model: nn.Module, x: torch.Tensor, y: torch.Tensor) -> tuple[float, float]:
    """Wall and CPU seconds for STEPS plain Adam steps on a copy of the model (the baseline)."""
    m = copy.deepcopy(model).train()
    opt = torch.optim.Adam(m.parameters(), lr=1e-4)
    loss_fn = nn.CrossEntropyLoss()
    gen = torch.Generator().manual_seed(0)
    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        t0, c0 = time.perf_counter(), time.process_time()
        for _ in range(STEPS):
            idx = torch.randint(0, x.shape[0], (BATCH,), generator=gen)
            opt.zero_grad(set_to_none=True)
            loss_fn(m(x[idx]), y[idx]).backward()
            opt.step()
        return time.perf_counter() - t0, time.process_time() - c0
    finally:
        torch.set_num_threads(threads)


def main() -> dict:
    torch.set_num_threads(2)
    demo = load_demo()
    model = fold_batchnorm(demo.model)  # as the demo scans and plans it
    x, y = demo.x_train[:256], demo.y_train[:256]
    table = scan(model, x, progress=False)
    plan = plan_budget(table, model_kib=BOARD_WEIGHT_BUDGET_KIB)
    float_training(model, x, y)  # warm-up (first use of the optimiser and the kernels)
    load_before = os.getloadavg()[0]
    base_s, base_cpu_s = float_training(model, x, y)
    t0, c0 = time.perf_counter(), time.process_time()
    result = refine_plan(model, x, plan, steps=STEPS, batch_size=BATCH, progress=False)
    refine_s, refine_cpu_s = time.perf_counter() - t0, time.process_time() - c0
    load_after = os.getloadavg()[0]
    before = evaluate_plan(model, demo.x_test, plan, metric=accuracy, target=demo.y_test)
    after = evaluate_plan(model, demo.x_test, result.plan, metric=accuracy, target=demo.y_test)
    out = {
        "plan_bits": plan.bits,
        "model_kib_budget": BOARD_WEIGHT_BUDGET_KIB,
        "model_kib": plan.model_kib,
        "planned_kib": plan.planned_kib,
        "mean_bits": plan.mean_bits,
        "steps": STEPS,
        "batch_size": BATCH,
        "refine_s": refine_s,
        "refine_cpu_s": refine_cpu_s,
        "float_training_cpu_s": base_cpu_s,
        "target_s": TARGET_S,
        "float_training_s": base_s,
        "ratio_to_float_training": refine_s / base_s,
        "load_average_1min": [load_before, load_after],
        "cpu_count": os.cpu_count(),
        "calibration_sqnr_db": {"before": result.start_sqnr_db, "after": result.sqnr_db},
        "best_step": result.best_step,
        "held_out_sqnr_db": {"before": before.measured_sqnr_db, "after": after.measured_sqnr_db},
        "held_out_accuracy": {"float": before.metric_float, "before": before.metric_planned,
                              "after": after.metric_planned},
        "held_out_samples": int(demo.y_test.shape[0]),
        "torch": torch.__version__,
    }
    rows = [
        ("plan", f"model_kib {plan.model_kib:.2f} (budget {BOARD_WEIGHT_BUDGET_KIB:g}), planned_kib "
                 f"{plan.planned_kib:.2f}, mean_bits {plan.mean_bits:.2f}", ""),
        (f"refine_plan, {STEPS} steps, batch {BATCH}", f"{refine_s:.1f} s",
         f"float training, same steps: {base_s:.1f} s ({refine_s / base_s:.1f}x); target <= {TARGET_S:.0f} s"),
        ("  CPU time (one thread)", f"{refine_cpu_s:.1f} s",
         f"float training: {base_cpu_s:.1f} s; about the wall time on an idle core"),
        ("model-output SQNR, calibration", f"{result.start_sqnr_db:.2f} -> {result.sqnr_db:.2f} dB",
         f"best step {result.best_step}"),
        ("model-output SQNR, held out", f"{before.measured_sqnr_db:.2f} -> {after.measured_sqnr_db:.2f} dB", ""),
        ("accuracy, held out", f"{before.metric_planned:.2%} -> {after.metric_planned:.2%}",
         f"float {before.metric_float:.2%}"),
        ("load average (1 min)", f"{load_before:.1f} / {load_after:.1f}", f"{os.cpu_count()} cores"),
    ]
    width = max(len(r[0]) for r in rows)
    for name, value, note in rows:
        print(f"{name:<{width}}  {value:<22} {note}")
    RESULTS.parent.mkdir(parents=True, exist_ok=True)
    RESULTS.write_text(json.dumps(out, indent=1) + "\n")
    print("wrote", RESULTS)
    return out


if __name__ == "__main__":
    main()
