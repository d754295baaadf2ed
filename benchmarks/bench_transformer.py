"""The whole decision on a GPT-style decoder at scale: gain scan, plan, evaluation; peak memory.

Run:  .venv/bin/python benchmarks/bench_transformer.py [--size 124m | --size 1.1b | --size tiny] [--no-exact]
      [--no-activations] [--threads N]
(prints a table, writes results/transformer.json, or results/transformer_1.1b.json)

Models (benchmarks/_decoder.py, random weights, normal with std 0.02; attention written with
``F.scaled_dot_product_attention``; the output layer tied to the token embedding):
- 124m: 12 layers, width 768, 12 heads, MLP 3072, vocabulary 50257, 8 sequences of 128 tokens
  (about 124M parameters);
- 1.1b: 22 layers, width 2048, 32 heads, a gated MLP of width 5632 (gate, up, down), vocabulary
  32000, 4 sequences of 128 tokens (1.2B parameters with the tied output layer; needs about
  12 GiB);
- tiny: 2 layers of width 64 (a quick check that the script runs).

While a stage runs, its elapsed time and memory are written to the results file every 15 s.

Timed, each from a cold grid cache (every grid fitted, as in a fresh process):
- weights only: ``scan(estimate="gain")`` at its defaults, ``plan_budget(mean_bits=4.5)``
  (stored bits per weight, scales included), ``evaluate_plan``;
- weights and activations (unless --no-activations): the same with ``quantize="separate"``
  (weights at 2-8 bits, inputs and attention's query / key / value at 4, 6, 8 bits) and a
  BOPs budget of ``BOPS_FRACTION`` of the plan with every width at 8 bits;
- the exact model scope (unless --no-exact): ``scan(scope="model")``, weights only.

Threads: torch's default (the machine's cores) unless ``--threads N`` sets it, so the scan runs
at its own defaults (qwidgets/planning/threads.py: the passes on torch's thread count, fitting
on one thread); the count is recorded in the results (``torch_threads``). On a shared machine a
second thread mostly waits for a core another process holds: compare runs at the same count.

Peak memory: the peak resident set (Linux ``VmHWM``, reset through ``/proc/self/clear_refs``
before each stage) above the resident set with the float model built (``VmRSS``). The machine
is shared: the load average is printed and stored beside the times.
"""

from __future__ import annotations

import json
import os
import sys
import threading
import time
from pathlib import Path

import _timing  # benchmarks/_timing.py, beside this script
import torch
from _decoder import make_decoder, tokens  # benchmarks/_decoder.py

from qwidgets.core.grid_cache import GRID_CACHE
from qwidgets.planning.evaluate import evaluate_plan
from qwidgets.planning.scanning import scan
from qwidgets.planning.solver import plan_budget

SIZES = {
    "tiny": dict(model=dict(vocab=500, width=64, layers=2, heads=4, context=32, mlp=256), sequences=4),
    "124m": dict(model=dict(vocab=50257, width=768, layers=12, heads=12, context=128, mlp=3072), sequences=8),
    "1.1b": dict(model=dict(vocab=32000, width=2048, layers=22, heads=32, context=128, mlp=5632, gated=True),
                 sequences=4),
}
MEAN_BITS = 4.5  # stored bits per planned weight (codes, scales and zero points)
BOPS_FRACTION = 0.3  # the weights-and-activations plan: this fraction of 8-bit x 8-bit BOPs


def _reset_peak() -> int:
    """Reset the kernel's peak-RSS mark; the resident set now (KiB)."""
    with open("/proc/self/clear_refs", "w") as f:
        f.write("5")
    return _timing.status_kib("VmRSS")


_LOCK = threading.Lock()


def _watch(out, base_kib, every: float = 15.0) -> None:
    """Every ``every`` seconds, the running stage's elapsed time and memory into the results
    file (a run stopped in the middle of a long stage keeps how far it got)."""
    while True:
        time.sleep(every)
        stage = out.get("running")
        if stage is not None:
            out["progress"] = {"stage": stage[0], "elapsed_s": time.perf_counter() - stage[1],
                               "rss_gib_over_model": (_timing.status_kib("VmRSS") - base_kib) / 2**20,
                               "peak_gib_over_model": (_timing.status_kib("VmHWM") - base_kib) / 2**20,
                               "load": os.getloadavg()}
            _write(out)


def _stage(rows, out, key, base_kib, fn):
    _reset_peak()
    t0, c0 = time.perf_counter(), time.process_time()
    out["running"] = (key, t0)
    result = fn()
    out["running"] = None
    wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    peak = (_timing.status_kib("VmHWM") - base_kib) / 2**20
    out[key] = {"seconds": wall, "cpu_seconds": cpu, "peak_gib_over_model": peak, "load": os.getloadavg()}
    rows.append((key, f"{wall:.1f} s", f"{peak:.2f} GiB", f"cpu {cpu:.1f} s, load {os.getloadavg()[0]:.1f}"))
    print(*rows[-1], sep="  ", flush=True)
    _write(out)  # after every stage: a long run that is stopped keeps what it measured
    return result


def _write(out) -> Path:
    size = out["size"]
    path = Path(__file__).parent / "results" / ("transformer.json" if size == "124m" else f"transformer_{size}.json")
    path.parent.mkdir(exist_ok=True)
    with _LOCK:
        path.write_text(json.dumps({k: v for k, v in out.items() if k != "running"}, indent=2,
                                   default=str) + "\n")
    return path


def decision(model, x, rows, out, prefix, base, **scan_kw):
    """scan (cold grid cache) + plan + evaluate; each stage timed and its peak memory noted."""
    GRID_CACHE.clear()
    table = _stage(rows, out, f"{prefix}: scan(estimate='gain')", base,
                   lambda: scan(model, x, estimate="gain", progress=False, **scan_kw))
    if scan_kw.get("quantize") == "separate":
        full = plan_budget(table, bops=1e30, allowed_bits={"weight": (8,), "input": (8,)})
        budget = dict(bops=BOPS_FRACTION * full.bops)
    else:
        budget = dict(mean_bits=MEAN_BITS)
    plan = _stage(rows, out, f"{prefix}: plan_budget({next(iter(budget))})", base,
                  lambda: plan_budget(table, **budget))
    report = _stage(rows, out, f"{prefix}: evaluate_plan", base, lambda: evaluate_plan(model, x, plan))
    total = sum(out[k]["seconds"] for k in out if k.startswith(prefix + ":"))
    out[prefix] = {"seconds": total, "entries": len(table.layers), "notes": list(table.notes),
                   "model_pass": sorted({table.model_pass(n) for n in table.layers}),
                   "predicted_sqnr_db": plan.predicted_sqnr_db, "measured_sqnr_db": report.measured_sqnr_db,
                   "mean_bits": plan.mean_bits}
    rows.append((f"{prefix}: whole decision", f"{total:.1f} s", "",
                 f"{len(table.layers)} entries; SQNR predicted {plan.predicted_sqnr_db:.1f} dB, "
                 f"measured {report.measured_sqnr_db:.1f} dB"))
    print(*rows[-1], sep="  ", flush=True)
    return table


def main(size: str, exact: bool, activations: bool, n_threads: int | None) -> None:
    if n_threads is not None:  # else torch's default, which the scan's passes follow
        torch.set_num_threads(n_threads)
    spec = SIZES[size]
    model = make_decoder(**spec["model"])
    x = tokens(spec["sequences"], spec["model"]["context"], spec["model"]["vocab"])
    params = sum(p.numel() for p in model.parameters())
    scan(make_decoder(vocab=64, width=32, layers=1, heads=2, context=8), tokens(2, 8, 64), bits=(4,),
         progress=False)  # imports and lazy initialisation, outside the timings
    base = _reset_peak()
    rows, out = [], {"size": size, "parameters": params, "sequences": spec["sequences"],
                     "model_rss_gib": base / 2**20, "torch_threads": torch.get_num_threads(),
                     "cpus": os.cpu_count(), "load_start": os.getloadavg()}
    threading.Thread(target=_watch, args=(out, base), daemon=True).start()
    with torch.no_grad():
        decision(model, x, rows, out, "weights", base)
        if activations:
            decision(model, x, rows, out, "weights and activations", base, quantize="separate")
        if exact:
            GRID_CACHE.clear()
            t = _stage(rows, out, "exact scan (scope='model')", base,
                       lambda: scan(model, x, scope="model", progress=False))
            out["exact notes"] = list(t.notes)
    out["load_end"] = os.getloadavg()
    out.pop("progress", None)
    print(f"{size} decoder: {params / 1e6:.0f}M parameters, {spec['sequences']}x{spec['model']['context']} tokens, "
          f"float model {base / 2**20:.2f} GiB resident; {out['torch_threads']} torch threads; "
          f"load {out['load_start'][0]:.1f} -> {out['load_end'][0]:.1f}")
    w = max(len(r[0]) for r in rows)
    for r in rows:
        print(f"{r[0]:<{w}}  {r[1]:>9}  {r[2]:>10}  {r[3]}")
    print(f"wrote {_write(out)}")


if __name__ == "__main__":
    args = sys.argv[1:]
    chosen = args[args.index("--size") + 1] if "--size" in args else "124m"
    if chosen not in SIZES:
        raise SystemExit(f"--size must be one of {', '.join(SIZES)}, got {chosen!r}")
    main(chosen, "--no-exact" not in args, "--no-activations" not in args,
         int(args[args.index("--threads") + 1]) if "--threads" in args else None)
