"""The scan at scale, at the default settings (method="mse"): four models, peak memory, fitting.

Run:  .venv/bin/python benchmarks/bench_scale.py [cnn48 resnet18q resnet18 decoder] [--no-extras]
(prints a table, writes results/scale.json: the named models' entries replaced, the others kept;
all models by default)

Models (random weights; BatchNorm with non-trivial statistics; bit widths 2, 3, 4, 5, 6, 8):
- cnn48: a residual CNN with ResNet-18's layout (7x7 stride-2 stem and max pooling, four stages
  of two basic blocks, 1x1 strided skips, a 1000-way Linear head: 21 quantizable layers),
  widths 16-128, 16 images of 3x48x48;
- resnet18q: the same network on 8 images of 3x112x112 (a quarter of ResNet-18's widths);
- resnet18: ResNet-18's full widths (64-512), 8 images of 3x112x112;
- decoder: a GPT-style decoder (benchmarks/_decoder.py: 4 pre-norm blocks of width 256, causal
  attention written with scaled_dot_product_attention, vocabulary 8000 tied to the output
  layer), 8 sequences of 64 tokens.

Baseline, measured in the same run and interleaved with the scans: the naive loop, for every
entry and bit width, deep-copies the model, writes that entry's weight quantized on the exact
scan's grid (so it does not fit) and runs the full model. Against it, at the default
method="mse": scan(scope="model") exact and estimate="gain", each starting with an empty grid
cache (it fits every grid, as a first scan in a process does); a scan whose grids are in the
cache (a second scan) is reported beside. Everything runs on one torch thread, so the ratios
compare the same arithmetic on the shared two-core machine. The gain estimate's error against
the exact model scope is reported per bit width (median over entries, dB).

Also (unless --no-extras): peak memory of a scan with batch_size=8 on 16 and on 64 images (each
in a fresh process: the rise of the peak resident set above the resident set before the scan,
Linux /proc/self/clear_refs); fitting every bit width from one sorted copy (fit_ranges) against
one fit_range per width; one against two threads for fitting and for a forward pass.
"""

from __future__ import annotations

import copy
import json
import os
import statistics
import subprocess
import sys
import time
from pathlib import Path

import _timing  # benchmarks/_timing.py, beside this script
import numpy as np
import torch
from _decoder import make_decoder, tokens  # benchmarks/_decoder.py
from torch import nn

from qwidgets.core.grid_cache import GRID_CACHE
from qwidgets.core.metrics import error_stats
from qwidgets.core.ranges import fit_range, fit_ranges
from qwidgets.core.rounding import quantize
from qwidgets.model.entries import find_entries
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


def make_model(widths=WIDTHS) -> nn.Module:
    """The residual network at ``widths``: seeded weights, BatchNorm with non-trivial statistics."""
    torch.manual_seed(0)
    model = ResNet18Layout(widths)
    with torch.no_grad():
        for m in model.modules():
            if isinstance(m, nn.BatchNorm2d):
                m.running_mean.uniform_(-0.1, 0.1)
                m.running_var.uniform_(0.5, 1.5)
    return model.eval()


def images(n: int, size: int = SIZE) -> torch.Tensor:
    return torch.randn(n, 3, size, size, generator=torch.Generator().manual_seed(1))


def naive_loop(model: nn.Module, x, table) -> dict:
    """The baseline, given the table's grids: per entry and width, deep copy, write the quantized
    weight, full forward, SQNR of the output."""
    with torch.no_grad():
        ref = model(x)
    out = {}
    for name in table.layers:
        for b in table.bits:
            c = copy.deepcopy(model)
            entry = next(e for e in find_entries(c) if e.name == name)
            with torch.no_grad():
                p = entry.parameter(c)
                p.copy_(quantize(p, table.weight_grid(name, b)))
                out[name, b] = error_stats(ref, c(x)).sqnr_db
    return out


def model_cases() -> dict:
    """name -> (description, make model, make data, timing rounds)."""
    def resnet(widths):
        return lambda: make_model(widths)

    def imgs(n, size):
        return lambda: images(n, size)

    return {
        "cnn48": ("residual CNN (ResNet-18 layout), widths 16-128, 16 images 48x48",
                  resnet((16, 32, 64, 128)), imgs(16, 48), 2),
        "resnet18q": ("ResNet-18 layout, quarter width, 8 images 112x112", resnet(WIDTHS), imgs(8, SIZE), 2),
        "resnet18": ("ResNet-18 layout, full width, 8 images 112x112", resnet((64, 128, 256, 512)), imgs(8, SIZE), 1),
        "decoder": ("GPT-style decoder, 4 layers, width 256, vocabulary 8000 tied, 8x64 tokens",
                    make_decoder, tokens, 1),
    }


def _timed(f):
    t0 = time.perf_counter()
    r = f()
    return r, time.perf_counter() - t0


def bench_model_scope(rows, out, names):
    """Default settings (method="mse"): exact and gain scans against the naive loop given the
    exact scan's grids, interleaved; every scan starts with an empty grid cache (it fits)."""
    out["model_scope"] = {}
    for key in names:
        _bench_one(key, rows, out)


def _bench_one(key, rows, out):
    """One model's rows: naive loop, exact and gain scans (cold and cached grids)."""
    desc, make, data, rounds = model_cases()[key]
    model, x = make(), data()
    kw = dict(bits=BITS, scope="model", progress=False)

    def cold(estimate):
        GRID_CACHE.clear()
        return scan(model, x, estimate=estimate, **kw)

    exact, _ = _timed(lambda: cold("exact"))  # warm-up, and the grids the naive loop is given
    first = exact
    times = {k: [] for k in ("naive", "exact", "gain")}
    for _ in range(rounds):
        naive, t = _timed(lambda e=exact: naive_loop(model, x, e))
        times["naive"].append(t)
        exact, t = _timed(lambda: cold("exact"))
        times["exact"].append(t)
        gain, t = _timed(lambda: cold("gain"))
        times["gain"].append(t)
    _, warm_exact = _timed(lambda: scan(model, x, estimate="exact", **kw))  # grids from the cache
    gain_again, warm_gain = _timed(lambda: scan(model, x, estimate="gain", **kw))
    # determinism: two identical scans give bit-identical tables (the cold exact scans; the
    # gain scans with fitted and with cached grids, which are the same grids)
    identical = {"exact": bool(np.array_equal(first.sqnr_array("model"), exact.sqnr_array("model"))),
                 "gain": bool(np.array_equal(gain.sqnr_array("model"), gain_again.sqnr_array("model")))}
    t = {k: statistics.median(v) for k, v in times.items()}
    speed = {k: statistics.median(n / e for n, e in zip(times["naive"], times[k], strict=True))
             for k in ("exact", "gain")}
    diff = max(abs(exact.sqnr_db(n, b) - naive[n, b]) for n, b in naive)
    err = np.abs(gain.sqnr_array("model") - exact.sqnr_array("model"))
    med = {b: float(np.median(err[:, j])) for j, b in enumerate(BITS)}
    rows.append((f"{key}: naive loop, same grids", f"{t['naive']:.2f} s", "1.00x", desc))
    rows.append((f"{key}: scan exact", f"{t['exact']:.2f} s", f"{speed['exact']:.2f}x",
                 f"max |exact - naive| {diff:.1e} dB; grids cached: {warm_exact:.2f} s "
                 f"({t['naive'] / warm_exact:.2f}x)"))
    rows.append((f"{key}: scan estimate='gain'", f"{t['gain']:.2f} s", f"{speed['gain']:.2f}x",
                 f"grids cached: {warm_gain:.2f} s ({t['naive'] / warm_gain:.2f}x); median error "
                 + " ".join(f"{b}b {v:.2f}" for b, v in med.items()) + " dB; two scans identical: "
                 + ", ".join(k for k, v in identical.items() if v)))
    out["model_scope"][key] = {
        "description": desc, "run": time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime()),
        "load_average": os.getloadavg()[0], "layers": len(exact.layers), "bits": list(BITS), "rounds": rounds,
        "seconds": t, "speedup_vs_naive": speed, "cached_grids_seconds": {"exact": warm_exact, "gain": warm_gain},
        "max_abs_diff_exact_vs_naive_db": diff, "gain_median_error_db": med, "identical_tables": identical,
        "gain_worst_error_db": {b: float(err[:, j].max()) for j, b in enumerate(BITS)},
        "model_pass": sorted({exact.model_pass(n) for n in exact.layers}), "notes": list(exact.notes)}


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


def main(names, extras: bool) -> None:
    torch.set_num_threads(1)
    with torch.no_grad():
        rows, out = [], {}
        bench_model_scope(rows, out, names)
        if extras:
            bench_memory(rows, out)
            bench_fitting_and_threads(rows, out)
    w = max(len(r[0]) for r in rows)
    for r in rows:
        print(f"{r[0]:<{w}}  {r[1]:>16}  {r[2]:>14}  {r[3]}")
    RESULTS.parent.mkdir(exist_ok=True)
    # the models not run this time keep their last figures (each entry says when it was run)
    before = json.loads(RESULTS.read_text()) if RESULTS.exists() else {}
    merged = {**before, **out, "model_scope": {**before.get("model_scope", {}), **out.get("model_scope", {})}}
    RESULTS.write_text(json.dumps(merged, indent=2, default=str) + "\n")
    print(f"wrote {RESULTS}")


if __name__ == "__main__":
    if len(sys.argv) == 4 and sys.argv[1] == "--peak":
        _child_peak(int(sys.argv[2]), sys.argv[3])
    else:
        chosen = [a for a in sys.argv[1:] if not a.startswith("--")] or list(model_cases())
        main(chosen, "--no-extras" not in sys.argv)
