"""GridExplorer: one layer's (or one tensor's) quantization grid under live controls.

The state lives in one ``traitlets.HasTraits`` model, :class:`~qwidgets.widgets.explorer_state.ExplorerState`
(``explorer.state``); the controls are bound to it (:mod:`~qwidgets.widgets.explorer_controls`),
:class:`~qwidgets.widgets.explorer_numbers.ExplorerNumbers` measures it with the core and model
functions, :class:`~qwidgets.viz.explorer_figure.ExplorerFigure` draws it. A change of the
state schedules one redraw (:class:`~qwidgets.widgets.events.Coalescer`), so dragging a slider
never builds a backlog.

The user's model is only read: the explorer keeps float32 copies of the layer's weight and
input; learned grids live in the explorer (``.grid``, ``.to_setting()``), never in the layer.
"""

from __future__ import annotations

import html
import os
from collections.abc import Callable, Sequence
from typing import Any

import ipywidgets as widgets
import torch
from torch import nn

from ..core.checks import check_bits, check_bool, check_choice, check_positive
from ..core.device_rules import DeviceRules, check_rules
from ..core.grid import UniformGrid, grid_params
from ..core.metrics import ErrorStats, GridUsage
from ..core.ranges import METHODS
from ..core.renamed import warn_renamed
from ..core.setting import LayerSetting
from ..core.token_grid import TokenGrid
from ..learn.one_grid import DEFAULT_NOISE_STEPS, LearnResult
from ..planning.threads import threads
from ..viz.explorer_figure import ExplorerFigure
from .display_snapshot import SnapshotDisplay
from .events import Coalescer, IdleSteps, MessageLine, running_loop
from .explorer_controls import ExplorerControls
from .explorer_learning import LearnRunner
from .explorer_numbers import ExplorerNumbers
from .explorer_panel import (
    METHOD_LABELS,
    SOURCE_LABELS,
    clip_warning,
    readout_html,
    readout_rows,
)
from .explorer_state import ExplorerState
from .explorer_static import ValueAxes
from .explorer_subject import ExplorerSubject
from .image_canvas import PlotCanvas

__all__ = ["GridExplorer", "CSS"]

CSS = {"root": "qw-explorer", "plot": "qw-plot", "readout": "qw-readout",
       "message": "qw-message", "heading": "qw-heading"}
STATE_TRAITS = ["source", "bits", "signed", "per_channel", "channel", "block", "scale", "offset", "method",
                "keep_clip", "noise_steps", "temperature", "probe", "grid"]

SAMPLED_ROWS = 32  # rows measured while a control of a large layer moves (exact when it stops)
LARGE_LAYER_MACS = 100_000_000  # above this many multiply-adds per update, sample while moving
SETTLE_S = 0.35  # after this long without a change, a sampled readout is made exact
WARM_EXACT_MACS = 600_000_000  # up to this many, idle steps also work out other widths' exact figures


class GridExplorer(SnapshotDisplay, widgets.VBox):
    """Explore a uniform grid for a tensor or for one layer's weights or inputs, live.

    ``GridExplorer(tensor)`` explores a tensor; ``GridExplorer(layer, data)`` a Linear / Conv
    layer with ``data`` as its input; ``GridExplorer(model, data, layer="name")`` captures
    that layer's input from one run of ``model`` on ``data`` (any data source the model
    accepts; ``inputs=`` picks the model's inputs from each batch, as in :func:`qwidgets.scan`,
    so a ``(tokens, targets)`` batch or loader works). The starting grid has ``bits`` bits and a range fitted by ``method``;
    ``noise_steps`` is the logistic noise width as a fraction of the grid step (``noise``, its
    previous name here, warns: the core functions' ``noise`` is in value units) and ``temperature`` the relaxed samples' temperature. ``max_samples`` keeps the first rows of ``data``. ``grid``: start from this grid for the weights (e.g. a plan's), see
    :meth:`show_setting`. ``output``: an ``ipywidgets.Output`` that captures the progress of
    learning runs (default: the explorer's own).

    ``state`` is the explorer's state, a ``traitlets.HasTraits`` model
    (:class:`~qwidgets.widgets.explorer_state.ExplorerState`: ``bits``, ``scale``,
    ``offset``, ``signed``, ``noise_steps``, ...): set its traits, ``observe`` them or
    ``link`` your own controls to them. ``controls`` holds the ipywidgets controls bound to it;
    ``.grid``, ``.stats``, ``.usage``, ``.layer_stats`` and ``.readouts`` the current state; ``.refresh()``, ``.fit()``,
    ``.learn()``, ``.reset()``, ``.save_figure()`` and ``.to_setting()`` act on it. A new bit
    width refits the range with the selected method (tick *keep clip range* to keep it), or
    brings back the grid learned for that width. With ``rules`` (:class:`qwidgets.DeviceRules`)
    the controls offer only what the device runs: widths from its menus, the step in powers of
    two, the offset in whole steps (fixed at 0 for symmetric weights), and fitted or learned
    grids moved onto the rules.

    >>> import torch
    >>> from torch import nn
    >>> _ = torch.manual_seed(0)
    >>> ex = GridExplorer(nn.Linear(32, 16), torch.randn(64, 32), bits=4)
    >>> ex.state.bits = 6
    >>> _ = ex.refresh()
    >>> ex.grid.bits, round(ex.stats.sqnr_db) > 25, ex.layer_stats is not None
    (6, True, True)
    """

    refresh_threads: int | None = 1
    """torch intra-op threads while updating (None: torch's setting). One, because an update is
    many cache-sized slices: on two cores a second thread saves a few ms when the machine is
    idle and costs several times more when another process holds the other core."""

    def __init__(self, obj: nn.Module | torch.Tensor, data: Any = None, *, layer: str | None = None,
                 bits: int = 4, method: str = "mse", source: str | None = None, per_channel: bool = False,
                 noise: float | None = None, noise_steps: float | None = None, temperature: float = 0.5,
                 max_samples: int | None = None, grid: UniformGrid | None = None, inputs: int | str | Callable | None = None,
                 output: widgets.Output | None = None, width: int = 720, height: int = 600,
                 clock: Callable[[], float] | None = None, rules: DeviceRules | None = None):
        super().__init__()
        bits = check_bits(bits)
        check_choice(method, METHODS, "method")
        if noise is not None:  # the previous name of noise_steps (a fraction of the step)
            if noise_steps is not None:
                raise TypeError("give noise_steps only (noise is its deprecated name), not both")
            warn_renamed("noise", "noise_steps (a fraction of the grid step)", "GridExplorer")
            noise_steps = noise
        ns = float(check_positive(DEFAULT_NOISE_STEPS if noise_steps is None else noise_steps,
                                  "noise_steps"))
        temperature = float(check_positive(temperature, "temperature"))
        check_bool(per_channel, "per_channel")
        if output is not None and not isinstance(output, widgets.Output):
            raise TypeError(f"output must be an ipywidgets.Output or None, got {type(output).__name__}")
        self.subject = ExplorerSubject(obj, data, layer, max_samples, inputs)
        sources = self.subject.sources
        if source is None:
            source = sources[0]
        check_choice(source, sources, "source")
        self.state = ExplorerState(self.subject.values, source, method=method, noise_steps=ns,
                                   temperature=temperature, rules=check_rules(rules))
        self.state.start(bits, per_channel)
        self._start = (ns, temperature)
        self.numbers = ExplorerNumbers(self.subject)
        self._clock, self._moving, self._settle_handle = clock, False, None
        self._updater = Coalescer(self._interactive_redraw, delay=0.03,
                                  on_error=lambda e: self.message.error(e, "update"))
        self._prefetch = IdleSteps(lambda: self.prefetch(limit=1), lambda: self._updater.pending, SETTLE_S)
        if grid is not None:
            self.show_setting(LayerSetting(weight=grid), note=False)
        self._build_widgets(width, height, output)
        self.state.observe(lambda _ch: self._updater.request(), names=STATE_TRAITS)
        self.state.observe(self._show_note, names=["note", "signed"])
        self._redraw()

    def _build_widgets(self, width: int, height: int, output) -> None:
        self.message = MessageLine()
        self.panel = ExplorerControls(self.state, has_layer=self.subject.has_layer,
                                      on_error=lambda e, name: self.message.error(e, f"setting {name}"),
                                      before=self.message.clear)
        c = self.controls = self.panel.controls
        self.learner = LearnRunner(self, c["learn"], clock=self._clock)
        c["fit"].on_click(lambda _b: self.message.run("fit range", self.fit))
        c["learn"].on_click(lambda _b: self.message.run("learn", self._learn_clicked))
        c["reset"].on_click(lambda _b: self.message.run("reset", self.reset))
        self.heading = widgets.HTML(f"<b>{html.escape(self.subject.heading)}</b>")
        self.heading.add_class(CSS["heading"])
        self.canvas = PlotCanvas(width, height)
        self.canvas.image.add_class(CSS["plot"])
        self.figure = ExplorerFigure(self.canvas, has_layer=self.subject.has_layer)
        self.axes = ValueAxes(self.figure, self.subject)
        self.readout = widgets.HTML(layout=widgets.Layout(width="270px", margin="0 0 0 8px"))
        self.readout.add_class(CSS["readout"])
        self.progress = output if output is not None else widgets.Output(
            layout=widgets.Layout(min_height="0px"))
        self.children = self.panel.layout(self.heading, self.learner.progress_box, self.canvas.image,
                                          self.readout, self.progress, self.message.widget)
        self.add_class(CSS["root"])

    def _show_note(self, change) -> None:
        """The state changed something the person did not ask for, or a choice clips a large
        share of the values: say what and why."""
        text = change["new"] if change["name"] == "note" else \
            clip_warning(self.state, self.numbers.tensor(self.state)[1])
        if text:
            self.message.info(text)
            self.state.note = ""

    # ================================================================== public state
    @property
    def layer_name(self) -> str | None: return self.subject.layer_name  # noqa: E704

    @property
    def grid(self) -> UniformGrid:
        """The current grid of the current source (per-channel: scale / offset per channel)."""
        return self.state.grid

    @property
    def source(self) -> str: return self.state.source  # noqa: E704

    @property
    def noise_steps(self) -> float:
        """Logistic noise width as a fraction of the grid step."""
        return self.state.noise_steps

    @property
    def noise(self) -> float:
        """Deprecated: :attr:`noise_steps` (a fraction of the grid step, not a value)."""
        warn_renamed("noise", "noise_steps (a fraction of the grid step)", "GridExplorer")
        return self.state.noise_steps

    @property
    def temperature(self) -> float: return self.state.temperature  # noqa: E704

    @property
    def snapshot_title(self) -> str:
        return self.subject.heading

    @property
    def stats(self) -> ErrorStats:
        """Error of the current source's tensor quantized on :attr:`grid` (all values)."""
        return self.numbers.tensor(self.state)[0]

    @property
    def usage(self) -> GridUsage:
        """Clipped fraction and bins used of the current source's tensor on :attr:`grid`."""
        return self.numbers.tensor(self.state)[1]

    @property
    def layer_stats(self) -> ErrorStats | None:
        """Layer-output error with the current source quantized on :attr:`grid`, on all rows
        (None for a tensor); equals :func:`qwidgets.layer_error` for the same grid."""
        if not self.subject.has_layer:
            return None
        return self.numbers.layer(self.state)[0]

    @property
    def readouts(self) -> dict:
        """The readout panel as plain text, name -> shown text (what a browser test can read)."""
        return {k: v for k, v in self._rows() if v is not None}

    # ================================================================== actions
    def fit(self, method: str | None = None) -> UniformGrid:
        """Fit the current source's range with ``method`` (``"minmax"``, ``"percentile"``,
        ``"mse"``; default: the method chosen in the widget), keeping bits, signedness and
        per-channel choice. Returns the new grid (also ``.grid``)."""
        grid = self.state.fit(method)
        self._note(f"fitted the range ({METHOD_LABELS[self.state.method]}, {grid.bits} bits)")
        return grid

    def learn(self, steps: int = 200, lr: float = 0.2, **options: Any) -> LearnResult:
        """Learn scale, offset and noise of the current source's grid by relaxed quantization.

        Runs :func:`qwidgets.learn_grid` on the layer's output error (needs a layer); the plots
        follow every half second; the best grid (hard quantizer's layer-output error) is kept
        for this bit width. ``options`` go to ``learn_grid`` (``temperature``: the widget's).
        The *learn* button runs the same in the background and is a stop button meanwhile."""
        return self.learner.run(int(steps), lr, options)

    def _learn_clicked(self) -> None:
        if self.learner.running:
            self.learner.stop()
        else:
            self.learner.start(int(self.controls["steps"].value))

    def reset(self) -> None:
        """Back to the fitted grid (a learned one is dropped), starting noise and temperature."""
        self.state.reset()
        self.state.noise_steps, self.state.temperature = self._start
        self._note(f"reset to the fitted grid ({self.grid.bits} bits)")

    def show_setting(self, setting: LayerSetting, *, note: bool = True) -> None:
        """Show the grids of a :class:`LayerSetting` (e.g. a plan's entry for this layer):
        its weight grid becomes the weights' grid, its input grid the input's (a per-token
        input grid is computed at run time: the input keeps its grid, and the note says so)."""
        if not isinstance(setting, LayerSetting):
            raise TypeError(f"setting must be a LayerSetting, got {type(setting).__name__}")
        pairs = [("weight" if self.subject.has_layer else "values", setting.weight)]
        if self.subject.has_layer:
            pairs.append(("input", setting.input))
        token = any(isinstance(g, TokenGrid) for _, g in pairs)
        pairs = [(source, g) for source, g in pairs if isinstance(g, UniformGrid)]
        for source, g in pairs:
            grid_params(self.subject.values[source], g)  # a grid that fits (clear error)
        for source, g in pairs:
            self.state.set_grid(g, source, origin=("given", None))
        if note or token:
            self._note("showing the given setting" + ("; its input's per-token grid is computed at "
                       "run time, so the input's grid shown is unchanged" if token else ""))

    def _note(self, text: str) -> None:
        self.message.info(text)
        self._updater.request()

    def refresh(self, sampled: bool = False) -> GridExplorer:
        """Recompute and redraw now (synchronously); errors are raised. ``sampled``: measure a
        large layer's output on a sample of the input rows, as while a control moves (the
        readout shows the estimate's +-dB); by default every number is exact."""
        self._updater.cancel()
        try:
            big = sampled and self._work() > LARGE_LAYER_MACS
            self._redraw(rows=SAMPLED_ROWS if big else None)
        except Exception as exc:
            self.message.error(exc, "refresh")
            raise
        return self

    def prefetch(self, limit: int | None = None) -> bool:
        """The work done while the kernel is idle after a draw, one step at a time: fit the other
        widths, then work out each one's figures, nearest first (``limit``: at most that many
        steps); whether any is left. A change of bits then computes no layer product."""
        st = self.state
        if limit is not None and st.fits_left():
            st.prefetch(limit)
            return True  # (the figures are worked out in the next steps)
        st.prefetch()
        # the rows a move measures the layer output on (a large layer's sample) and, where
        # that is quick, all of them (the figures once the controls are still)
        rows = (SAMPLED_ROWS,) * (self._work() > LARGE_LAYER_MACS) + (None,) * (self._work() <= WARM_EXACT_MACS)
        return not self.learner.running and self.numbers.warm_widths(st, rows, limit)

    def snapshot(self) -> tuple[bytes, str]:
        """The current plots (PNG) and readout (HTML): the static copy in the display bundle."""
        if self._updater.pending or self._moving:
            self.refresh()
        return self.canvas.last_png, self.readout.value

    def save_figure(self, path: str | os.PathLike) -> None:
        """Write the four plots as PNG or SVG (by ``path``'s extension), up to date."""
        if self._updater.pending or self._moving:
            self.refresh()
        r = self.readouts
        caption = (f"{self.subject.heading}\n{SOURCE_LABELS[self.source]}: {r['bits']}, step "
                   f"{r['step']} | clipped {r['clipped']} | SQNR: tensor {r['tensor SQNR']}")
        if self.subject.has_layer:
            caption += f", layer output {r['layer-output SQNR']}"
        self.figure.set_caption(caption)
        try:
            self.canvas.save(path)
        finally:
            self.figure.set_caption("")

    def to_setting(self, sources: str | Sequence[str] | None = None) -> LayerSetting:
        """The grids as a :class:`LayerSetting` for the plan. ``sources``: which grids to include,
        ``"weight"``, ``"input"`` or both (the default for a layer); a tensor's is the weight's."""
        return self.subject.setting(self.state.grids, sources)

    # ================================================================== drawing
    def _work(self) -> int:
        sub = self.subject
        return sub.reference.numel() * sub.values["weight"][0].numel() if sub.has_layer else 0

    def _interactive_redraw(self) -> None:
        """A scheduled redraw: large layers are measured on a sample of rows while controls
        move, and exactly once they have been still for a moment."""
        loop = running_loop()
        sample = self._work() > LARGE_LAYER_MACS and loop is not None
        self._redraw(rows=SAMPLED_ROWS if sample else None)
        if sample:
            self._moving = True
            if self._settle_handle is not None:
                self._settle_handle.cancel()
            self._settle_handle = loop.call_later(SETTLE_S, self._settle)
        self._prefetch.start()  # after a draw, fit other widths while idle, one at a time

    def _settle(self) -> None:
        self._settle_handle = None
        if self._updater.pending:
            return
        self.message.run("update", self._redraw)

    _rows_shown: int | None = None  # input rows the shown layer readout was measured on
    _probe_view: tuple | None = None  # the value axis the probe's slider spans

    def _redraw(self, rows: int | None = None) -> None:
        self._moving, self._rows_shown = rows is not None, rows
        with threads(self.refresh_threads):
            self.axes.select(self.state)
            if self.axes.place(self.state) or self._probe_view != self.figure.view:
                self._probe_view = self.figure.view
                self.panel.place_probe(self._probe_view)  # may move the probe into the view
                self._updater.cancel()  # this redraw shows it already
            # the layer output is measured on a worker thread while the other plots are drawn
            st, job = self.state, None
            if self.subject.has_layer:
                job = self.numbers.layer_soon(st, rows, threads=self.refresh_threads)
            self.figure.update(self.numbers.plot_data(st, self.figure.view, self.axes.error_sample))
            self.numbers.tensor(st)  # the readout's other figures
            if job is not None and job.waiting:
                self.canvas.encode_ahead(self.figure.ax_out)  # (and compressed) meanwhile
            if (layer := None if job is None else job()) is not None:
                self.figure.update_out(*layer[1])
            self.readout.value = self._readout_html(layer)
            self.canvas.render()

    def _rows(self, layer=None):
        st = self.state
        if self.subject.has_layer and layer is None:
            layer = self.numbers.layer(st, self._rows_shown)
        tensor = self.numbers.tensor(st)
        f = self.figure
        return readout_rows(st, tensor, None if layer is None else layer[0],
                            map_codes=f.map_codes, ticks_every=f.ticks_every)

    def _readout_html(self, layer=None) -> str:
        title = f"{SOURCE_LABELS[self.source]} on the grid"
        if self.learner.running:
            title += " (learning)"
        return readout_html(title, self._rows(layer))
