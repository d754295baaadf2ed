"""Speed of probing: capture_inputs against a plain forward, and the batched MSE range search.

Run:  .venv/bin/python benchmarks/bench_probe.py   (prints a table, writes results/probe.json)

Every figure is compared with a baseline measured in the same run, as a ratio:
- capture_inputs versus a plain ``model(x)`` under no_grad (it should cost about one forward);
- fit_range("mse", axis=0) on a 1024 x 1024 weight at 4 bits versus the same search run as a
  Python loop over the channels (one fit_range call per row): the ratio shows the search is
  vectorised across channels.
"""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

import _timing  # benchmarks/_timing.py, beside this script
import torch
from torch import nn

from qwidgets import capture_inputs, fit_range

RESULTS = Path(__file__).parent / "results" / "probe.json"


def timed(fn, repeat: int = 5, warmup: int = 1) -> float:
    return _timing.timed(fn, repeat, warmup)


def timed_pair(base, other, repeat: int = 9) -> tuple[float, float, float]:
    return _timing.timed_pair(base, other, repeat)


def small_cnn() -> nn.Module:
    return nn.Sequential(
        nn.Conv2d(3, 32, 3, padding=1), nn.BatchNorm2d(32), nn.ReLU(),
        nn.Conv2d(32, 64, 3, padding=1, stride=2), nn.BatchNorm2d(64), nn.ReLU(),
        nn.Conv2d(64, 64, 3, padding=1, stride=2), nn.BatchNorm2d(64), nn.ReLU(),
        nn.Flatten(), nn.Linear(64 * 8 * 8, 128), nn.ReLU(), nn.Linear(128, 10),
    ).eval()


def mlp() -> nn.Module:
    return nn.Sequential(nn.Linear(512, 1024), nn.ReLU(), nn.Linear(1024, 1024), nn.ReLU(),
                         nn.Linear(1024, 10)).eval()


def bench_capture(rows: list, out: dict) -> None:
    torch.manual_seed(0)
    for name, model, x in (("cnn 64x3x32x32", small_cnn(), torch.randn(64, 3, 32, 32)),
                           ("mlp 256x512", mlp(), torch.randn(256, 512))):
        def plain(model=model, x=x):
            with torch.no_grad():
                model(x)

        t_plain, t_cap, ratio = timed_pair(plain, lambda model=model, x=x: capture_inputs(model, x))
        rows.append((f"capture_inputs, {name}", t_cap, f"{ratio:.2f}x plain forward ({t_plain * 1e3:.1f} ms)"))
        out[f"capture_{name.split()[0]}"] = {"plain_s": t_plain, "capture_s": t_cap, "ratio": ratio}


def bench_mse(rows: list, out: dict, loop_rows: int) -> None:
    w = torch.randn(1024, 1024, generator=torch.Generator().manual_seed(0))
    w *= torch.logspace(-1, 0.5, 1024)[:, None]  # channels of different spread
    t_vec = timed(lambda: fit_range(w, 4, "mse", axis=0), repeat=3)
    sub = w[:loop_rows]
    t0 = time.perf_counter()
    for row in sub:  # the same search, one channel at a time
        fit_range(row, 4, "mse", signed=True)
    t_loop = (time.perf_counter() - t0) * (w.shape[0] / loop_rows)
    note = "" if loop_rows == w.shape[0] else f" (timed on {loop_rows} rows, scaled to 1024)"
    rows.append(("fit_range mse per-channel 1024x1024, 4 bits", t_vec, "batched over channels"))
    rows.append(("  same search, Python loop per channel", t_loop, f"{t_loop / t_vec:.1f}x slower{note}"))
    t_asym = timed(lambda: fit_range(w, 4, "mse", axis=0, symmetric=False), repeat=1)
    rows.append(("fit_range mse per-channel asymmetric", t_asym, f"{t_asym / t_vec:.1f}x symmetric"))
    x = torch.randn(1_000_000, generator=torch.Generator().manual_seed(1))
    t_tensor = timed(lambda: fit_range(x, 4, "mse"), repeat=3)
    t_minmax = timed(lambda: fit_range(x, 4, "minmax"), repeat=3)
    rows.append(("fit_range mse per-tensor, 1M values, 4 bits", t_tensor, f"{t_tensor / t_minmax:.1f}x minmax"))
    out["mse_per_channel_1024x1024_4bit"] = {
        "vectorised_s": t_vec, "python_loop_s": t_loop, "loop_rows_timed": loop_rows,
        "loop_over_vectorised": t_loop / t_vec, "asymmetric_s": t_asym,
    }
    out["mse_per_tensor_1M_4bit"] = {"mse_s": t_tensor, "minmax_s": t_minmax, "ratio": t_tensor / t_minmax}


def main(argv: list[str]) -> None:
    loop_rows = 1024 if "--full" in argv else 256
    rows: list = []
    out: dict = {"torch": torch.__version__, "threads": torch.get_num_threads()}
    bench_capture(rows, out)
    bench_mse(rows, out, loop_rows)
    width = max(len(r[0]) for r in rows)
    print(f"{'case':<{width}}  {'time':>10}  note")
    for name, t, note in rows:
        print(f"{name:<{width}}  {t * 1e3:8.1f} ms  {note}")
    RESULTS.parent.mkdir(parents=True, exist_ok=True)
    RESULTS.write_text(json.dumps(out, indent=2) + "\n")
    print(f"wrote {RESULTS}")


if __name__ == "__main__":
    main(sys.argv[1:])
