"""A large MSE search runs in chunks of rows with the grids of one search over all rows.

Outside check: the grids of the same search with the chunking switched off (one sorted copy
of every row), compared with ``torch.equal``: each row's search reads its own row only, so
the chunks cannot change a grid (not a tolerance: the same float operations per row).
"""

from __future__ import annotations

import gc
import weakref

import pytest
import torch

from qwidgets.core import clip_search, ranges
from qwidgets.core.grid_cache import GridCache
from qwidgets.core.ranges import fit_ranges
from qwidgets.model.entries import find_entries
from qwidgets.planning import granularity


@pytest.mark.parametrize("symmetric", [True, False])
def test_row_chunks_give_the_grids_of_one_search(monkeypatch, symmetric):
    g = torch.Generator().manual_seed(3)
    # rows of different spreads and one heavy tail, so rows prune different sweep candidates
    w = torch.randn(300, 96, generator=g) * torch.logspace(-2, 0, 300)[:, None]
    w[7, 5] = 40.0
    if not symmetric:
        w = w.abs() + 0.1 * torch.randn(300, 96, generator=g)
    whole = fit_ranges(w, (2, 4, 8), "mse", axis=0, symmetric=symmetric)
    monkeypatch.setattr(clip_search, "ROW_CHUNK_VALUES", 96 * 37)  # 37 rows a chunk, 9 chunks
    assert len(clip_search.row_chunks(w)) == 9
    chunked = fit_ranges(w, (2, 4, 8), "mse", axis=0, symmetric=symmetric)
    for a, b in zip(whole, chunked, strict=True):
        assert torch.equal(a.scale, b.scale) and torch.equal(a.offset_tensor(), b.offset_tensor())


def test_weights_fitted_alone_keep_their_grids_and_drop_their_sorted_copies(monkeypatch):
    """fit_options fits a weight of GROUP_VALUES values or more on its own and lets its fitter
    (with the sorted copy) go before the next; the grids equal those of one call for all weights
    (outside check: the same function with the threshold above every weight, torch.equal)."""
    model = torch.nn.Sequential(torch.nn.Linear(64, 96), torch.nn.Linear(96, 64), torch.nn.Linear(64, 8))
    torch.manual_seed(0)
    entries = find_entries(model)
    weights = [(e.parameter(model).detach(), e, None) for e in entries]
    real_fit = granularity.fit_cached_together
    monkeypatch.setattr(granularity, "fit_cached_together", lambda f, b: real_fit(f, b, GridCache()))
    together = granularity.fit_options(weights, ("channel",), (2, 4, 8), "mse", None, [])

    alive, held = [], []
    real_init = ranges.RangeFitter.__init__

    def tracking_init(self, *a, **k):
        real_init(self, *a, **k)
        alive.append(weakref.ref(self))

    def counting(f, b):  # large fitters still holding a sorted copy when a fit starts
        gc.collect()
        held.append(sum(r() is not None and r()._parts[0].rows is not None and r().x.numel() >= 64 * 96
                        for r in alive))
        return real_fit(f, b, GridCache())

    monkeypatch.setattr(ranges.RangeFitter, "__init__", tracking_init)
    monkeypatch.setattr(granularity, "GROUP_VALUES", 64 * 96)  # the first two weights go alone
    monkeypatch.setattr(granularity, "fit_cached_together", counting)
    alone = granularity.fit_options(weights, ("channel",), (2, 4, 8), "mse", None, [])
    assert held == [0, 0, 0]
    for e in entries:
        for a, b in zip(together[e.name][0], alone[e.name][0], strict=True):
            assert torch.equal(a.scale, b.scale) and torch.equal(a.offset_tensor(), b.offset_tensor())
