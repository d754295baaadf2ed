"""Fitted grids are cached per process: a second scan of the same model does not refit.

References: the grids fitted afresh (each fitter handed to fit_together, the one place grids are
fitted for the cache, counted with its widths), and the first scan's table.
"""

from __future__ import annotations

import torch
from torch import nn

from qwidgets.core import fit_groups, grid_cache
from qwidgets.core.grid_cache import GRID_CACHE, GridCache, fit_cached, tensor_digest
from qwidgets.core.ranges import RangeFitter
from qwidgets.planning.scanning import scan


def _count_fits(monkeypatch):
    calls = []
    original = fit_groups.fit_together

    def counted(fitters, bits, **kw):
        calls.extend(tuple(bits) for _ in fitters)
        return original(fitters, bits, **kw)

    monkeypatch.setattr(grid_cache, "fit_together", counted)
    return calls


def _net():
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(12, 32), nn.ReLU(), nn.Linear(32, 32), nn.ReLU(), nn.Linear(32, 3)).eval()


def test_a_second_scan_does_not_refit(monkeypatch):
    net, x = _net(), torch.randn(20, 12, generator=torch.Generator().manual_seed(1))
    calls = _count_fits(monkeypatch)
    first = scan(net, x, bits=(2, 4, 8), progress=False)  # default method="mse"
    assert len(calls) == 3  # one fit of all widths per weight
    calls.clear()
    second = scan(net, x[:10], bits=(2, 4, 8), progress=False, scope="layer")  # other data, same weights
    third = scan(net, x, bits=(2, 4, 8), progress=False)
    assert calls == []
    assert third.to_dict() == first.to_dict()
    for name in first.layers:
        assert second.weight_grid(name, 4) is first.weight_grid(name, 4)
    # a new width is fitted alone; a changed weight, or another method, is fitted afresh
    scan(net, x, bits=(3, 4), progress=False, scope="layer")
    assert calls == [(3,)] * 3
    calls.clear()
    with torch.no_grad():
        net[2].weight.mul_(1.5)
    scan(net, x, bits=(4,), progress=False, scope="layer")
    assert calls == [(4,)]
    scan(net, x, bits=(4,), progress=False, scope="layer", method="minmax")
    assert len(calls) == 4


def test_cached_grids_equal_fresh_ones():
    w = torch.randn(24, 50, generator=torch.Generator().manual_seed(2))
    cached = fit_cached(RangeFitter(w, "mse", axis=0, symmetric=False), (3, 6))
    fresh = RangeFitter(w, "mse", axis=0, symmetric=False).fit_many((3, 6))
    for c, f in zip(cached, fresh, strict=True):
        assert torch.equal(c.scale_tensor(), f.scale_tensor()) and torch.equal(c.offset_tensor(), f.offset_tensor())
    assert GRID_CACHE.misses == 2 and GRID_CACHE.hits == 0
    fit_cached(RangeFitter(w.clone(), "mse", axis=0, symmetric=False), (6, 3))
    assert GRID_CACHE.hits == 2
    # options that shape the grid are part of the key
    other = fit_cached(RangeFitter(w, "mse", axis=0, symmetric=True), (3,))[0]
    assert not torch.equal(other.offset_tensor(), cached[0].offset_tensor())
    assert GRID_CACHE.misses == 3


def test_the_cache_is_bounded_and_drops_the_least_recently_used():
    small = GridCache(max_bytes=3000)
    tensors = [torch.randn(64, 8, generator=torch.Generator().manual_seed(s)) for s in range(6)]
    for t in tensors:
        fit_cached(RangeFitter(t, "minmax", axis=0), (4,), cache=small)
    assert small._bytes <= small.max_bytes  # noqa: SLF001 - the bound itself
    assert 0 < len(small) < len(tensors)
    # the newest is kept, the oldest was dropped
    before = small.misses
    fit_cached(RangeFitter(tensors[-1], "minmax", axis=0), (4,), cache=small)
    assert small.misses == before
    fit_cached(RangeFitter(tensors[0], "minmax", axis=0), (4,), cache=small)
    assert small.misses == before + 1


def test_digest_sees_values_dtype_and_shape():
    a = torch.arange(6.0)
    assert tensor_digest(a) == tensor_digest(a.clone())
    assert tensor_digest(a) != tensor_digest(a.reshape(2, 3))
    assert tensor_digest(a) != tensor_digest(a.double())
    b = a.clone()
    b[3] = torch.nextafter(b[3], torch.tensor(10.0))
    assert tensor_digest(a) != tensor_digest(b)


def test_gain_estimate_holds_one_entrys_quantized_weights_at_a_time(monkeypatch):
    # counted: quantized copies of weights still alive (weak references) whenever one is made
    import weakref

    from qwidgets.planning import gain_dots, gain_head, gain_probes

    net, x = _net(), torch.randn(20, 12, generator=torch.Generator().manual_seed(1))
    weights = {id(p) for p in net.parameters() if p.dim() == 2}
    alive, most = [], [0]
    original = gain_probes.quantize_unchecked

    def tracked(t, grid):
        q = original(t, grid)
        if id(t) in weights or any(t.data_ptr() == p.data_ptr() for p in net.parameters()):
            alive[:] = [r for r in alive if r() is not None]
            alive.append(weakref.ref(q))
            most[0] = max(most[0], len(alive))
        return q

    for module in (gain_probes, gain_dots, gain_head):  # every place the probes quantize a weight
        monkeypatch.setattr(module, "quantize_unchecked", tracked)
    scan(net, x, bits=(2, 4, 8), progress=False, estimate="gain")
    assert 0 < most[0] <= 3  # one entry's three widths, never the three entries' nine
