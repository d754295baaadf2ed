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

from qwidgets.core import clip_search, fit_groups, grid_cache, ranges
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


def _weights():
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(64, 96), torch.nn.Linear(96, 64), torch.nn.Linear(64, 8))
    return [(e.parameter(model).detach(), e, None) for e in find_entries(model)]


def _fitted_alone_and_held(monkeypatch, workers):
    """fit_options' grids with the first two weights searched alone, and per search begun the
    number of other large fitters still holding their sorted copy."""
    weights = _weights()
    alive, held = [], []
    real_init, real_group = ranges.RangeFitter.__init__, fit_groups.search_group

    def tracking_init(self, *a, **k):
        real_init(self, *a, **k)
        alive.append(weakref.ref(self))

    def counting(group, bits):  # large fitters still holding a sorted copy when a search starts
        gc.collect()
        held.append(sum(r() is not None and r() not in group and r()._parts is not None
                        and r()._parts[0].rows is not None
                        and r().x.numel() >= 64 * 96 for r in alive))
        return real_group(group, bits)

    monkeypatch.setattr(ranges.RangeFitter, "__init__", tracking_init)
    monkeypatch.setattr(fit_groups, "GROUP_VALUES", 64 * 96)  # the first two weights go alone
    monkeypatch.setattr(fit_groups, "search_group", counting)
    monkeypatch.setattr(granularity, "fit_cached_together",
                        lambda f, b, **k: grid_cache.fit_cached_together(f, b, GridCache(), **k))
    out = granularity.fit_options(weights, ("channel",), (2, 4, 8), "mse", None, [], workers=workers)
    monkeypatch.undo()
    return out, held


@pytest.mark.parametrize("workers", [1, 2])
def test_weights_fitted_alone_keep_their_grids_and_drop_their_sorted_copies(monkeypatch, workers):
    """fit_options searches a weight of GROUP_VALUES values or more on its own and lets its
    sorted copy go once fitted (at most one per worker held at a time); the grids equal those of
    one search for all weights on one thread (outside check: the same function with the
    threshold above every weight, torch.equal)."""
    alone, held = _fitted_alone_and_held(monkeypatch, workers)
    assert len(held) == 3 and max(held) <= workers - 1
    weights = _weights()
    monkeypatch.setattr(granularity, "fit_cached_together",
                        lambda f, b, **k: grid_cache.fit_cached_together(f, b, GridCache()))
    together = granularity.fit_options(weights, ("channel",), (2, 4, 8), "mse", None, [])
    for _, e, _ in weights:
        for a, b in zip(together[e.name][0], alone[e.name][0], strict=True):
            assert torch.equal(a.scale, b.scale) and torch.equal(a.offset_tensor(), b.offset_tensor())


def test_a_scan_with_fit_workers_gives_the_same_table():
    """set_fit_workers(2): the same grids and SQNR table, bit for bit, as the default one worker
    (outside check: the same scan run twice, torch.equal / numpy equality)."""
    import numpy as np

    from qwidgets.core.grid_cache import GRID_CACHE
    from qwidgets.planning.scanning import scan
    from qwidgets.planning.threads import fit_workers, set_fit_workers

    torch.manual_seed(1)
    model = torch.nn.Sequential(torch.nn.Linear(40, 64), torch.nn.ReLU(), torch.nn.Linear(64, 48),
                                torch.nn.ReLU(), torch.nn.Linear(48, 10))
    x = torch.randn(16, 40)
    GRID_CACHE.clear()
    one = scan(model, x, bits=(2, 4, 8), progress=False)
    set_fit_workers(2)
    try:
        assert fit_workers() == 2
        GRID_CACHE.clear()
        two = scan(model, x, bits=(2, 4, 8), progress=False)
    finally:
        set_fit_workers()
    assert np.array_equal(one.sqnr_array("layer"), two.sqnr_array("layer"))
    for name in one.layers:
        for b in (2, 4, 8):
            a, c = one.weight_grid(name, b), two.weight_grid(name, b)
            assert torch.equal(a.scale_tensor(), c.scale_tensor())
    with pytest.raises(ValueError, match="workers"):
        set_fit_workers(0)


def test_a_released_fitter_refuses_to_fit():
    f = ranges.RangeFitter(torch.randn(8, 16, dtype=torch.bfloat16), axis=0)
    f.fit_many((4,))
    f.release()
    with pytest.raises(RuntimeError, match="released"):
        f.fit(4)


def test_the_moved_names_still_work_from_their_old_module_and_warn():
    """CHANGELOG.md's rule for a moved public name: the old spelling gives what the new one
    gives and warns (DeprecationWarning naming the new place)."""
    from qwidgets.core import renamed

    renamed._warned.discard(("qwidgets.core.ranges", "qwidgets.core.ranges.fit_together"))
    with pytest.warns(DeprecationWarning, match="fit_groups.fit_together"):
        old = ranges.fit_together
    assert old is fit_groups.fit_together
    with pytest.raises(AttributeError, match="no_such_name"):
        ranges.no_such_name  # noqa: B018
