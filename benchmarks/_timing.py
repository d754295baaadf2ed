"""Timing helpers shared by the benchmark scripts (medians, interleaved pairs, memory marks)."""

from __future__ import annotations

import statistics
import time


def timed(fn, repeat: int = 7, warmup: int = 1) -> float:
    """Median wall time of ``fn()`` in seconds."""
    for _ in range(warmup):
        fn()
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def timed_pair(base, other, repeat: int = 11) -> tuple[float, float, float]:
    """Interleaved timings: (median base s, median other s, median of per-pair ratios other/base).

    Alternating the two and taking the median of per-pair ratios keeps the comparison fair on
    a busy machine, where load drifts between separate timing loops.
    """
    base(), other()
    tb, to, ratios = [], [], []
    for _ in range(repeat):
        t0 = time.perf_counter()
        base()
        t1 = time.perf_counter()
        other()
        t2 = time.perf_counter()
        tb.append(t1 - t0)
        to.append(t2 - t1)
        ratios.append((t2 - t1) / (t1 - t0))
    return statistics.median(tb), statistics.median(to), statistics.median(ratios)


def status_kib(key: str) -> int:
    """A ``/proc/self/status`` field in KiB (Linux): ``VmRSS`` now, ``VmHWM`` the peak mark."""
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith(key + ":"):
                return int(line.split()[1])
    raise OSError(f"{key} not in /proc/self/status")
