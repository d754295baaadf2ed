"""The scan at scale: a residual network with ResNet-18's layout, batches, threads, fitting.

Run:  .venv/bin/python benchmarks/bench_scale.py   (prints a table, writes results/scale.json)

Network: ResNet-18's layout (7x7 stride-2 stem and max pooling, four stages of two basic
blocks, 1x1 strided skip convolutions where the shape changes, pooling, a 1000-way Linear
head: 21 quantizable layers) with a quarter of its widths (16-32-64-128 channels), random weights,
non-trivial BatchNorm statistics, on 8 images of 3x112x112, bit widths 2-8.

Baseline, measured in the same run and interleaved with the others: the naive loop, for every
layer and bit width, deep-copies the model, overwrites that layer's weight with its quantized
version and runs the full model. Against it: scan(scope="model") exact (only what follows each
layer reruns, from one recorded pass) and estimate="gain" (one forward with gradients and a few
back-propagated probes per batch, for all layers together). Grids
are min-max in all three so the ratios measure the passes. Everything runs on one thread (the
machine is two cores shared with other processes; the scan would pick one thread there too),
so the ratios compare the same arithmetic. The gain estimate's error against the exact model
scope is reported per bit width (median and worst over layers, dB).

Also: peak memory of a scan with batch_size=8 on 16 and on 64 images (each in a fresh
process: the rise of the peak resident set above the resident set before the scan, Linux
/proc/self/clear_refs); fitting every bit width from one sorted copy (fit_ranges) against one
fit_range per width; and one against two threads for fitting and for a forward pass.
"""

from __future__ import annotations

import copy
import json
import statistics
import subprocess
import sys
import time
from pathlib import Path

import _timing  # benchmarks/_timing.py, beside this script
import numpy as np
import torch
from torch import nn

from qwidgets.core.metrics import error_stats
from qwidgets.core.ranges import fit_range, fit_ranges
from qwidgets.core.rounding import quantize
from qwidgets.model.layers import fit_weight
from qwidgets.planning.scanning import scan

RESULTS = Path(__file__).parent / "results" / "scale.json"
BITS = (2, 3, 4, 5, 6, 8)
SIZE = 112


class Block(nn.Module):
    def __init__(self, c_in, c_out, stride):
        super().__init__()
        self.conv1 = nn.Conv2d(c_in, c_out, 3, stride, 1, bias=False)
        self.bn1 = nn.BatchNorm2d(c_out)
        self.conv2 = nn.Conv2d(c_out, c_out, 3, 1, 1, bias=False)
        self.bn2 = nn.BatchNorm2d(c_out)
        self.downsample = (nn.Sequential(nn.Conv2d(c_in, c_out, 1, stride, bias=False), nn.BatchNorm2d(c_out))
                           if stride != 1 or c_in != c_out else None)

    def forward(self, x):
        skip = x if self.downsample is None else self.downsample(x)
        return torch.relu(self.bn2(self.conv2(torch.relu(self.bn1(self.conv1(x))))) + skip)


class ResNet18Layout(nn.Module):
    def __init__(self, widths=(16, 32, 64, 128), classes=1000):
        super().__init__()
        self.stem = nn.Sequential(nn.Conv2d(3, widths[0], 7, 2, 3, bias=False), nn.BatchNorm2d(widths[0]),
                                  nn.ReLU(), nn.MaxPool2d(3, 2, 1))
        stages, c = [], widths[0]
        for i, w in enumerate(widths):
            stages += [Block(c, w, 1 if i == 0 else 2), Block(w, w, 1)]
            c = w
        self.stages = nn.Sequential(*stages)
        self.head = nn.Linear(c, classes)

    def forward(self, x):
        return self.head(self.stages(self.stem(x)).mean(dim=(2, 3)))


WIDTHS = (16, 32, 64, 128)  # a quarter of ResNet-18's


def make_model() -> nn.Module:
    torch.manual_seed(0)
    model = ResNet18Layout(WIDTHS)
    with torch.no_grad():
        for m in model.modules():
            if isinstance(m, nn.BatchNorm2d):
                m.running_mean.uniform_(-0.1, 0.1)
                m.running_var.uniform_(0.5, 1.5)
    return model.eval()


def images(n: int) -> torch.Tensor:
    return torch.randn(n, 3, SIZE, SIZE, generator=torch.Generator().manual_seed(1))


def naive_loop(model: nn.Module, x: torch.Tensor) -> dict:
    names = [n for n, m in model.named_modules() if isinstance(m, (nn.Conv2d, nn.Linear))]
    with torch.no_grad():
        ref = model(x)
    out = {}
    for name in names:
        for b in BITS:
            c = copy.deepcopy(model)
            layer = c.get_submodule(name)
            with torch.no_grad():
                layer.weight.copy_(quantize(layer.weight, fit_weight(layer, b, "minmax")))
                out[name, b] = error_stats(ref, c(x)).sqnr_db
    return out


def _runs(model, x):
    kw = dict(method="minmax", scope="model", progress=False)
    return {
        "naive": lambda: naive_loop(model, x),
        "exact": lambda: scan(model, x, BITS, **kw),
        "gain": lambda: scan(model, x, BITS, estimate="gain", **kw),
    }


def bench_model_scope(rows, out, rounds=2):
    model, x = make_model(), images(8)
    runs = _runs(model, x)
    results = {k: f() for k, f in runs.items()}  # warm-up, and the numbers to compare
    times = {k: [] for k in runs}
    for _ in range(rounds):
        for k, f in runs.items():
            t0 = time.perf_counter()
            f()
            times[k].append(time.perf_counter() - t0)
    naive, exact, gain = results["naive"], results["exact"], results["gain"]
    diff = max(abs(exact.sqnr_db(n, b) - naive[n, b]) for n, b in naive)
    t = {k: statistics.median(v) for k, v in times.items()}
    speed = {k: statistics.median(n / e for n, e in zip(times["naive"], times[k], strict=True))
             for k in ("exact", "gain")}
    rows.append(("naive loop (deep copy + full forward)", f"{t['naive']:.2f} s", "1.00x", ""))
    rows.append(("scan model scope, exact (suffix replay)", f"{t['exact']:.2f} s", f"{speed['exact']:.2f}x",
                 f"max |exact - naive| {diff:.2e} dB"))
    rows.append(("scan model scope, estimate='gain'", f"{t['gain']:.2f} s", f"{speed['gain']:.2f}x", ""))
    err = np.abs(gain.sqnr_array("model") - exact.sqnr_array("model"))
    per_width = {}
    for j, b in enumerate(BITS):
        med, worst = float(np.median(err[:, j])), float(err[:, j].max())
        per_width[b] = {"median_db": med, "worst_db": worst}
        rows.append((f"  gain estimate error at {b} bits", f"median {med:.2f} dB", f"worst {worst:.2f} dB", ""))
    out["model_scope"] = {"layers": len(exact.layers), "images": 8, "size": SIZE, "bits": list(BITS),
                          "seconds": t, "speedup_vs_naive": speed, "max_abs_diff_exact_vs_naive_db": diff,
                          "gain_error_db": per_width, "model_pass": sorted({exact.model_pass(n) for n in exact.layers})}


def peak_mib(n_images: int, estimate: str = "exact") -> float:
    res = subprocess.run([sys.executable, __file__, "--peak", str(n_images), estimate], capture_output=True,
                         text=True, timeout=1200, check=True)
    return float(res.stdout.strip().splitlines()[-1])


def _child_peak(n_images: int, estimate: str) -> None:
    torch.set_num_threads(1)
    model, x = make_model(), images(n_images)
    scan(model, x[:2], (4,), method="minmax", progress=False, batch_size=2)  # imports, lazy init
    with open("/proc/self/clear_refs", "w") as f:
        f.write("5")
    before = _timing.status_kib("VmRSS")
    scan(model, x, (4, 8), method="minmax", progress=False, batch_size=8, estimate=estimate)
    print((_timing.status_kib("VmHWM") - before) / 1024)


def bench_memory(rows, out):
    peaks = {n: peak_mib(n) for n in (16, 64)}
    gain_peaks = {n: peak_mib(n, "gain") for n in (16, 64)}
    batch_mib = 8 * 3 * SIZE * SIZE * 4 / 2**20
    rows.append(("peak memory, 16 images, batch_size=8", f"{peaks[16]:.0f} MiB", "", f"input batch {batch_mib:.1f} MiB"))
    rows.append(("peak memory, 64 images, batch_size=8", f"{peaks[64]:.0f} MiB", f"{peaks[64] / peaks[16]:.2f}x", ""))
    rows.append(("peak memory, estimate='gain', 16 / 64 images", f"{gain_peaks[16]:.0f} / {gain_peaks[64]:.0f} MiB",
                 f"{gain_peaks[64] / gain_peaks[16]:.2f}x", "layer errors of one batch kept for the probes"))
    out["memory"] = {"batch_size": 8, "peak_mib": peaks, "ratio_64_over_16": peaks[64] / peaks[16],
                     "gain_peak_mib": gain_peaks}


def _best(f, reps=3) -> float:
    best = float("inf")
    for _ in range(reps):
        t0 = time.perf_counter()
        f()
        best = min(best, time.perf_counter() - t0)
    return best


def bench_fitting_and_threads(rows, out):
    torch.manual_seed(2)
    w = torch.randn(256, 128, 3, 3)
    once = _best(lambda: fit_ranges(w, BITS, "mse", axis=0), 2)
    each = _best(lambda: [fit_range(w, b, "mse", axis=0) for b in BITS], 2)
    rows.append(("fit 6 widths, 256x128x3x3 mse: one sort", f"{once:.2f} s", f"{each / once:.2f}x",
                 f"one fit per width {each:.2f} s"))
    model, x = make_model(), images(8)
    thr = {}
    for n in (1, 2):
        torch.set_num_threads(n)
        thr[n] = {"fit": _best(lambda: fit_ranges(w[:64], (4,), "mse", axis=0)),
                  "forward": _best(lambda: model(x))}
    torch.set_num_threads(1)
    for kind in ("fit", "forward"):
        rows.append((f"{kind}: 2 threads vs 1", f"{thr[2][kind] * 1e3:.0f} ms", f"{thr[1][kind] / thr[2][kind]:.2f}x",
                     f"1 thread {thr[1][kind] * 1e3:.0f} ms"))
    out["fitting"] = {"one_sort_s": once, "per_width_s": each, "speedup": each / once}
    out["threads"] = thr


def main() -> None:
    torch.set_num_threads(1)
    with torch.no_grad():
        rows, out = [], {}
        bench_model_scope(rows, out)
        bench_memory(rows, out)
        bench_fitting_and_threads(rows, out)
    w = max(len(r[0]) for r in rows)
    for r in rows:
        print(f"{r[0]:<{w}}  {r[1]:>16}  {r[2]:>14}  {r[3]}")
    RESULTS.parent.mkdir(exist_ok=True)
    RESULTS.write_text(json.dumps(out, indent=2, default=str) + "\n")
    print(f"wrote {RESULTS}")


if __name__ == "__main__":
    if len(sys.argv) == 4 and sys.argv[1] == "--peak":
        _child_peak(int(sys.argv[2]), sys.argv[3])
    else:
        main()
