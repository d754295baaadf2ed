"""The grid explorer's numbers for one state: readout figures and plot data, all from the core.

:class:`ExplorerNumbers` answers "what does the current state measure?" with the core and
model functions and caches what does not depend on the control that moved:

- tensor error and grid usage from :class:`qwidgets.core.sorted_values.SortedValues` (one
  sorted copy per source and layout, about a millisecond a grid instead of a pass over every
  value);
- the layer-output error from :func:`qwidgets.model.layers.layer_output` against the float
  output computed once; while a control moves, a large layer may use a sample of the input
  rows (``rows``), with the sampling error of the SQNR estimated from the per-row sums;
- the bin-probability map, which in grid steps depends only on the bit width, signedness and
  noise.

Figures and plot parts are kept for the last :data:`GRIDS_KEPT` grids shown, by what makes
the grid (:func:`grid_key`: width, signedness, layout, exact scale and offset), so moving back
to a width (its fitted, learned or edited grid comes back) measures nothing again.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import torch

from ..core.grid import UniformGrid
from ..core.grid_cache import tensor_digest
from ..core.metrics import ErrorStats, error_stats, grid_usage
from ..core.relaxed import bin_probabilities, expected_quantize, relaxed_quantize, relaxed_views
from ..core.rounding import quantize, quantize_unchecked
from ..core.sorted_values import SortedValues
from ..model.layers import layer_forward
from ..planning.threads import threads
from ..viz.explorer_figure import PlotData
from .explorer_state import ExplorerState
from .explorer_subject import ExplorerSubject

__all__ = ["ExplorerNumbers", "SampledError", "grid_key"]

FULL_MAP_LEVELS = 64  # up to this many levels the map shows every bin; beyond, 33 around the probe
ZOOM_BINS = 33
CURVE_POINTS = 1200
SAMPLE_POINTS = 300
ERROR_SAMPLE = 20000
MAPS_KEPT = 12  # bin maps remembered, for moves back and forth between widths or noise levels
GRIDS_KEPT = 32  # figures and plot parts remembered per grid, for moves back to a grid shown before
# (twice the widths worked out ahead while idle, so those do not push out the grids just shown)
KEYS_KEPT = 4  # grids whose key is remembered (one refresh looks its grid up several times)


class SampledError:
    """A layer-output SQNR measured on a sample of rows, with its standard error in dB."""

    def __init__(self, stats: ErrorStats, rows: int, total: int, sqnr_se_db: float):
        self.stats, self.rows, self.total, self.sqnr_se_db = stats, rows, total, sqnr_se_db


class ExplorerNumbers:
    """Numbers and plot data for an :class:`ExplorerState` of an :class:`ExplorerSubject`."""

    def __init__(self, subject: ExplorerSubject):
        self.subject = subject
        self._sorted: dict = {}
        self._caches: dict = {}
        self._keys: dict = {}  # id(grid) -> (grid, grid_key(grid))

    def _cached(self, name: str, key, compute, keep: int = GRIDS_KEPT):
        """``compute()``'s value for ``key``, the ``keep`` keys of ``name`` used last remembered."""
        entries = self._caches.setdefault(name, {})
        if key in entries:
            entries[key] = value = entries.pop(key)  # used last: dropped last
            return value
        value = entries[key] = compute()
        while len(entries) > keep:
            del entries[next(iter(entries))]
        return value

    def _key(self, g: UniformGrid) -> tuple:
        """:func:`grid_key` of ``g``, worked out once per grid object (a block grid's scales
        are megabytes): kept with the grid itself, so its id stays its own meanwhile."""
        hit = self._keys.get(id(g))
        if hit is not None and hit[0] is g:
            return hit[1]
        key = grid_key(g)
        self._keys[id(g)] = (g, key)
        while len(self._keys) > KEYS_KEPT:
            del self._keys[next(iter(self._keys))]
        return key

    # ------------------------------------------------------------------ readout figures
    def tensor(self, st: ExplorerState):
        """(ErrorStats, GridUsage) of the current source's tensor on the current grid."""
        return self._tensor(st.source, st.grid)

    def _tensor(self, src: str, g: UniformGrid):
        def compute():
            if g.blocked:  # a block grid: the core's blocked quantize and usage, once per grid
                v = self.subject.values[src]
                return error_stats(v, quantize(v, g)), grid_usage(v, g)
            key = (src, g.axis)
            if key not in self._sorted:
                self._sorted[key] = SortedValues(self.subject.values[src], axis=g.axis)
            return self._sorted[key].measure(g)

        return self._cached("tensor", (src, self._key(g)), compute)

    def layer(self, st: ExplorerState, rows: int | None = None):
        """(ErrorStats or SampledError, (float, quantized) output sample for the scatter) with
        the current grid.

        ``rows``: measure on that many evenly spread input rows (None: all of them)."""
        return self.layer_soon(st, rows, threads=None, background=False)()

    def layer_soon(self, st: ExplorerState, rows: int | None = None, *, threads: int | None = 1,
                   background: bool = True) -> _Soon:
        """Start :meth:`layer` for the current state on a worker thread (``threads``: torch's
        intra-op threads there, None: torch's setting) and return a function that waits for
        it. The layer output is a matrix product that runs without Python's lock, so the plots
        that do not need it are drawn meanwhile on the caller's thread."""
        return self._layer_soon(st.source, st.grid, rows, threads, background)

    def _layer_soon(self, src: str, g: UniformGrid, rows, threads, background) -> _Soon:
        sub = self.subject
        key = self._layer_key(src, g, rows)
        if key in self._caches.get("layer", {}):  # a grid shown before: its figures
            value = self._cached("layer", key, None)
            return _Soon(lambda: value, waiting=False)
        job = _LayerJob(sub, src, g, key[2])
        if not background:
            value = self._cached("layer", key, lambda: job.measure(job.forward(threads)))
            return _Soon(lambda: value, waiting=False)
        # a new thread starts from torch's default count: give it the caller's for None
        future = _worker().submit(job.run, torch.get_num_threads() if threads is None else threads)

        def result():
            return self._cached("layer", key, future.result)

        return _Soon(result, waiting=True)

    def _layer_key(self, src: str, g: UniformGrid, rows: int | None) -> tuple:
        """The layer figures' cache key: rows None when all the input rows are measured."""
        sampled = rows is not None and rows < self.subject.inputs.shape[0]
        return (src, self._key(g), rows if sampled else None)

    def warm(self, src: str, g: UniformGrid, noise_steps: float, rows: tuple = (None,)) -> bool:
        """Work out ahead (while the kernel is idle) the figures a change to grid ``g`` of
        ``src`` shows: the tensor's, the layer output's (on each of ``rows`` input rows, None:
        all) and the bin map (for a grid whose map shows every bin). False: all were known."""
        sub = self.subject
        known = [(src, self._key(g)) in self._caches.get("tensor", {})]
        if sub.has_layer:
            known += [self._layer_key(src, g, r) in self._caches.get("layer", {}) for r in rows]
        if g.n_levels <= FULL_MAP_LEVELS:
            known.append(_map_place(g, 0.0, noise_steps)[0] in self._caches.get("map", {}))
        if all(known):
            return False
        self._tensor(src, g)
        if sub.has_layer:
            for r in rows:
                self._layer_soon(src, g, r, None, False)
        if g.n_levels <= FULL_MAP_LEVELS:
            self._map(g, 0.0, noise_steps)
        return True

    def warm_widths(self, st: ExplorerState, rows: tuple, limit: int | None = None) -> bool:
        """:meth:`warm` the grid each other width of :meth:`ExplorerState.widths_ahead` would
        show, nearest first, at most ``limit`` of them; whether any is left."""
        done = 0
        for bits in st.widths_ahead():
            if bits != st.grid.bits:
                if limit is not None and done >= limit:
                    return True
                done += self.warm(st.source, st.grid_for_bits(bits)[0], st.noise_steps, rows)
        return False

    # ------------------------------------------------------------------ plot data
    def plot_data(self, st: ExplorerState, view: tuple, error_sample: torch.Tensor,
                  layer_sample=None) -> PlotData:
        """What the plots show for ``st``; each part is recomputed only when what it depends on
        moved (a temperature move draws new relaxed samples and nothing else)."""
        g = st.shown_grid()
        step, offset = float(g.scale), float(g.offset)
        noise_w = st.noise_steps * step
        window = _window(g)
        shown = (g.bits, g.signed, step, offset)  # the shown grid, as a key
        probe_pos = (st.probe - offset) / step
        image, extent = self._map(g, probe_pos, st.noise_steps)
        v0, v1 = view
        xs = torch.linspace(v0, v1, CURVE_POINTS)
        xs_few = torch.linspace(v0, v1, SAMPLE_POINTS)
        keys = {"bars": (shown, noise_w, st.probe, extent), "soft": (shown, noise_w, view),
                "samples": (shown, noise_w, st.temperature, view)}
        if g.axis is None and not g.blocked and not any(k in self._caches.get(n, {}) for n, k in keys.items()):
            # a new grid or noise: the three from one table of bin probabilities
            expected, ys, bins = relaxed_views(xs, xs_few.expand(3, -1), torch.tensor([float(st.probe)]), g,
                                               noise_w, st.temperature, window=window,
                                               generator=torch.Generator().manual_seed(2))
            self._cached("bars", keys["bars"], lambda: _probe_bars(g, st.probe, noise_w, window, extent, bins))
            self._cached("soft", keys["soft"], expected.numpy)
            self._cached("samples", keys["samples"], lambda: [(xs_few.numpy(), y) for y in ys.numpy()])
        codes, probs = self._cached("bars", keys["bars"],
                                    lambda: _probe_bars(g, st.probe, noise_w, window, extent))
        hard_x, hard_y = self._cached("hard", (shown, view), lambda: _hard_curve(g, v0, v1))
        expected = self._cached("soft", keys["soft"],
                                lambda: expected_quantize(xs, g, noise_w, window=window).numpy())

        def draw_samples():
            gen = torch.Generator().manual_seed(2)
            ys = relaxed_quantize(xs_few.expand(3, -1), g, noise_w, st.temperature, window=window,
                                  generator=gen).numpy()
            return [(xs_few.numpy(), y) for y in ys]

        samples = self._cached("samples", keys["samples"], draw_samples)
        if self.subject.has_layer:  # None: the scatter is updated on its own (update_out)
            out_x, out_y = layer_sample if layer_sample is not None else (None, None)
        else:
            # (the sample is kept with its histogram, so its id stays its own while cached)
            out_x, out_y, _ = self._cached("errors", (shown, id(error_sample)),
                                           lambda: (*_error_histogram(g, error_sample), error_sample))
        return PlotData(
            levels=g.levels.double().numpy(), clip=g.clip_range, step=step, map_image=image,
            map_extent=extent, probe_pos=probe_pos, probe_codes=codes, probe_probs=probs,
            curve_x=xs.numpy(), curve_hard=(hard_x, hard_y), curve_expected=expected,
            curve_samples=samples, out_x=out_x, out_y=out_y,
        )

    def _map(self, g: UniformGrid, probe_pos: float, noise_steps: float):
        """Bin probabilities for positions across the grid (in steps): depends only on the bit
        width, signedness and noise (and, for big grids, the zoom), so it is cached on those."""
        key, k0, k1 = _map_place(g, probe_pos, noise_steps)

        def compute():
            positions = torch.linspace(k0 - 1.5, k1 + 1.5, 360, dtype=torch.float64)
            unit = UniformGrid(g.bits, 1.0, 0.0, signed=g.signed)  # the map in grid steps
            probs, codes = bin_probabilities(positions, unit, noise_steps, window=_window(g))
            image = np.zeros((k1 - k0 + 1, positions.numel()))
            codes = codes.expand(probs.shape).numpy() - k0
            probs = probs.numpy()
            r, c = np.nonzero((codes >= 0) & (codes <= k1 - k0))
            image[codes[r, c], r] = probs[r, c]
            return image, (k0 - 1.5, k1 + 1.5, k0 - 0.5, k1 + 0.5)

        return self._cached("map", key, compute, keep=MAPS_KEPT)


def _map_place(g: UniformGrid, probe_pos: float, noise_steps: float) -> tuple:
    """(cache key, first code, last code) of the bin map: every bin up to
    :data:`FULL_MAP_LEVELS` levels, else :data:`ZOOM_BINS` around the probe."""
    if g.n_levels <= FULL_MAP_LEVELS:
        k0, k1 = g.qmin, g.qmax
    else:
        centre = int(round(min(max(probe_pos, g.qmin), g.qmax)))
        k0 = min(max(centre - ZOOM_BINS // 2, g.qmin), g.qmax - ZOOM_BINS + 1)
        k1 = k0 + ZOOM_BINS - 1
    return (g.bits, g.signed, noise_steps, k0), k0, k1


_WORKER: list = []  # one thread for every explorer's layer outputs (updates run one at a time)


def _worker() -> ThreadPoolExecutor:
    if not _WORKER:
        _WORKER.append(ThreadPoolExecutor(1, thread_name_prefix="qwidgets-explorer"))
    return _WORKER[0]


class _Soon:
    """A value on its way: call it to wait for it; ``waiting``: it is being computed."""

    def __init__(self, get: Callable[[], tuple], waiting: bool):
        self.get, self.waiting = get, waiting

    def __call__(self) -> tuple:
        return self.get()


class _LayerJob:
    """The layer-output measurement of one grid in three parts: the quantized operand
    (caller's thread), then on a worker thread the layer's forward (one call that runs without
    Python's lock, so the caller draws meanwhile) and the error figures (a few calls; the
    forward ends while the caller still draws). The arithmetic is layer_output's, in the same
    order, so the figures equal :func:`qwidgets.layer_error`'s. (Quantizing on the worker too
    was measured slower: its many small calls wait for the lock while the caller draws.)"""

    def __init__(self, subject: ExplorerSubject, source: str, grid: UniformGrid, rows: int | None):
        self.subject, self.rows = subject, rows
        n = subject.inputs.shape[0]
        self.idx = None if rows is None else torch.linspace(0, n - 1, rows).round().long().unique()
        x = subject.inputs if self.idx is None else subject.inputs[self.idx]
        w = subject.layer.weight.detach()
        with torch.no_grad():  # the float32 copies were checked when the explorer was made
            if source == "input":
                x = quantize_unchecked(x, grid)
            else:
                w = quantize_unchecked(subject.values["weight"], grid)
        self.x, self.w = x, w

    def forward(self, n_threads: int | None) -> torch.Tensor:
        with threads(n_threads), torch.no_grad():
            return layer_forward(self.subject.layer, self.x, self.w)

    def run(self, n_threads: int | None):
        """:meth:`forward` then :meth:`measure` (on a worker thread)."""
        return self.measure(self.forward(n_threads))

    def measure(self, out: torch.Tensor):
        sub = self.subject
        if self.idx is None:
            sample = out.reshape(-1)[sub.scatter_idx].double().numpy()
            return sub.fixed_reference.stats(out), (sub.scatter_x, sample)
        n = sub.inputs.shape[0]
        ref = sub.reference[self.idx]
        stats = error_stats(ref, out)
        per = out.shape[0]
        e = (out - ref).double().reshape(per, -1).square().sum(1)
        s = ref.double().reshape(per, -1).square().sum(1)
        se = _ratio_se_db(e, s, per, n)
        flat = out.reshape(-1)
        pick = torch.randperm(flat.numel(), generator=torch.Generator().manual_seed(0))
        pick = pick[: min(len(sub.scatter_x), flat.numel())]
        xs = ref.reshape(-1)[pick].double().numpy()
        return SampledError(stats, self.idx.numel(), n, se), (xs, flat[pick].double().numpy())


def grid_key(g: UniformGrid) -> tuple:
    """What makes a grid what it is, as a dictionary key: width, signedness, layout and the
    exact values of scale and offset (a tensor by the digest of its dtype, shape and bytes:
    :func:`~qwidgets.core.grid_cache.tensor_digest`, 128 bits). Two grids with the same key
    quantize every value alike; the key holds no reference to the grid, and is small.

    >>> grid_key(UniformGrid(4, 0.5)) == grid_key(UniformGrid(4, 0.5)) != grid_key(UniformGrid(5, 0.5))
    True
    """
    return (g.bits, g.signed, g.axis, g.block_size, _param_key(g.scale), _param_key(g.offset))


def _param_key(v) -> tuple:
    if isinstance(v, torch.Tensor):
        return ("tensor", tensor_digest(v))
    return ("float", float(v))


def _probe_bars(g: UniformGrid, probe: float, noise: float, window, extent, bins=None):
    """(codes, probabilities) of the bins shown by the map, at the probe (``bins``: its
    ``bin_probabilities``, when known)."""
    pp, pk = bins if bins is not None else bin_probabilities(torch.tensor([probe]), g, noise, window=window)
    pk = pk.reshape(-1).numpy()
    pp = pp.reshape(-1).double().numpy()
    k0, k1 = extent[2] + 0.5, extent[3] - 0.5
    keep = (pk >= k0) & (pk <= k1)
    codes = np.arange(int(k0), int(k1) + 1)
    probs = np.zeros(codes.size)
    probs[(pk[keep] - int(k0)).astype(int)] = pp[keep]
    return codes, probs


def _hard_curve(g: UniformGrid, v0: float, v1: float):
    """The hard quantizer over ``[v0, v1]`` as a step line: a vertex pair at each rounding
    boundary (halfway between grid levels) in view, each flat piece's value from
    :func:`quantize` at its middle. With more steps in view than the curve has points (they
    would be under a pixel) the quantizer sampled at those points instead."""
    levels = g.levels.double()
    cuts = ((levels[:-1] + levels[1:]) / 2).numpy()
    cuts = cuts[(cuts > v0) & (cuts < v1)]
    if 2 * cuts.size > CURVE_POINTS:
        xs = torch.linspace(v0, v1, CURVE_POINTS)
        return xs.double().numpy(), quantize(xs, g).double().numpy()
    ends = np.concatenate([[v0], cuts, [v1]])
    flat = quantize(torch.from_numpy((ends[:-1] + ends[1:]) / 2), g).numpy()
    return np.repeat(ends, 2)[1:-1], np.repeat(flat, 2)


def _error_histogram(g: UniformGrid, values: torch.Tensor):
    """Shares of ``values`` by quantization error in steps, 50 bins over -2.5..2.5."""
    err = ((quantize(values, g) - values) / float(g.scale)).double()
    counts = torch.histc(err.clamp(-2.5, 2.5), bins=50, min=-2.5, max=2.5).numpy()
    return np.linspace(-2.5, 2.5, 51), counts / max(err.numel(), 1)


def _window(grid: UniformGrid):
    return None if grid.n_levels <= FULL_MAP_LEVELS else ZOOM_BINS


def _ratio_se_db(e: torch.Tensor, s: torch.Tensor, n: int, total: int) -> float:
    """Standard error, in dB, of 10 log10(sum s / sum e) estimated from ``n`` of ``total`` rows
    (ratio estimator, linearised; finite-population corrected)."""
    se_sum, s_sum = float(e.sum()), float(s.sum())
    if n < 2 or se_sum <= 0 or s_sum <= 0:
        return 0.0
    r = se_sum / s_sum
    resid = e - r * s
    var = float(resid.var()) / (n * float(s.mean()) ** 2) * max(0.0, 1.0 - n / total)
    return 10.0 / math.log(10.0) * math.sqrt(var) / r
