"""How many torch threads each kind of scan work runs with: chosen from the machine and the model.

Nothing here depends on timing, so the same scan on the same machine gives the same table (the
thread count can change a kernel's float rounding, and the exact model scope's replay must
reproduce the float model bit for bit on the passes' threads).

- Fitting ranges is many small tensor operations (one per candidate grid): a second thread only
  adds hand-offs and, when another process holds a core, stalls (measured 3-25x slower on two
  shared cores), so fitting runs on one torch thread. :func:`set_fit_workers` lets a scan fit
  several weight groups at once instead, one per Python thread (``core/fit_groups.py``: the
  same grids). Not the default: glibc gives each thread its own heap, and what the passes
  allocate afterwards does not reuse what the workers freed (measured on the 124M decoder's gain
  scan: fitting 24 s -> 16 s on two idle cores, the scan 83 s -> 76 s, but 1.1 -> 1.4-1.7 GiB
  peak resident over the model).
- The passes run on torch's thread count (``torch.get_num_threads()``: the machine's cores
  unless the user set it), except for models under :data:`SMALL_MODEL_PARAMS` parameters, whose
  layers are too small to split (measured on two cores: a small residual net's scan 1.1 s on
  one thread, 17 s on two while another process held a core).
- :func:`set_scan_threads` overrides the passes' count for every later scan.
"""

from __future__ import annotations

import contextlib
from numbers import Integral

import torch
from torch import nn

from ..core.checks import check_int

# kind of work -> thread count (None: chosen by pass_threads from the machine and the model)
THREADS: dict[str, int | None] = {"fit": 1, "passes": None}
FIT_WORKERS = {"workers": 1}  # weight groups fitted at once (set_fit_workers)
SMALL_MODEL_PARAMS = 1 << 20  # below this many parameters the passes run on one thread


def set_scan_threads(passes: int | None) -> None:
    """Run the passes of every later scan on ``passes`` torch threads (None: the default rule).

    >>> set_scan_threads(1); pass_threads(torch.nn.Linear(4, 4))
    1
    >>> set_scan_threads(None)
    """
    if passes is not None and (isinstance(passes, bool) or not isinstance(passes, Integral) or passes < 1):
        raise ValueError(f"passes must be None or an int >= 1, got {passes!r}")
    THREADS["passes"] = None if passes is None else int(passes)


def set_fit_workers(workers: int = 1) -> None:
    """Fit ``workers`` weight groups at once in every later scan, each on its own Python thread
    with one torch thread (the same grids; faster on idle cores, more peak memory: see the
    module docstring).

    >>> set_fit_workers(2); fit_workers()
    2
    >>> set_fit_workers()
    """
    FIT_WORKERS["workers"] = check_int(workers, "workers", minimum=1)


def fit_workers() -> int:
    """The number of weight groups a scan fits at once (:func:`set_fit_workers`; default 1)."""
    return FIT_WORKERS["workers"]


def pass_threads(model: nn.Module) -> int:
    """The thread count of a scan's passes over ``model`` (see the module docstring).

    >>> pass_threads(torch.nn.Linear(4, 4))
    1
    """
    if THREADS["passes"] is not None:
        return THREADS["passes"]
    n_params = sum(p.numel() for p in model.parameters())
    return 1 if n_params < SMALL_MODEL_PARAMS else torch.get_num_threads()


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
