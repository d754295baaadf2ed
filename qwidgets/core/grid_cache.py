"""Fitted grids kept in this process: a weight's grids are fitted once for scans, planner and explorer.

Fitting is the slow part of a scan at the default ``method="mse"``; the same weight is fitted
again by the next scan of the model, by the planner's scans and by the explorer. The cache keys
a grid by the tensor's digest (its values, dtype and shape) and every option that shapes it
(bit width, granularity, method, signedness, symmetry, style, percentile, device rules, the
search's sample cap); a hit returns the grid fitted before, a miss fits the missing widths
together (:meth:`RangeFitter.fit_many`). Grids are small next to their weights (one scale and
offset per channel); the cache holds at most :attr:`GridCache.max_bytes` of them, the least
recently used dropped first.

>>> import torch
>>> from qwidgets.core.ranges import RangeFitter
>>> w = torch.randn(16, 64, generator=torch.Generator().manual_seed(0))
>>> first = fit_cached(RangeFitter(w, "mse", axis=0), (4, 8))
>>> again = fit_cached(RangeFitter(w.clone(), "mse", axis=0), (8,))   # same values: no refit
>>> again[0] is first[1]
True
"""

from __future__ import annotations

import hashlib
import threading
from collections import OrderedDict
from collections.abc import Sequence

import torch

from . import clip_search
from .fit_groups import fit_together
from .grid import UniformGrid
from .ranges import RangeFitter

__all__ = ["GridCache", "GRID_CACHE", "fit_cached", "fit_cached_together", "tensor_digest"]


def tensor_digest(t: torch.Tensor) -> str:
    """A digest of a tensor's values, dtype and shape (BLAKE2b, 128 bits).

    >>> tensor_digest(torch.zeros(3)) == tensor_digest(torch.zeros(3)) != tensor_digest(torch.zeros(4))
    True
    """
    t = t.detach().to("cpu").contiguous()
    h = hashlib.blake2b(f"{t.dtype}:{tuple(t.shape)}:".encode(), digest_size=16)
    h.update(t.reshape(-1).view(torch.uint8).numpy())
    return h.hexdigest()


class GridCache:
    """Grids by (tensor digest, bit width, fitting options), least recently used dropped first.

    ``hits`` / ``misses`` count widths served and widths fitted.
    """

    def __init__(self, max_bytes: int = 64 << 20):
        self.max_bytes = int(max_bytes)
        self._grids: OrderedDict = OrderedDict()
        self._bytes = 0
        self._lock = threading.Lock()
        self.hits = self.misses = 0

    def clear(self) -> None:
        """Drop every grid (and reset the counts)."""
        with self._lock:
            self._grids.clear()
            self._bytes = 0
            self.hits = self.misses = 0

    def __len__(self) -> int:
        return len(self._grids)

    def get(self, key):
        with self._lock:
            g = self._grids.get(key)
            if g is not None:
                self._grids.move_to_end(key)
            return g

    def put(self, key, grid: UniformGrid) -> None:
        size = _grid_bytes(grid)
        with self._lock:
            if key in self._grids or size > self.max_bytes:
                return
            self._grids[key] = grid
            self._bytes += size
            while self._bytes > self.max_bytes:
                _, old = self._grids.popitem(last=False)
                self._bytes -= _grid_bytes(old)


GRID_CACHE = GridCache()  # the process's cache


def fit_cached(fitter: RangeFitter, bits: Sequence[int], cache: GridCache | None = None) -> list[UniformGrid]:
    """``fitter.fit_many(bits)``, with each width's grid taken from ``cache`` when it was fitted
    before to the same values with the same options (default: the process's cache)."""
    return fit_cached_together([fitter], bits, cache)[0]


def fit_cached_together(fitters: Sequence[RangeFitter], bits: Sequence[int],
                        cache: GridCache | None = None, *, workers: int = 1,
                        release: bool = False) -> list[list[UniformGrid]]:
    """``[fit_cached(f, bits) for f in fitters]``; the widths missing from the cache are fitted
    together (:func:`qwidgets.core.fit_groups.fit_together`: the same grids, one search for the
    fitters of a model's weights that share a row length and options; ``workers`` and
    ``release`` are passed to it)."""
    cache = GRID_CACHE if cache is None else cache
    bases = [(_digest(f), f.options_key(), clip_search.SEARCH_CAP) for f in fitters]
    out = [[cache.get(base + (int(b),)) for b in bits] for base in bases]
    todo: dict = {}  # the widths to fit -> the fitters missing them
    for i, grids in enumerate(out):
        missing = tuple(b for b, g in zip(bits, grids, strict=True) if g is None)
        cache.hits += len(bits) - len(missing)
        cache.misses += len(missing)
        if missing:
            todo.setdefault(missing, []).append(i)
    for missing, members in todo.items():
        fitted_all = fit_together([fitters[i] for i in members], missing, workers=workers, release=release)
        for i, grids in zip(members, fitted_all, strict=True):
            fitted = dict(zip(missing, grids, strict=True))
            for b, g in fitted.items():
                cache.put(bases[i] + (int(b),), g)
            out[i] = [fitted[b] if g is None else g for b, g in zip(bits, out[i], strict=True)]
    return out


def _digest(fitter: RangeFitter) -> str:
    if fitter.digest is None:
        fitter.digest = tensor_digest(fitter.x)
    return fitter.digest


def _grid_bytes(g: UniformGrid) -> int:
    return 2 * 4 * (g.scale_tensor().numel()) + 256  # scale and offset, float32, and the object
