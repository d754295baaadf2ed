"""GridExplorer: one layer's (or one tensor's) quantization grid under live sliders.

The explorer holds its own state (one grid per source, the noise, the temperature, the probe
value, the channel shown); the ipywidgets controls only edit that state, and every number shown
comes from the core functions (:func:`qwidgets.quantize`, :func:`qwidgets.bin_probabilities`,
:func:`qwidgets.error_stats`, ...). A control change records the new value and schedules one
redraw (:class:`~qwidgets.widgets._render.Coalescer`), so dragging a slider never builds a
backlog. Work that does not depend on the control that moved is cached: the value histogram,
the float layer output, the bin-probability map (which, in grid steps, depends only on the bit
width and the noise) and the statistics of a grid already measured.

The user's model is only read: the explorer keeps a copy of the layer's weight and of its
input, and learned values live in the explorer (``.grid``, ``.to_setting()``), never in the
layer.
"""

from __future__ import annotations

import math

import ipywidgets as widgets
import numpy as np
import torch
from torch import nn

from ..core.checks import as_input, check_bits, check_positive
from ..core.device_rules import DeviceRules, check_rules, conform_grid
from ..core.grid import UniformGrid
from ..core.metrics import ErrorStats, GridUsage, error_stats, grid_usage
from ..core.ranges import METHODS, fit_range
from ..core.relaxed import bin_probabilities, expected_quantize, relaxed_quantize
from ..core.rounding import quantize
from ..core.setting import LayerSetting
from ..learn.one_grid import DEFAULT_NOISE, LearnResult, learn_grid
from ..model.capture import capture_inputs
from ..model.layers import WEIGHT_AXIS, is_quantizable, layer_forward, layer_output
from ..viz.explorer_figure import ExplorerFigure, PlotData
from .events import Coalescer, MessageLine, observe_value, torch_threads
from .explorer_panel import METHOD_LABELS, SOURCE_LABELS, make_controls, readout_html
from .image_canvas import PlotCanvas
from .snapshot import SnapshotMixin

__all__ = ["GridExplorer"]

FULL_MAP_LEVELS = 64  # up to this many levels the map shows every bin; beyond, 33 around the probe
ZOOM_BINS = 33
CURVE_POINTS = 1200
SAMPLE_POINTS = 300
SCATTER_POINTS = 3000
ERROR_SAMPLE = 20000
HIST_BINS = 160
LEARN_FOLLOW_EVERY = 10  # learning steps between slider updates
SCALE_DECADES = 2.0  # the scale slider spans the current scale times / divided by 10**2
CSS = {
    "root": "qw-explorer",
    "plot": "qw-plot",
    "readout": "qw-readout",
    "message": "qw-message",
}


class GridExplorer(SnapshotMixin, widgets.VBox):
    """Explore a uniform grid for a tensor or for one layer's weights or inputs, live.

    ``GridExplorer(tensor)`` explores a tensor; ``GridExplorer(layer, data)`` a Linear / Conv
    layer with ``data`` as its input; ``GridExplorer(model, data, layer="name")`` captures
    that layer's input from one run of ``model`` on ``data``. The starting grid has ``bits``
    bits and a range fitted by ``method``; ``noise`` is the logistic noise width as a fraction
    of the grid step and ``temperature`` the relaxed samples' temperature. ``max_samples``
    keeps the first rows of ``data``: the layer-output error is recomputed on every row kept
    whenever the grid changes (one matrix product), so a few hundred rows keep it instant.

    ``controls`` holds the ipywidgets controls; ``.grid``, ``.stats``, ``.usage``,
    ``.layer_stats`` and ``.readouts`` the current state; ``.refresh()``, ``.fit()``,
    ``.learn()``, ``.reset()``, ``.save_figure()`` and ``.to_setting()`` act on it. Changing
    the bit width keeps the clipping range (the step is rescaled); the scale and offset sliders
    of a per-channel grid edit the channel shown. With ``rules`` (:class:`qwidgets.DeviceRules`)
    the controls offer only what the device runs: widths from its menus, the step in powers of
    two, the offset in whole steps (fixed at 0 for symmetric weights), and fitted or learned
    grids moved onto the rules.

    >>> import torch
    >>> from torch import nn
    >>> _ = torch.manual_seed(0)
    >>> ex = GridExplorer(nn.Linear(32, 16), torch.randn(64, 32), bits=4)
    >>> ex.controls["bits"].value = 6
    >>> _ = ex.refresh()
    >>> ex.grid.bits, round(ex.stats.sqnr_db) > 25, ex.layer_stats is not None
    (6, True, True)
    """

    def __init__(
        self,
        obj,
        data=None,
        *,
        layer: str | None = None,
        bits: int = 4,
        method: str = "mse",
        source: str | None = None,
        per_channel: bool = False,
        noise: float = DEFAULT_NOISE,
        temperature: float = 0.5,
        max_samples: int | None = None,
        width: int = 720,
        height: int = 600,
        rules: DeviceRules | None = None,
    ):
        super().__init__()
        bits = check_bits(bits)
        self._rules = check_rules(rules)
        if method not in METHODS:
            raise ValueError(f"method must be one of {', '.join(map(repr, METHODS))}; got {method!r}")
        self._noise = float(check_positive(noise, "noise"))
        self._temperature = float(check_positive(temperature, "temperature"))
        self._start_noise, self._start_temperature = self._noise, self._temperature
        self._method = method
        self._setup_subject(obj, data, layer, max_samples)
        if source is None:
            source = self._sources[0]
        if source not in self._sources:
            raise ValueError(f"source must be one of {self._sources} here, got {source!r}")
        if not isinstance(per_channel, bool):
            raise TypeError(f"per_channel must be True or False, got {per_channel!r}")
        self._source = source
        self._channel = 0
        self._version = dict.fromkeys(self._sources, 0)
        self._grids = {}
        for s in self._sources:
            pc = per_channel and self._can_per_channel(s)
            self._grids[s] = self._fit_grid(s, self._allowed_bits(s, bits), method, None, pc)
        self._initial = dict(self._grids)
        self._probe = {s: self._default_probe(s) for s in self._sources}
        self._caches: dict = {}
        self._build_widgets(width, height)
        self._select_static()
        self._sync_controls()
        self._updater = Coalescer(self._redraw, delay=0.03,
                                  on_error=lambda e: self.message.error(e, "update"))
        self._redraw()

    # ================================================================== subject
    def _setup_subject(self, obj, data, layer, max_samples) -> None:
        self._layer: nn.Module | None = None
        if isinstance(obj, (torch.Tensor, np.ndarray)):
            if data is not None or layer is not None:
                raise TypeError("GridExplorer(tensor) takes no data or layer; give a layer and "
                                "its input as GridExplorer(layer, data)")
            values, _ = as_input(obj, "tensor")
            if values.numel() == 0:
                raise ValueError("tensor is empty; there is nothing to explore")
            self._values = {"values": values.detach().float().clone()}
            self._sources = ("values",)
            self.layer_name = None
            return
        if not isinstance(obj, nn.Module):
            raise TypeError(f"GridExplorer takes a tensor, a layer or a model, got {type(obj).__name__}")
        if data is None:
            raise TypeError("a layer or model needs data: GridExplorer(layer, inputs) or "
                            "GridExplorer(model, data, layer='name')")
        if layer is not None:
            if not isinstance(layer, str):
                raise TypeError(f"layer must be the name of a layer in the model, got {type(layer).__name__}")
            captured = capture_inputs(obj, data, [layer], max_samples=max_samples)
            module = obj.get_submodule(layer) if layer else obj
            inputs = captured[layer]
            self.layer_name = layer
        else:
            if not is_quantizable(obj):
                names = [n for n, m in obj.named_modules() if is_quantizable(m)]
                raise ValueError(
                    f"{type(obj).__name__} is not a Linear / Conv layer; to explore one of a "
                    f"model's layers give its name, e.g. layer={names[0]!r} (layers: {names})"
                    if names else f"{type(obj).__name__} has no Linear / Conv layer to explore"
                )
            module, inputs, self.layer_name = obj, data, None
            if not isinstance(inputs, torch.Tensor):
                raise TypeError(f"data must be the layer's input tensor, got {type(inputs).__name__}")
            if max_samples is not None:
                inputs = inputs[:max_samples]
        if not is_quantizable(module):
            raise TypeError(f"layer {layer!r} is a {type(module).__name__}; the explorer needs a "
                            "Linear or Conv layer")
        x, _ = as_input(inputs, "data")
        self._layer = module
        self._inputs = x.detach().clone()
        weight = module.weight.detach().clone()
        self._values = {"weight": weight, "input": self._inputs}
        self._sources = ("weight", "input")
        self._reference = layer_output(module, self._inputs)  # the float output, computed once
        ref = self._reference.reshape(-1)
        gen = torch.Generator().manual_seed(0)
        n = min(SCATTER_POINTS, ref.numel())
        self._scatter_idx = torch.randperm(ref.numel(), generator=gen)[:n]
        self._scatter_x = ref[self._scatter_idx].double().numpy()

    def _can_per_channel(self, source: str) -> bool:
        # Per-channel grids are offered for weights (one per output channel, the layout integer
        # kernels use) and for a tensor's first axis; activations get one grid (common practice).
        v = self._values[source]
        return source != "input" and v.dim() >= 2 and v.shape[0] > 1

    def _fit_grid(self, source, bits, method, signed, per_channel) -> UniformGrid:
        axis = WEIGHT_AXIS if per_channel else None
        if self._rules is None:
            return fit_range(self._values[source], bits, method, signed=signed, axis=axis)
        return fit_range(self._values[source], bits, method, signed=signed, axis=axis,
                         rules=self._rules, role=_role(source))

    # ================================================================== device rules
    def _allowed_bits(self, source: str, bits: int, up: bool = True) -> int:
        """``bits`` if the rules allow it for ``source``, else the next allowed width in the
        direction of the change (the nearest one at the ends of the menu)."""
        menu = None if self._rules is None else self._rules.bits_menu(_role(source))
        if menu is None or bits in menu:
            return bits
        ahead = [b for b in menu if (b > bits if up else b < bits)]
        if ahead:
            return min(ahead) if up else max(ahead)
        return min(menu, key=lambda b: (abs(b - bits), b))

    def _symmetric_only(self, source: str) -> bool:
        return self._rules is not None and self._rules.symmetric_weights and _role(source) == "weight"

    def _obeying(self, grid: UniformGrid, source: str) -> UniformGrid:
        """``grid`` moved onto the device rules (zero point, power-of-two scale), if any."""
        if self._rules is None:
            return grid
        return conform_grid(grid, self._values[source], self._rules, _role(source))

    def _default_probe(self, source: str) -> float:
        v = self._values[source]
        return float(v.mean() + v.std()) if v.numel() > 1 else float(v.reshape(-1)[0])

    # ================================================================== widgets
    def _build_widgets(self, width: int, height: int) -> None:
        c = make_controls(self._sources, self._source, self._method, self._noise,
                          self._temperature, has_layer=self._layer is not None)
        self.controls = c

        for name in ("bits", "scale", "offset", "noise", "temperature", "probe", "source",
                     "signed", "per_channel", "channel", "method"):
            observe_value(c[name], self._make_observer(name))
        c["fit"].on_click(lambda _b: self._guarded("fit range", lambda: self.fit()))
        c["learn"].on_click(lambda _b: self._guarded(
            "learn", lambda: self.learn(steps=int(c["steps"].value))))
        c["reset"].on_click(lambda _b: self._guarded("reset", self.reset))

        self.canvas = PlotCanvas(width, height)
        self.canvas.image.add_class(CSS["plot"])
        self.figure = ExplorerFigure(self.canvas, has_layer=self._layer is not None)
        self.readout = widgets.HTML(layout=widgets.Layout(width="250px", margin="0 0 0 8px"))
        self.readout.add_class(CSS["readout"])
        self.message = MessageLine()
        self.progress = widgets.Output(layout=widgets.Layout(min_height="0px"))
        sliders = widgets.VBox([c["bits"], c["scale"], c["offset"]])
        sliders2 = widgets.VBox([c["noise"], c["temperature"], c["probe"]])
        row1 = widgets.HBox([c["source"], c["signed"], c["per_channel"], c["channel"]],
                            layout=widgets.Layout(align_items="center"))
        row2 = widgets.HBox([c["method"], c["fit"], c["steps"], c["learn"], c["reset"]],
                            layout=widgets.Layout(align_items="center"))
        self.children = [
            row1,
            widgets.HBox([sliders, sliders2]),
            row2,
            # the readouts sit beside the plots, and wrap below them in a narrow notebook
            widgets.HBox([self.canvas.image, self.readout],
                         layout=widgets.Layout(flex_flow="row wrap", align_items="flex-start")),
            self.progress,
            self.message.widget,
        ]
        self.add_class(CSS["root"])

    def _make_observer(self, name: str):
        handler = getattr(self, f"_set_{name}")

        def observe(change):
            if self._syncing:
                return
            self._guarded(f"setting {name}", lambda: handler(change["new"]), schedule=True)

        return observe

    _syncing = False

    def _guarded(self, what: str, fn, schedule: bool = False) -> None:
        """Run a callback; show its error on the message line (a callback has no caller)."""
        try:
            fn()
        except Exception as exc:
            self.message.error(exc, what)
            self._sync_controls()  # put the controls back to the state that is still valid
            return
        if schedule:
            self._updater.request()

    # ================================================================== state edits
    @property
    def grid(self) -> UniformGrid:
        """The current grid of the current source (per-channel: scale / offset per channel)."""
        return self._grids[self._source]

    @property
    def source(self) -> str:
        return self._source

    @property
    def noise(self) -> float:
        """Logistic noise width as a fraction of the grid step."""
        return self._noise

    @property
    def temperature(self) -> float:
        return self._temperature

    def _set_grid(self, grid: UniformGrid, source: str | None = None) -> None:
        source = source or self._source
        self._grids[source] = grid
        self._version[source] += 1

    def _set_bits(self, bits) -> None:
        g = self.grid
        bits = self._allowed_bits(self._source, check_bits(int(bits)), up=int(bits) > g.bits)
        if bits == g.bits:
            self._sync_controls()  # a width the device does not run: the slider goes back
            return
        # keep the clipping range: the same span is cut into more (or fewer) steps
        old_span = (g.qmax - g.qmin)
        new = g.replace(bits=bits)
        ratio = max(old_span, 1) / max(new.qmax - new.qmin, 1)
        scale = g.scale * ratio if isinstance(g.scale, torch.Tensor) else float(g.scale) * ratio
        new = g.replace(bits=bits, scale=scale)
        if self._rules is not None and self._rules.pow2_scales:  # keep the step a power of two
            new = new.replace(scale=_pow2_like(new.scale))
        self._set_grid(self._obeying(new, self._source))
        self._sync_controls()

    def _set_scale(self, value) -> None:
        value = float(check_positive(float(value), "scale"))
        if self._rules is not None and self._rules.pow2_scales:  # the step moves in powers of two
            value = 2.0 ** round(math.log2(value))
        self._set_channel_param("scale", value)

    def _set_offset(self, value) -> None:
        value = float(value)
        if self._symmetric_only(self._source):
            value = 0.0  # symmetric weights: zero point 0
        elif self._rules is not None:  # an integer zero point: the offset moves in whole steps
            step = float(self._shown_grid().scale)
            value = -round(-value / step) * step + 0.0
        self._set_channel_param("offset", value)

    def _set_channel_param(self, name: str, value: float) -> None:
        g = self.grid
        if g.axis is None:
            self._set_grid(g.replace(**{name: value}))
        else:  # a per-channel grid: the sliders edit the channel shown
            t = (g.scale_tensor() if name == "scale" else g.offset_tensor()).detach().clone()
            t[self._channel] = value
            self._set_grid(g.replace(**{name: t}))

    def _set_noise(self, value) -> None:
        self._noise = float(check_positive(float(value), "noise"))

    def _set_temperature(self, value) -> None:
        self._temperature = float(check_positive(float(value), "temperature"))

    def _set_probe(self, value) -> None:
        self._probe[self._source] = float(value)

    def _set_source(self, value) -> None:
        if value not in self._sources:
            raise ValueError(f"source must be one of {self._sources}, got {value!r}")
        self._source = value
        self._channel = 0
        self._select_static()
        self._sync_controls()

    def _set_signed(self, value) -> None:
        self._set_grid(self.grid.replace(signed=bool(value)))
        self._sync_controls()

    def _set_per_channel(self, value) -> None:
        if value and not self._can_per_channel(self._source):
            raise ValueError(f"per-channel grids are offered for weights, not for {SOURCE_LABELS[self._source]}")
        g = self.grid
        self._set_grid(self._fit_grid(self._source, g.bits, self._method, g.signed, bool(value)))
        self._channel = 0
        self._select_static()
        self._sync_controls()

    def _set_channel(self, value) -> None:
        n = self._n_channels()
        if not 0 <= int(value) < n:
            raise ValueError(f"channel must be in 0..{n - 1}, got {value}")
        self._channel = int(value)
        self._select_static()
        self._sync_controls()

    def _set_method(self, value) -> None:
        if value not in METHODS:
            raise ValueError(f"method must be one of {METHODS}, got {value!r}")
        self._method = value

    def _n_channels(self) -> int:
        g = self.grid
        return 1 if g.axis is None else int(self._values[self._source].shape[g.axis])

    # ================================================================== actions
    def fit(self, method: str | None = None) -> UniformGrid:
        """Fit the current source's range with ``method`` (``"minmax"``, ``"percentile"``,
        ``"mse"``; default: the method chosen in the widget), keeping bits, signedness and
        per-channel choice. Returns the new grid (also ``.grid``)."""
        method = self._method if method is None else method
        if method not in METHODS:
            raise ValueError(f"method must be one of {', '.join(map(repr, METHODS))}; got {method!r}")
        self._method = method
        g = self.grid
        grid = self._fit_grid(self._source, g.bits, method, g.signed, g.axis is not None)
        self._set_grid(grid)
        self._sync_controls()
        self._schedule_or_note(f"fitted the range ({METHOD_LABELS[method]})")
        return grid

    def learn(self, steps: int = 200, lr: float = 0.2, **options) -> LearnResult:
        """Learn scale, offset and noise of the current source's grid by relaxed quantization.

        Calls :func:`qwidgets.learn_grid` on the layer's output error (progress bar shown in the
        widget), then takes the best grid by the hard quantizer's layer-output error; the
        sliders follow. ``options`` go to ``learn_grid`` (``temperature`` defaults to the
        widget's, ``window``, ``learn_offset``, ``seed``). Needs a layer.
        """
        if self._layer is None:
            raise ValueError("learn needs a layer: the error it minimises is the layer's output "
                             "error (use GridExplorer(layer, data))")
        options.setdefault("temperature", self._temperature)
        source = self._source
        start = self.grid

        def follow(step, grid, noise, _stats):
            # the sliders follow the learning (every few steps: each update is a message)
            if step % LEARN_FOLLOW_EVERY == 0:
                self._set_grid(grid, source)
                self._noise = noise
                self._sync_controls()

        try:
            with self.progress:
                result = learn_grid(self._layer, self._inputs, start, source=source,
                                    noise=max(self._noise, 0.02), steps=steps, lr=lr,
                                    callback=follow, **options)
        except BaseException:
            self._set_grid(start, source)  # nothing half-learned is left behind
            self._sync_controls()
            raise
        self.progress.clear_output()
        self._set_grid(self._obeying(result.grid, source), source)
        self._noise = result.noise
        self._sync_controls()
        self._schedule_or_note(
            f"learned {steps} steps: layer-output SQNR {result.start_stats.sqnr_db:.2f} -> "
            f"{result.stats.sqnr_db:.2f} dB (best at step {result.best_step})"
        )
        self.last_learn = result
        return result

    def reset(self) -> None:
        """Back to the starting grids, noise and temperature."""
        self._grids = dict(self._initial)
        for s in self._sources:
            self._version[s] += 1
        self._noise, self._temperature = self._start_noise, self._start_temperature
        self._channel = 0
        self._select_static()
        self._sync_controls()
        self._schedule_or_note("reset to the starting grid")

    def _schedule_or_note(self, note: str) -> None:
        self.message.info(note)
        self._updater.request()

    def refresh(self) -> GridExplorer:
        """Recompute and redraw now (synchronously), for scripts and tests; errors are raised."""
        self._updater.cancel()
        try:
            self._redraw()
        except Exception as exc:
            self.message.error(exc, "refresh")
            raise
        return self

    def save_figure(self, path) -> None:
        """Write the four plots as PNG or SVG (by ``path``'s extension), up to date."""
        if self._updater.pending:
            self.refresh()
        g, shown, usage, stats = self.grid, self._shown_grid(), self.usage, self.stats
        caption = (f"{SOURCE_LABELS[self._source]}: {g.bits} bits, step {float(shown.scale):.4g}"
                   f"{' (per channel)' if g.axis is not None else ''} | clipped "
                   f"{100 * usage.clipped_fraction:.3g} % | bins used {usage.bins_used:,} of "
                   f"{usage.n_bins:,} | SQNR: tensor {stats.sqnr_db:.2f} dB")
        if self._layer is not None:
            caption += f", layer output {self.layer_stats.sqnr_db:.2f} dB"
        self.figure.set_caption(caption)
        try:
            self.canvas.save(path)
        finally:
            self.figure.set_caption("")

    def snapshot(self) -> tuple[bytes, str]:
        """The current plots (PNG) and readout (HTML): the static copy in the display bundle."""
        if self._updater.pending:
            self.refresh()
        return self.canvas.last_png, self.readout.value

    @property
    def snapshot_title(self) -> str:
        return f"Grid explorer: layer {self.layer_name!r}" if self.layer_name else "Grid explorer"

    def to_setting(self, sources=None) -> LayerSetting:
        """The grids as a :class:`LayerSetting` for the plan.

        ``sources``: which grids to include, ``"weight"``, ``"input"`` or both (the default for
        a layer). A tensor explorer's grid is returned as the weight grid.
        """
        if self._layer is None:
            return LayerSetting(weight=self._grids["values"])
        if sources is None:
            sources = ("weight", "input")
        if isinstance(sources, str):
            sources = (sources,)
        bad = [s for s in sources if s not in ("weight", "input")]
        if bad:
            raise ValueError(f"sources must name 'weight' and / or 'input', got {bad}")
        return LayerSetting(weight=self._grids["weight"] if "weight" in sources else None,
                            input=self._grids["input"] if "input" in sources else None)

    # ================================================================== numbers
    @property
    def stats(self) -> ErrorStats:
        """Error of the current source's tensor quantized on :attr:`grid` (all values)."""
        return self._tensor_numbers()[0]

    @property
    def usage(self) -> GridUsage:
        """Clipped fraction and bins used of the current source's tensor on :attr:`grid`."""
        return self._tensor_numbers()[1]

    @property
    def layer_stats(self) -> ErrorStats | None:
        """Layer-output error with the current source quantized on :attr:`grid` (None for a
        tensor). Equals :func:`qwidgets.layer_error` for the same grid, on all the data."""
        if self._layer is None:
            return None
        return self._layer_numbers()[0]

    def _cached(self, name: str, key, compute):
        hit = self._caches.get(name)
        if hit is not None and hit[0] == key:
            return hit[1]
        value = compute()
        self._caches[name] = (key, value)
        return value

    def _tensor_numbers(self):
        src = self._source

        def compute():
            values, grid = self._values[src], self.grid
            return error_stats(values, quantize(values, grid)), grid_usage(values, grid)

        return self._cached("tensor", (src, self._version[src]), compute)

    def _layer_numbers(self):
        src = self._source

        def compute():
            with torch.no_grad():
                if src == "weight":
                    out = layer_forward(self._layer, self._inputs, quantize(self._values["weight"], self.grid))
                else:
                    out = layer_forward(self._layer, quantize(self._inputs, self.grid), self._values["weight"])
            sample = out.reshape(-1)[self._scatter_idx].double().numpy()
            return error_stats(self._reference, out), sample

        return self._cached("layer", (src, self._version[src]), compute)

    # ================================================================== static parts
    def _shown_values(self) -> torch.Tensor:
        v = self._values[self._source]
        if self.grid.axis is not None:
            return v.movedim(self.grid.axis, 0)[self._channel].reshape(-1)
        return v.reshape(-1)

    def _shown_grid(self) -> UniformGrid:
        g = self.grid
        if g.axis is None:
            return g
        return UniformGrid(g.bits, float(g.scale_tensor()[self._channel]),
                           float(g.offset_tensor()[self._channel]) + 0.0, signed=g.signed)

    def _select_static(self) -> None:
        """Histogram of the values shown (recomputed only when the source or channel changes)."""
        v = self._shown_values()
        lo, hi = float(v.min()), float(v.max())
        if hi <= lo:
            lo, hi = lo - 0.5 * max(abs(lo), 1.0), hi + 0.5 * max(abs(hi), 1.0)
        counts = torch.histc(v.float(), bins=HIST_BINS, min=lo, max=hi).double().numpy()
        edges = np.linspace(lo, hi, HIST_BINS + 1)
        label = {"weight": "weights", "input": "input values", "values": "values"}[self._source]
        n = v.numel()
        if self.grid.axis is not None:
            what = f"Channel {self._channel} of {self._n_channels()}: {n:,} {label}"
        else:
            what = f"All {n:,} {label}"
        unit = {"weight": "weight value", "input": "input value", "values": "value"}[self._source]
        self.figure.set_values(counts, edges, what, unit)
        self._data_range = (lo, hi)
        self._error_sample = v[torch.randperm(n, generator=torch.Generator().manual_seed(1))[:ERROR_SAMPLE]]
        if self._layer is not None:
            ref = self._scatter_x
            pad = 0.05 * (ref.max() - ref.min() + 1e-12)
            self.figure.set_output_range(float(ref.min() - pad), float(ref.max() + pad))
        self.figure._view = None
        self._place_view()

    def _place_view(self) -> None:
        """Keep the value axes still unless the grid's clip range leaves (or dwarfs) the view."""
        lo, hi = self._data_range
        width = hi - lo
        g = self._shown_grid()
        c_lo, c_hi = g.clip_range
        need_lo = max(min(lo, c_lo - 0.5 * g.scale), lo - 1.5 * width)
        need_hi = min(max(hi, c_hi + 0.5 * g.scale), hi + 1.5 * width)
        view = self.figure.view
        if view is not None:
            inside = view[0] <= need_lo and need_hi <= view[1]
            if inside and (view[1] - view[0]) <= 1.6 * (need_hi - need_lo):
                return
        pad = 0.06 * (need_hi - need_lo)
        self.figure.set_view(need_lo - pad, need_hi + pad)
        self._sync_probe_range()

    # ================================================================== controls <- state
    def _sync_controls(self) -> None:
        c = self.controls
        g = self._shown_grid()
        self._syncing = True
        try:
            with self.hold_sync():
                c["source"].value = self._source
                c["bits"].value = g.bits
                scale = float(g.scale)
                e = math.log10(scale)
                sl = c["scale"]
                if not (sl.min + 0.25 <= e <= sl.max - 0.25):
                    lo, hi = math.floor(e - SCALE_DECADES), math.ceil(e + SCALE_DECADES)
                    sl.max = max(hi, sl.min + 1)
                    sl.min = lo
                    sl.max = hi
                sl.value = scale
                off = c["offset"]
                r = max(abs(self._data_range[0]), abs(self._data_range[1]), 2 * abs(float(g.offset)), 1e-12)
                off.min, off.max = -r, r
                off.min = -r
                off.step = r / 2000
                off.value = float(g.offset)
                off.disabled = self._symmetric_only(self._source)
                c["noise"].value = self._noise
                c["temperature"].value = self._temperature
                c["signed"].value = g.signed
                c["per_channel"].value = self.grid.axis is not None
                c["per_channel"].disabled = not self._can_per_channel(self._source) or (
                    self._rules is not None and not self._rules.per_channel_weights)
                n = self._n_channels()
                c["channel"].max = max(n - 1, 0)
                c["channel"].value = self._channel
                c["channel"].disabled = self.grid.axis is None
                c["method"].value = self._method
            self._sync_probe_range()
        finally:
            self._syncing = False

    def _sync_probe_range(self) -> None:
        view = self.figure.view
        if view is None:
            return
        p = self.controls["probe"]
        was = self._syncing
        self._syncing = True
        try:
            lo, hi = view
            if p.min > hi:
                p.min = lo
            p.max, p.min = hi, lo
            p.step = (hi - lo) / 2000
            value = min(max(self._probe[self._source], lo), hi)
            self._probe[self._source] = value
            p.value = value
        finally:
            self._syncing = was

    # ================================================================== drawing
    refresh_threads: int | None = 1
    """torch intra-op threads while updating (None: torch's setting). One, because an update is
    many cache-sized slices: on two cores a second thread saves a few ms when the machine is
    idle and costs several times more when another process holds the other core (measured by
    benchmarks/bench_explorer.py, which reports both)."""

    def _redraw(self) -> None:
        with torch_threads(self.refresh_threads):
            self._place_view()
            data = self._plot_data()
            self.figure.update(data)
            self.readout.value = self._readout_html()
            self.canvas.render()

    def _window(self, grid: UniformGrid):
        return None if grid.n_levels <= FULL_MAP_LEVELS else ZOOM_BINS

    def _plot_data(self) -> PlotData:
        g = self._shown_grid()
        step, offset = float(g.scale), float(g.offset)
        noise_w = self._noise * step
        window = self._window(g)
        probe = self._probe[self._source]
        probe_pos = (probe - offset) / step
        image, extent = self._map(g, probe_pos)
        # bars for the probe value: its categorical distribution over the bins
        pp, pk = bin_probabilities(torch.tensor([probe]), g, noise_w, window=window)
        pk = pk.reshape(-1).numpy()
        pp = pp.reshape(-1).double().numpy()
        k0, k1 = extent[2] + 0.5, extent[3] - 0.5
        keep = (pk >= k0) & (pk <= k1)
        codes = np.arange(int(k0), int(k1) + 1)
        probs = np.zeros(codes.size)
        probs[(pk[keep] - int(k0)).astype(int)] = pp[keep]
        # transfer curve: hard, expected and a few relaxed samples at the temperature
        v0, v1 = self.figure.view
        xs = torch.linspace(v0, v1, CURVE_POINTS)
        hard = quantize(xs, g).numpy()
        expected = expected_quantize(xs, g, noise_w, window=window).numpy()
        gen = torch.Generator().manual_seed(2)
        xs_few = torch.linspace(v0, v1, SAMPLE_POINTS)
        samples = relaxed_quantize(xs_few.expand(3, -1), g, noise_w, self._temperature,
                                   window=window, generator=gen).numpy()
        if self._layer is not None:
            out_x, out_y = self._scatter_x, self._layer_numbers()[1]
        else:
            ev = self._error_sample
            err = ((quantize(ev, g) - ev) / step).double()
            edges = np.linspace(-2.5, 2.5, 51)
            counts = torch.histc(err.clamp(-2.5, 2.5), bins=50, min=-2.5, max=2.5).numpy()
            out_x, out_y = edges, counts / max(err.numel(), 1)
        lo, hi = g.clip_range
        return PlotData(
            levels=g.levels.double().numpy(), clip=(lo, hi), step=step, map_image=image,
            map_extent=extent, probe_pos=probe_pos, probe_codes=codes, probe_probs=probs,
            curve_x=xs.numpy(), curve_hard=hard, curve_expected=expected,
            curve_samples=[(xs_few.numpy(), y) for y in samples], out_x=out_x, out_y=out_y,
        )

    def _map(self, g: UniformGrid, probe_pos: float):
        """Bin probabilities for positions across the grid (in steps): depends only on the bit
        width, signedness and noise (and, for big grids, the zoom), so it is cached on those."""
        if g.n_levels <= FULL_MAP_LEVELS:
            k0, k1 = g.qmin, g.qmax
        else:
            centre = int(round(min(max(probe_pos, g.qmin), g.qmax)))
            k0 = min(max(centre - ZOOM_BINS // 2, g.qmin), g.qmax - ZOOM_BINS + 1)
            k1 = k0 + ZOOM_BINS - 1
        key = (g.bits, g.signed, self._noise, k0)

        def compute():
            positions = torch.linspace(k0 - 1.5, k1 + 1.5, 360, dtype=torch.float64)
            unit = UniformGrid(g.bits, 1.0, 0.0, signed=g.signed)  # the map in grid steps
            probs, codes = bin_probabilities(positions, unit, self._noise, window=self._window(g))
            image = np.zeros((k1 - k0 + 1, positions.numel()))
            codes = codes.expand(probs.shape).numpy() - k0
            probs = probs.numpy()
            rows, cols = np.nonzero((codes >= 0) & (codes <= k1 - k0))
            image[codes[rows, cols], rows] = probs[rows, cols]
            return image, (k0 - 1.5, k1 + 1.5, k0 - 0.5, k1 + 0.5)

        return self._cached("map", key, compute)

    # ================================================================== readouts
    @property
    def readouts(self) -> dict:
        """The readout panel as plain text, name -> shown text (what a browser test can read)."""
        return dict(self._readout_rows())

    def _readout_rows(self):
        g, shown = self.grid, self._shown_grid()
        stats, usage = self.stats, self.usage
        rows = [("bits", f"{g.bits} ({g.n_levels:,} levels, {'signed' if g.signed else 'unsigned'})")]
        if g.axis is None:
            rows.append(("step", f"{float(g.scale):.4g}"))
        else:
            s = g.scale_tensor()
            rows.append(("step", f"{float(shown.scale):.4g} (channel {self._channel}); "
                                 f"{float(s.min()):.3g} to {float(s.max()):.3g} over {s.numel()} channels"))
        lo, hi = shown.clip_range
        rows.append(("clip range", f"{lo:.4g} to {hi:.4g}"))
        rows.append(("clipped", f"{100 * usage.clipped_fraction:.3g} %"))
        rows.append(("bins used", f"{usage.bins_used:,} of {usage.n_bins:,} "
                                  f"({100 * usage.used_fraction:.0f} %)"))
        rows.append(("tensor SQNR", f"{stats.sqnr_db:.2f} dB"))
        if self._layer is not None:
            ls = self.layer_stats
            rows.append(("layer-output SQNR", f"{ls.sqnr_db:.2f} dB"))
            rows.append(("relative error", f"{ls.rel_err:.4g}"))
            rows.append(("cosine similarity", f"{ls.cosine:.6f}"))
        rows.append(("noise", f"{self._noise:.3g} steps ({self._noise * float(shown.scale):.3g})"))
        rows.append(("temperature", f"{self._temperature:.3g}"))
        return rows

    def _readout_html(self) -> str:
        return readout_html(f"{SOURCE_LABELS[self._source]} on the grid", self._readout_rows())


def _role(source: str) -> str:
    """Which device rules apply to a source: inputs follow the input rules, the rest the weight rules."""
    return "input" if source == "input" else "weight"


def _pow2_like(scale):
    """The nearest power of two (in log scale) of a float or of each value of a tensor."""
    if isinstance(scale, torch.Tensor):
        return torch.exp2(torch.round(torch.log2(scale.detach().double()))).to(scale.dtype)
    return 2.0 ** round(math.log2(float(scale)))
