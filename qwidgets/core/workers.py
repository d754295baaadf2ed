"""Fitting work spread over Python threads, each on one torch thread.

torch releases the interpreter's lock inside its operations, so two threads that each run one
search fit on two cores at once; unlike a second intra-op thread, a thread whose core another
process holds only waits its turn (no spinning barrier). Every unit's result is the one it gives
on its own thread alone, so results do not depend on the number of workers.

:func:`run_units` runs independent units (the groups of a model's weights); a search over the
row chunks of one large tensor maps its chunks with :func:`map_chunks`, on the workers that
:func:`chunk_workers` set for the calling thread (a worker's own searches run in order: no
pool waits on itself).
"""

from __future__ import annotations

import contextlib
import contextvars
import ctypes
from collections.abc import Callable, Sequence
from concurrent.futures import ThreadPoolExecutor

import torch

from .checks import check_int

__all__ = ["run_units", "map_chunks", "chunk_workers"]

_CHUNK_WORKERS: contextvars.ContextVar[int] = contextvars.ContextVar("qwidgets_chunk_workers", default=1)


def run_units(units: Sequence[tuple[int, Callable[[], object]]], workers: int) -> list:
    """The results of ``(size, call)`` units, in order: run in order on this thread for one
    worker, else the largest first on ``workers`` threads; the first error is raised."""
    workers = check_int(workers, "workers", minimum=1)
    if workers == 1 or len(units) < 2:
        return [call() for _, call in units]
    before = torch.get_num_threads()

    def one(call):
        torch.set_num_threads(1)  # one intra-op thread in this worker
        return call()

    order = sorted(range(len(units)), key=lambda k: -units[k][0])
    out: list = [None] * len(units)
    _trim()  # what this thread freed before: the workers' heaps cannot reuse it
    try:
        with ThreadPoolExecutor(max_workers=min(workers, len(units)), thread_name_prefix="qwidgets-fit") as pool:
            futures = {k: pool.submit(one, units[k][1]) for k in order}
            for k in order:
                out[k] = futures[k].result()
    finally:
        torch.set_num_threads(before)
        _trim()
    return out


def _trim() -> None:
    """Hand freed memory back to the system (glibc keeps a heap per thread: what the main thread
    freed is not reused by the workers, nor what they freed by the passes after them). No-op
    where the C library has no ``malloc_trim``."""
    try:
        ctypes.CDLL(None).malloc_trim(0)
    except (OSError, AttributeError):  # not glibc
        pass


def map_chunks(fn: Callable, chunks: Sequence) -> list:
    """``[fn(c) for c in chunks]``, on the workers :func:`chunk_workers` set for this thread."""
    return run_units([(0, lambda c=c: fn(c)) for c in chunks], _CHUNK_WORKERS.get())


@contextlib.contextmanager
def chunk_workers(workers: int):
    """Searches over row chunks in the block map their chunks on ``workers`` threads."""
    token = _CHUNK_WORKERS.set(check_int(workers, "workers", minimum=1))
    try:
        yield
    finally:
        _CHUNK_WORKERS.reset(token)
