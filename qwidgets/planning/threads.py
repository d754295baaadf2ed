"""How many torch threads each kind of scan work runs with (measured; see the README).

Fitting ranges is many small tensor operations (one per candidate grid): a second thread only
adds hand-offs and, when another process holds a core, stalls (measured 3-25x slower on two
shared cores), so fitting runs on one thread. The passes are large convolutions and matrix
products, where more threads help on free cores and hurt badly on busy ones (measured on two
cores with other processes running: a small residual net's scan 1.1 s on one thread, 17 s on
two). That depends on the moment, so the scan measures it: ``fastest_threads`` runs the first
float forward once on one thread and once on torch's setting and keeps the faster for the
passes (one extra forward per scan).
"""

from __future__ import annotations

import contextlib
import time

import torch

# kind of work -> thread count (None: torch's current setting; the passes pick theirs by
# fastest_threads)
THREADS: dict[str, int | None] = {"fit": 1, "passes": None}


@contextlib.contextmanager
def torch_threads(kind: str):
    """Run the block with the thread count chosen for ``kind``; torch's setting restored after.

    >>> import torch
    >>> before = torch.get_num_threads()
    >>> with torch_threads("fit"):
    ...     torch.get_num_threads()
    1
    >>> torch.get_num_threads() == before
    True
    """
    if kind not in THREADS:
        raise ValueError(f"kind must be one of {', '.join(map(repr, THREADS))}, got {kind!r}")
    n = THREADS[kind]
    if n is None:
        yield
        return
    with threads(n):
        yield


def fastest_threads(run) -> int:
    """The faster of one thread and torch's current setting for ``run()`` (called twice).

    >>> fastest_threads(lambda: torch.ones(8).sum()) >= 1
    True
    """
    default = torch.get_num_threads()
    if default == 1:
        return 1
    times = {}
    for n in (default, 1):
        with threads(n):
            t0 = time.perf_counter()
            run()
            times[n] = time.perf_counter() - t0
    return min(times, key=times.get)


@contextlib.contextmanager
def threads(n: int | None):
    """torch on ``n`` intra-op threads for the block (None: unchanged), its setting restored
    after. (The widgets use it too: an update is many cache-sized slices, which a second thread
    hardly speeds up on an idle machine and stalls several-fold when another process holds the
    other core.)

    >>> before = torch.get_num_threads()
    >>> with threads(1):
    ...     torch.get_num_threads()
    1
    >>> torch.get_num_threads() == before
    True
    """
    before = torch.get_num_threads()
    if n is None or n == before:
        yield
        return
    torch.set_num_threads(n)
    try:
        yield
    finally:
        torch.set_num_threads(before)
