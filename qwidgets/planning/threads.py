"""How many torch threads each kind of scan work runs with: chosen from the machine and the model.

Nothing here depends on timing, so the same scan on the same machine gives the same table (the
thread count can change a kernel's float rounding, and the exact model scope's replay must
reproduce the float model bit for bit on the passes' threads).

- Fitting ranges is many small tensor operations (one per candidate grid): a second thread only
  adds hand-offs and, when another process holds a core, stalls (measured 3-25x slower on two
  shared cores), so fitting runs on one torch thread; a scan whose passes run on more threads
  fits that many weights at once instead, one per Python thread (``core/fit_groups.py``: the
  same grids).
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

# kind of work -> thread count (None: chosen by pass_threads from the machine and the model)
THREADS: dict[str, int | None] = {"fit": 1, "passes": None}
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
