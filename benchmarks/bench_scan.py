"""Speed of the sensitivity scan and of the bit allocator.

Run:  .venv/bin/python benchmarks/bench_scan.py   (prints a table, writes results/scan.json)
      .venv/bin/python benchmarks/bench_scan.py --method minmax   (the evaluation alone)

Baseline, measured in the same run: the naive loop, for every layer and bit width, deep-copies
the model, quantizes that layer's weights, runs the full model and compares its output (and
the layer's output, caught by a hook) with the float model's. scan(scope="layer") and
scan(scope="model") are timed against it on a 16-layer conv net (15 Conv2d + 1 Linear) with
64 samples, 6 bit widths, at the settings users get by default: scan's defaults (widths 2-8,
method "mse", per-channel weight grids), the loops fitting the same grids with fit_weight
(its defaults: "mse", per channel), one fit per layer and width as a careful user would
write it. ``--method minmax`` fits with "minmax" everywhere instead, so the ratios measure the
evaluation alone. The runs take turns for a few rounds and the speed-ups are medians of
per-round ratios. Peak memory: the extra resident memory at the peak
of one run of each, each in a fresh process (Linux peak-RSS mark).

The fair baseline for the layer scope, reported first: capture each layer's input and output
once (one forward with hooks), then for every layer and bit width quantize the weight and run
only that layer (F.conv2d / F.linear) on its captured input. The naive loop (inflated for the
layer scope, the careful user's loop for the model scope) is reported beside it.

plan_budget is timed on a synthetic table of 200 layers x 8 bit widths, for the three budget
kinds, and pareto_front on 60 layers x 6 bit widths.
"""

from __future__ import annotations

import copy
import json
import statistics
import sys
import time
from pathlib import Path

import _timing  # benchmarks/_timing.py, beside this script
import numpy as np
import torch
from torch import nn

from qwidgets.core.metrics import error_stats
from qwidgets.core.rounding import quantize
from qwidgets.model.layers import fit_weight
from qwidgets.planning.scanning import scan
from qwidgets.planning.solver import pareto_front, plan_budget
from qwidgets.planning.table import SensitivityTable

RESULTS = Path(__file__).parent / "results" / "scan.json"
BITS = (2, 3, 4, 5, 6, 8)  # scan's default widths
METHOD = "mse"  # scan's and fit_weight's default; --method minmax for the evaluation alone


def conv16() -> nn.Module:
    """15 Conv2d (3x3, BatchNorm, ReLU; 32x32 -> 8x8) and a Linear head: 16 quantizable layers."""
    torch.manual_seed(0)
    plan = [(3, 16, 1), (16, 16, 1), (16, 32, 2)] + [(32, 32, 1)] * 4 + [(32, 64, 2)] + [(64, 64, 1)] * 7
    layers: list[nn.Module] = []
    for c_in, c_out, stride in plan:
        layers += [nn.Conv2d(c_in, c_out, 3, stride=stride, padding=1), nn.BatchNorm2d(c_out), nn.ReLU()]
    layers += [nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(64, 10)]
    model = nn.Sequential(*layers)
    with torch.no_grad():  # non-trivial BatchNorm statistics, as in a trained model
        for m in model.modules():
            if isinstance(m, nn.BatchNorm2d):
                m.running_mean.uniform_(-0.1, 0.1)
                m.running_var.uniform_(0.5, 1.5)
    return model.eval()


def naive_loop(model: nn.Module, x: torch.Tensor, method: str) -> dict:
    """The baseline: per layer x bit width, deep copy, quantize one layer, full forward."""
    names = [n for n, m in model.named_modules() if isinstance(m, (nn.Conv2d, nn.Linear))]
    with torch.no_grad():
        ref = model(x)
    seen = {}
    hooks = [model.get_submodule(n).register_forward_hook(
        lambda m, a, o, n=n: seen.__setitem__(n, o.detach())) for n in names]
    with torch.no_grad():
        model(x)
    for h in hooks:
        h.remove()
    out = {}
    for name in names:
        for b in BITS:
            c = copy.deepcopy(model)
            layer = c.get_submodule(name)
            grid = fit_weight(layer, b, method)
            with torch.no_grad():
                layer.weight.copy_(quantize(layer.weight, grid))
            caught = {}
            h = layer.register_forward_hook(lambda m, a, o, caught=caught: caught.__setitem__("y", o))
            with torch.no_grad():
                y = c(x)
            h.remove()
            out[name, b] = (error_stats(seen[name], caught["y"]).sqnr_db, error_stats(ref, y).sqnr_db)
    return out


def capture_once_loop(model: nn.Module, x: torch.Tensor, method: str) -> dict:
    """The fair layer-scope baseline: capture each layer's input once, then loop."""
    import torch.nn.functional as F

    names = [n for n, m in model.named_modules() if isinstance(m, (nn.Conv2d, nn.Linear))]
    seen = {}
    hooks = [model.get_submodule(n).register_forward_hook(
        lambda m, a, o, n=n: seen.__setitem__(n, (a[0].detach(), o.detach()))) for n in names]
    with torch.no_grad():
        model(x)
    for h in hooks:
        h.remove()
    out = {}
    with torch.no_grad():
        for name in names:
            layer = model.get_submodule(name)
            inp, ref = seen[name]
            for b in BITS:
                wq = quantize(layer.weight, fit_weight(layer, b, method))
                if isinstance(layer, nn.Linear):
                    y = F.linear(inp, wq, layer.bias)
                else:
                    y = F.conv2d(inp, wq, layer.bias, layer.stride, layer.padding, layer.dilation,
                                 layer.groups)
                out[name, b] = error_stats(ref, y).sqnr_db
    return out


def peak_mib(kind: str) -> float:
    """Extra resident memory (MiB) at the peak of one run of ``kind``, in a fresh process.

    A fresh process, because a warm one keeps freed memory resident and a second run then
    needs no new pages. The child builds the model and data, resets the kernel's peak-RSS
    mark (Linux /proc/self/clear_refs), runs once and reports peak minus resident-before.
    NaN where that is not available.
    """
    import subprocess

    try:
        res = subprocess.run([sys.executable, __file__, "--peak", kind, "--method", METHOD], capture_output=True,
                             text=True, timeout=600, check=True)
        return float(res.stdout.strip().splitlines()[-1])
    except (OSError, subprocess.SubprocessError, ValueError, IndexError):
        return float("nan")


def _child_peak(kind: str) -> None:
    model = conv16()
    torch.manual_seed(1)
    x = torch.randn(64, 3, 32, 32)
    run = _runs(model, x, METHOD)[kind]
    try:
        with open("/proc/self/clear_refs", "w") as f:
            f.write("5")
        before = _timing.status_kib("VmRSS")
        run()
        print((_timing.status_kib("VmHWM") - before) / 1024)
    except OSError:
        print("nan")


def _runs(model, x, method: str) -> dict:
    fit = {} if method == "mse" else {"method": method}  # "mse": scan exactly as users call it
    return {
        "naive": lambda: naive_loop(model, x, method),
        "fair": lambda: capture_once_loop(model, x, method),
        "layer": lambda: scan(model, x, scope="layer", progress=False, **fit),
        "model": lambda: scan(model, x, scope="model", progress=False, **fit),
    }


def bench_scan(rows: list, out: dict, rounds: int = 3) -> None:
    model = conv16()
    torch.manual_seed(1)
    x = torch.randn(64, 3, 32, 32)
    runs = _runs(model, x, METHOD)
    results = {k: f() for k, f in runs.items()}  # warm-up, and the results to compare
    times: dict = {k: [] for k in runs}
    for _ in range(rounds):  # interleaved, so drifting load on a shared machine hits all alike
        for k, f in runs.items():
            t0 = time.perf_counter()
            f()
            times[k].append(time.perf_counter() - t0)
    t = {k: statistics.median(v) for k, v in times.items()}
    speed = {k: statistics.median(n / o for n, o in zip(times["naive"], times[k], strict=True))
             for k in ("fair", "layer", "model")}
    fair_speed = statistics.median(f / o for f, o in zip(times["fair"], times["layer"], strict=True))
    peak = {k: peak_mib(k) for k in runs}
    naive, tl, tm = results["naive"], results["layer"], results["model"]
    dl = max(abs(tl.sqnr_db(n, b, "layer") - naive[n, b][0]) for n in tl.layers for b in BITS)
    dfair = max(abs(tl.sqnr_db(n, b, "layer") - results["fair"][n, b]) for n in tl.layers for b in BITS)
    dm = max(abs(tm.sqnr_db(n, b, "model") - naive[n, b][1]) for n in tm.layers for b in BITS)
    passes = sorted({tm.model_pass(n) for n in tm.layers})
    rows += [
        ("fair loop (inputs captured once, layer only)", t["fair"], peak["fair"], f"{speed['fair']:.1f}x",
         "the fair layer-scope baseline"),
        ("naive loop (deep copy, quantize, full forward)", t["naive"], peak["naive"], "1.0x",
         "the model-scope baseline"),
        ("scan(scope='layer')", t["layer"], peak["layer"], f"{speed['layer']:.1f}x",
         f"{fair_speed:.2f}x vs fair loop; max |diff| {dl:.1e} dB naive, {dfair:.1e} dB fair"),
        ("scan(scope='model')", t["model"], peak["model"], f"{speed['model']:.1f}x",
         f"max |diff| {dm:.1e} dB, {'/'.join(passes)}"),
    ]
    out["conv16"] = {
        "layers": len(tl.layers), "bits": list(BITS), "samples": int(x.shape[0]), "method": METHOD,
        "rounds": rounds, "naive_s": t["naive"], "fair_s": t["fair"], "layer_scope_s": t["layer"],
        "model_scope_s": t["model"], "layer_speedup": speed["layer"], "model_speedup": speed["model"],
        "layer_speedup_vs_fair": fair_speed, "fair_speedup_vs_naive": speed["fair"],
        "max_diff_layer_vs_fair_db": dfair,
        "naive_peak_mib": peak["naive"], "layer_peak_mib": peak["layer"], "model_peak_mib": peak["model"],
        "max_diff_layer_db": dl, "max_diff_model_db": dm, "model_passes": passes,
    }
    # the loops' range fits on their own (one fit_weight per layer and width)
    t0 = time.perf_counter()
    for m in model.modules():
        if isinstance(m, (nn.Conv2d, nn.Linear)):
            for b in BITS:
                fit_weight(m, b, METHOD)
    t_fit = time.perf_counter() - t0
    rows.append((f"fit_weight({METHOD!r}), all layers x bits", t_fit, float("nan"), "-",
                 "inside both loops' times"))
    out["conv16"]["loop_fits_s"] = t_fit


def synthetic(layers: int, bits: tuple, seed: int) -> SensitivityTable:
    rng = np.random.default_rng(seed)
    params = np.exp(rng.uniform(np.log(1e3), np.log(1e6), layers)).astype(int)
    sq = 6.02 * np.array(bits)[None, :] + rng.normal(0, 3, (layers, 1)) + rng.normal(0, 0.5, (layers, len(bits)))
    return SensitivityTable.synthetic(np.sort(sq, axis=1), params=params.tolist(), bits=bits,
                                      macs=(params * rng.integers(1, 200, layers)).tolist())


def bench_plan(rows: list, out: dict) -> None:
    bits = (2, 3, 4, 5, 6, 8, 10, 12)
    t = synthetic(200, bits, seed=0)
    total_kib = sum(t.params(n) for n in t.layers) * 32 / 8192
    total_bops = sum(t.macs(n) for n in t.layers) * 8 * 8
    cases = {"mean_bits=5": {"mean_bits": 5.0}, "model_kib=15% of float": {"model_kib": 0.15 * total_kib},
             "bops=45% of 8x8-bit": {"bops": 0.45 * total_bops}}
    out["plan_budget_200x8"] = {}
    for label, kw in cases.items():
        times = []
        for _ in range(3):
            t0 = time.perf_counter()
            plan = plan_budget(t, **kw)
            times.append(time.perf_counter() - t0)
        s = statistics.median(times)
        rows.append((f"plan_budget 200 x 8, {label}", s, float("nan"), "-",
                     f"predicted {plan.predicted_sqnr_db:.2f} dB"))
        out["plan_budget_200x8"][label] = s
    t60 = synthetic(60, BITS, seed=1)
    t0 = time.perf_counter()
    front = pareto_front(t60, "model_kib")
    s = time.perf_counter() - t0
    rows.append(("pareto_front 60 x 6 (thinned to 512)", s, float("nan"), "-", f"{len(front)} points"))
    out["pareto_front_60x6_s"] = s


def main() -> None:
    torch.set_num_threads(max(1, torch.get_num_threads()))
    rows: list = []
    out: dict = {"torch": torch.__version__, "threads": torch.get_num_threads()}
    bench_scan(rows, out)
    bench_plan(rows, out)
    w = max(len(r[0]) for r in rows)
    print(f"{'case':<{w}}  {'time (s)':>9}  {'peak +MiB':>9}  {'vs naive':>8}  note")
    for name, s, mib, ratio, note in rows:
        print(f"{name:<{w}}  {s:>9.3f}  {mib:>9.1f}  {ratio:>8}  {note}")
    RESULTS.parent.mkdir(exist_ok=True)
    RESULTS.write_text(json.dumps(out, indent=2))
    print(f"wrote {RESULTS}", file=sys.stderr)


if __name__ == "__main__":
    args = sys.argv[1:]
    if "--method" in args:
        METHOD = args[args.index("--method") + 1]
    if args[:1] == ["--peak"]:
        _child_peak(args[1])
    else:
        main()
