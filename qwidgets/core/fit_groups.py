"""Fitting the grids of many tensors at once: searches of one row length run as one, and the
work spread over worker threads (:mod:`qwidgets.core.workers`: the same grids on any number).

:func:`fit_together` is what a scan fits a model's weights with. Its units are a group of
small tensors searched as one (at most :data:`GROUP_VALUES` values) or one tensor searched
alone; they run on the workers side by side. A tensor whose search runs in several chunks of
rows (:func:`qwidgets.core.clip_search.row_chunks`: a language model's embedding) is fitted
after them, its chunks on the workers.
"""

from __future__ import annotations

from collections.abc import Sequence

from . import clip_search
from .checks import check_int
from .grid import UniformGrid
from .ranges import RangeFitter, search_group
from .workers import chunk_workers, run_units

__all__ = ["GROUP_VALUES", "fit_together"]

GROUP_VALUES = 1 << 22  # values searched together at most (bounds the sorted copy's memory)


def fit_together(fitters: Sequence[RangeFitter], bits: Sequence[int], *, workers: int = 1,
                 release: bool = False) -> list[list[UniformGrid]]:
    """``[f.fit_many(bits) for f in fitters]``: the MSE searches of fitters with the same
    :meth:`~qwidgets.core.ranges.RangeFitter.group_key` run as one search over all their rows.

    The grids are the same (each row's search reads its own row only: candidates, errors and
    the golden-section steps are per row, and the sweep's pruning skips only candidates that
    cannot win any row), in far fewer tensor operations for a model's many small weights.

    ``workers``: threads the work runs on (see the module docstring; the grids do not depend
    on it). ``release``: a fitter of :data:`GROUP_VALUES` values or more, searched alone, lets
    its copies go once its grids are made (:meth:`~qwidgets.core.ranges.RangeFitter.release`:
    the sorted copy and prefix sums, 20 bytes a value, and the float32 copy of a half-precision
    weight), so a large model's weights are not all held at once (at most one per worker).

    >>> import torch
    >>> a, b = torch.randn(4, 50), torch.randn(7, 50)
    >>> together = fit_together([RangeFitter(a, axis=0), RangeFitter(b, axis=0)], (3, 6))
    >>> torch.equal(together[1][0].scale, RangeFitter(b, axis=0).fit(3).scale)
    True
    """
    workers = check_int(workers, "workers", minimum=1)
    out: list = [None] * len(fitters)
    units: list = []  # (values, the fitters' indices)
    chunked: list = []  # fitters whose search runs in row chunks: one at a time, chunks on the workers
    groups: dict = {}
    for i, f in enumerate(fitters):
        key = f.group_key()
        if key is not None and f.x.numel() > clip_search.ROW_CHUNK_VALUES:
            chunked.append(i)
        elif key is None or f.x.numel() >= GROUP_VALUES:  # searched alone
            units.append((f.x.numel(), [i]))
        else:
            groups.setdefault(key, []).append(i)
    for members in groups.values():
        chunk, size = [], 0
        for i in members + [None]:
            n = 0 if i is None else fitters[i].x.numel()
            if chunk and (i is None or size + n > GROUP_VALUES):
                units.append((size, chunk))
                chunk, size = [], 0
            if i is not None:
                chunk.append(i)
                size += n

    def unit(chunk: list) -> None:
        group = [fitters[j] for j in chunk]
        for j, grids in zip(chunk, search_group(group, bits), strict=True):
            out[j] = grids
        if release and len(group) == 1 and group[0].x.numel() >= GROUP_VALUES:
            group[0].release()

    run_units([(size, lambda c=chunk: unit(c)) for size, chunk in units], workers)
    with chunk_workers(workers):
        for i in chunked:
            unit([i])
    return out
