"""Speed of block grids against per-channel grids, measured in the same run (ratios).

Run:  .venv/bin/python benchmarks/bench_blocks.py [--quick]
      (prints a table, writes benchmarks/results/blocks.json)

- quantize on a 4096 x 4096 weight: one scale per block of 128 along the input axis versus
  one per output channel (target: within 2 x);
- fit_range("mse") per block of 128 versus per channel, 1024 x 1024 (target: within 3 x);
- scan of a small MLP with granularity=("channel", 32) versus ("channel",) (target: within 2 x).
Interleaved pairs, median of the per-pair ratios (benchmarks/_timing.py), one torch thread.
"""

from __future__ import annotations

import argparse
import json
import platform
from pathlib import Path

import _timing  # benchmarks/_timing.py, beside this script
import torch
from torch import nn

from qwidgets import fit_range, quantize, scan

RESULTS = Path(__file__).parent / "results" / "blocks.json"


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="fewer repeats")
    args = ap.parse_args()
    torch.set_num_threads(1)
    rep = 3 if args.quick else 7
    gen = torch.Generator().manual_seed(0)
    rows = []

    w = torch.randn(4096, 4096, generator=gen)
    chan, block = fit_range(w, 4, "minmax", axis=0), fit_range(w, 4, "minmax", axis=1, block_size=128)
    tb, to, r = _timing.timed_pair(lambda: quantize(w, chan), lambda: quantize(w, block), rep)
    rows.append(("quantize 4096x4096, block 128 vs per channel", tb, to, r, 2.0))

    v = torch.randn(1024, 1024, generator=gen)
    tb, to, r = _timing.timed_pair(lambda: fit_range(v, 4, "mse", axis=0),
                                   lambda: fit_range(v, 4, "mse", axis=1, block_size=128), max(3, rep // 2))
    rows.append(("fit_range mse 1024x1024, block 128 vs per channel", tb, to, r, 3.0))

    torch.manual_seed(0)
    net = nn.Sequential(nn.Linear(256, 256), nn.ReLU(), nn.Linear(256, 256), nn.ReLU(), nn.Linear(256, 10))
    x = torch.randn(256, 256, generator=gen)
    tb, to, r = _timing.timed_pair(lambda: scan(net, x, bits=(3, 4, 8), progress=False),
                                   lambda: scan(net, x, bits=(3, 4, 8), progress=False,
                                                granularity=("channel", 32)), 3)
    rows.append(("scan MLP 256-256-256-10, two granularities vs one", tb, to, r, 2.0))

    print(f"{'case':58s} {'base s':>9s} {'ours s':>9s} {'ratio':>7s} {'target':>7s}")
    for name, b, o, ratio, target in rows:
        print(f"{name:58s} {b:9.4f} {o:9.4f} {ratio:7.2f} {'<=' + str(target):>7s}")
    RESULTS.parent.mkdir(exist_ok=True)
    RESULTS.write_text(json.dumps({
        "machine": platform.processor() or platform.machine(), "threads": 1,
        "rows": [{"case": n, "base_s": b, "ours_s": o, "ratio": ratio, "target": t}
                 for n, b, o, ratio, t in rows]}, indent=1) + "\n")


if __name__ == "__main__":
    main()
