"""ScanView: the sensitivity heatmap and table; picking a layer opens its grid explorer below.

The view draws a :class:`~qwidgets.scan.SensitivityTable` (made by :func:`qwidgets.scan`, or
given); it computes nothing itself. Its state (the scope shown, the layer and width chosen) is
a ``traitlets.HasTraits`` model, :class:`ScanState` (``view.state``), the controls are bound to.
A table with input rows (``quantize="separate"``) shows them beside the weight rows; a table
of several weight granularities (or with per-token input rows) offers a choice of the rows
shown (``state.granularity``, ``state.input_granularity``), and the explorer opens on the
weight granularity shown. Picking a layer (the drop-down, or :meth:`ScanView.pick`)
marks its row in the heatmap (:class:`~qwidgets.viz.scan_figure.ScanFigure`) and opens a :class:`~qwidgets.widgets.explorer.GridExplorer` for
that layer, starting at the picked bit width with the scan's range method.
"""

from __future__ import annotations

import html
import os
from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING

import ipywidgets as widgets
import traitlets
from torch import nn

from ..core.checks import check_choice
from ..core.setting import LayerSetting
from ..model.picking import split_data
from ..model.sources import Data
from ..planning.plan import Plan
from ..planning.scanning import scan
from ..planning.table import SensitivityTable
from ..planning.table_html import how_measured
from ..viz.heatmap import sqnr_limits, sqnr_table_html
from ..viz.scan_figure import ScanFigure
from .display_snapshot import SnapshotDisplay
from .events import MessageLine
from .explorer_blocks import granularity_label
from .fold_note import batchnorm_note
from .image_canvas import PlotCanvas
from .number_control import bind

if TYPE_CHECKING:
    from .planner import BudgetPlanner

__all__ = ["ScanView", "ScanState"]

CSS = {
    "root": "qw-scanview",
    "plot": "qw-scan-heatmap",
    "table": "qw-scan-table",
    "layer": "qw-scan-layer",
    "bits": "qw-scan-bits",
    "scope": "qw-scan-scope",
    "granularity": "qw-scan-granularity",
    "input_granularity": "qw-scan-input-granularity",
    "open": "qw-scan-open",
    "use_grid": "qw-scan-use-grid",
    "explorer": "qw-scan-explorer",
}
SCOPE_LABELS = {"model": "model output", "layer": "layer output"}


class ScanState(traitlets.HasTraits):
    """What a :class:`ScanView` shows (``view.state``): the scope, the granularity of the
    weight rows and of the input rows shown, and the layer and width chosen for the explorer.
    Set, observe or link these traits.

    >>> st = ScanState(scope="model", layer="fc", bits=4, granularity=32)
    >>> st.scope, st.layer, st.bits, st.granularity, st.input_granularity
    ('model', 'fc', 4, 32, 'tensor')
    """

    scope = traitlets.Enum(("model", "layer"), default_value="model", help="whose output's SQNR")
    layer = traitlets.Unicode("", help="the layer chosen")
    bits = traitlets.Int(4, help="the width chosen")
    granularity = traitlets.Union([traitlets.Enum(("tensor", "channel")), traitlets.Int()], default_value="channel",
                                  help="the weight rows shown: 'tensor', 'channel' or a block size")
    input_granularity = traitlets.Enum(("tensor", "token"), default_value="tensor",
                                       help="the input rows shown: one fitted scale, or a scale per token")
    options = traitlets.Dict(help="trait -> the values the table holds (checked when set)")

    @traitlets.validate("granularity", "input_granularity")
    def _check_option(self, proposal):
        name, v = proposal["trait"].name, proposal["value"]
        scanned = self.options.get(name)
        if scanned is not None and v not in scanned:
            raise traitlets.TraitError(f"{name} must be one the table scanned, {list(scanned)}; got {v!r}")
        return v


class ScanView(SnapshotDisplay, widgets.VBox):
    """Heatmap and table of a sensitivity scan; pick a layer to explore its grid below.

    ``ScanView(model, data, ...)`` runs :func:`qwidgets.scan` (keywords ``bits``,
    ``quantize``, ``method``, ``per_channel``, ``scope``, ``max_samples``, ``progress``,
    ``output``, ``estimate`` and ``batch_size`` go to it; ``inputs`` picks the model's inputs
    from each batch, as there); ``ScanView(table)`` shows a table made before (add ``model=`` and
    ``data=`` to open explorers from it). The scope toggle switches heatmap and table together;
    both use one colour scale (the same for both scopes). With a planner linked
    (:meth:`link_planner`), "use grid in plan" puts the open explorer's grid into its plan.

    >>> import torch
    >>> from torch import nn
    >>> _ = torch.manual_seed(0)
    >>> net = nn.Sequential(nn.Linear(8, 16), nn.ReLU(), nn.Linear(16, 4))
    >>> view = ScanView(net, torch.randn(32, 8), bits=(2, 4, 8), progress=False)
    >>> view.pick("2", bits=4).explorer.grid.bits, view.selected
    (4, ('2', 4))
    """

    def __init__(self, obj: nn.Module | SensitivityTable, data: Data = None, *,
                 model: nn.Module | None = None, bits: Sequence[int] = (2, 3, 4, 5, 6, 8),
                 quantize: str = "weight", method: str = "mse", per_channel: bool = True,
                 scope: str = "both", max_samples: int | None = None, output: Callable | None = None,
                 progress: bool = True, width: int = 720, estimate: str = "exact",
                 batch_size: int | None = None, inputs: int | str | Callable | None = None):
        super().__init__()
        if data is not None:  # the model's inputs of each batch, for the scan and the explorers
            data, _ = split_data(data, inputs)
        if isinstance(obj, SensitivityTable):
            if (model is None) != (data is None):
                raise TypeError("to open explorers from a table give both model= and data=")
            if model is not None and not isinstance(model, nn.Module):
                raise TypeError(f"model must be a torch.nn.Module, got {type(model).__name__}")
            self.table, self.model, self.data = obj, model, data
        elif isinstance(obj, nn.Module):
            if data is None:
                raise TypeError("ScanView(model, data): data is missing")
            if model is not None:
                raise TypeError("give the model once: ScanView(model, data) or ScanView(table, model=..., data=...)")
            self.model, self.data = obj, data
            if output is not None and not callable(output):
                raise TypeError(f"output must be a callable picking the tensor to compare, got {type(output).__name__}")
            self.table = scan(obj, data, bits, quantize=quantize, method=method, per_channel=per_channel,
                              scope=scope, max_samples=max_samples, progress=progress, output=output,
                              estimate=estimate, batch_size=batch_size)
        else:
            raise TypeError(f"ScanView takes a model and its data, or a SensitivityTable; got {type(obj).__name__}")
        self._max_samples = max_samples
        self.explorer = None
        self.planner = None
        self.selected: tuple[str, int] | None = None
        t = self.table
        self.state = ScanState(scope="model" if "model" in t.scopes else "layer", layer=t.layers[0],
                               bits=t.bits[len(t.bits) // 2], granularity=t.granularities[0],
                               options={"granularity": tuple(t.granularities),
                                        "input_granularity": tuple(t.input_granularities)})
        self.inputs = t.quantize == "separate"  # input rows beside the weight rows
        # one colour scale for heatmap and table, for both scopes and both kinds of rows
        self.color_limits = sqnr_limits(*(t.sqnr_array(s, granularity=g) for s in t.scopes for g in t.granularities),
                                        *(t.sqnr_array(s, "input", g) for s in t.scopes if self.inputs
                                          for g in t.input_granularities))
        self._build(width)
        self.state.observe(lambda ch: self.message.run(ch["name"], self._draw),
                           names=["scope", "granularity", "input_granularity"])
        self._draw()

    # ------------------------------------------------------------------ layout
    def _build(self, width: int) -> None:
        t = self.table
        self.message = MessageLine()
        self.controls = {
            "scope": widgets.ToggleButtons(options=[(SCOPE_LABELS[s], s) for s in t.scopes],
                                           value=self.state.scope, description="SQNR of",
                                           style={"description_width": "60px", "button_width": "110px"}),
            "granularity": widgets.ToggleButtons(
                options=[(granularity_label(g), g) for g in t.granularities], value=self.state.granularity,
                description="weights", tooltip="the weight grids whose SQNR is shown",
                style={"description_width": "60px", "button_width": "100px"}),
            "input_granularity": widgets.ToggleButtons(
                options=[(granularity_label(g), g) for g in t.input_granularities],
                value=self.state.input_granularity, description="inputs",
                tooltip="the input grids whose SQNR is shown (per token: scales computed at run time)",
                style={"description_width": "60px", "button_width": "100px"}),
            "layer": widgets.Dropdown(options=t.layers, value=self.state.layer, description="layer",
                                      style={"description_width": "60px"},
                                      layout=widgets.Layout(width="260px")),
            "bits": widgets.Dropdown(options=list(t.bits), value=self.state.bits,
                                     description="bits", style={"description_width": "40px"},
                                     layout=widgets.Layout(width="130px")),
            "open": widgets.Button(description="explore layer", icon="search",
                                   disabled=self.model is None,
                                   tooltip="open a grid explorer for this layer below"
                                   if self.model is not None else "give model= and data= to explore",
                                   layout=widgets.Layout(width="140px")),
            "use_grid": widgets.Button(description="use grid in plan", icon="arrow-down", disabled=True,
                                       tooltip="link a BudgetPlanner first: view.link_planner(planner)",
                                       layout=widgets.Layout(width="150px")),
        }
        for name, w in self.controls.items():
            w.add_class(CSS[name])
        refused = lambda exc, name: self.message.error(exc, f"setting {name}")  # noqa: E731
        for name in ("scope", "granularity", "input_granularity", "layer", "bits"):  # a stale note goes
            bind(self.state, name, self.controls[name], on_error=refused, before=self.message.clear)
        self.controls["open"].on_click(lambda _b: self.message.run("explore", lambda: self.pick(
            self.state.layer, bits=self.state.bits)))
        self.controls["use_grid"].on_click(lambda _b: self.message.run("use grid in plan", self.use_grid))
        rows = len(t.layers)
        height = int(min(900, max(220, 120 + 26 * rows)))
        width = width + (140 + 40 * len(t.input_bits) if self.inputs else 0)
        self.canvas = PlotCanvas(width, height)
        self.canvas.image.add_class(CSS["plot"])
        self.figure = ScanFigure(self.canvas)
        self.table_html = widgets.HTML(layout=widgets.Layout(max_height="360px", overflow="auto",
                                                             width=f"{width}px"))
        self.table_html.add_class(CSS["table"])
        self.explorer_box = widgets.VBox([])
        self.explorer_box.add_class(CSS["explorer"])
        bar = widgets.HBox([self.controls["layer"], self.controls["bits"], self.controls["open"],
                            self.controls["use_grid"]],
                           layout=widgets.Layout(align_items="center"))
        self.batchnorm_note = batchnorm_note(self.model, t.layers, width)
        choices = [self.controls[k] for k, n in (("granularity", len(t.granularities)),
                                                 ("input_granularity", len(t.input_granularities))) if n > 1]
        self.children = [widgets.HBox([self.controls["scope"], *choices]), self.canvas.image, self.table_html,
                         bar, self.message.widget, self.batchnorm_note, self.explorer_box]
        self.add_class(CSS["root"])

    # ------------------------------------------------------------------ drawing
    def _draw(self) -> None:
        """Heatmap and table of the current scope, with the one colour scale."""
        t, (vmin, vmax), st = self.table, self.color_limits, self.state
        scope, g, ig = st.scope, st.granularity, st.input_granularity
        how = ", estimated" if how_measured(t, scope) else ""
        what = "weights" if self.inputs else t.quantize
        if len(t.granularities) > 1:
            what = f"\n{what}, {granularity_label(g)},"  # a second line: the title stays inside
        inputs = None
        if self.inputs:
            inputs = (t.sqnr_array(scope, "input", ig), t.input_bits,
                      "layer inputs quantized" + (" per token" if ig == "token" else ""))
        self.figure.show(t.sqnr_array(scope, granularity=g), t.layers, t.bits,
                         f"{SCOPE_LABELS[scope]} SQNR (dB{how}), one layer at a time: {what} quantized",
                         vmin=vmin, vmax=vmax, inputs=inputs)
        html_ = sqnr_table_html(t, scope, vmin, vmax, granularity=g)
        if self.inputs:
            html_ += sqnr_table_html(t, scope, vmin, vmax, source="input", granularity=ig)
        self.table_html.value = html_
        self.canvas.render()

    # ------------------------------------------------------------------ actions
    def set_scope(self, scope: str) -> ScanView:
        """Show the model-output or the layer-output SQNR (whichever the table holds)."""
        check_choice(scope, self.table.scopes, "scope")  # the scopes this table holds
        self.state.scope = scope
        return self

    def pick(self, layer: str, bits: int | None = None) -> ScanView:
        """Mark ``layer`` (at ``bits``) and open a grid explorer for it below the table."""
        t = self.table
        if layer not in t.layers:
            raise ValueError(f"layer {layer!r} is not in the scan; layers: {t.layers}")
        bits = self.state.bits if bits is None else bits
        if bits not in t.bits:
            raise ValueError(f"bits must be one of the scanned widths {list(t.bits)}, got {bits!r}")
        self.state.layer, self.state.bits = layer, int(bits)
        self.selected = (layer, int(bits))
        self.figure.mark(t.layers.index(layer), t.bits.index(bits))
        self.canvas.render()
        self.message.clear()
        if self.model is None:
            self.message.info(f"{layer} at {bits} bits: {_summary(t, layer, bits, self.state.granularity)} "
                              "(give model= and data= to explore the grid)")
            return self
        if not t.has_input(layer) or t.kind(layer) != "layer":
            self.message.info(f"{layer} at {bits} bits: {_summary(t, layer, bits, self.state.granularity)} (a "
                              f"{t.layer_type(layer)} entry: the grid explorer opens layers run as "
                              "modules)")
            return self
        from .explorer import GridExplorer

        g = self.state.granularity  # the explorer opens on the granularity shown
        self.explorer = GridExplorer(self.model, self.data, layer=layer, bits=int(bits),
                                     method=t.method, per_channel=g != "tensor" and t.quantize != "input",
                                     source="input" if t.quantize == "input" else "weight",
                                     max_samples=self._max_samples)
        grid = t.weight_grid(layer, int(bits), granularity=g) if isinstance(g, int) else None
        if grid is not None:  # a block grid: the scan's own
            self.explorer.show_setting(LayerSetting(weight=grid), note=False)
        self.explorer_box.children = [widgets.HTML(f"<b>Grid explorer: layer {html.escape(layer)}</b>"),
                                      self.explorer]
        self.controls["use_grid"].disabled = self.planner is None
        self.message.info(f"{layer} at {bits} bits: {_summary(t, layer, bits, self.state.granularity)}")
        return self

    def link_planner(self, planner: BudgetPlanner) -> ScanView:
        """Let "use grid in plan" put the open explorer's grid into ``planner``'s plan; the
        planner's own "use explorer's grid" button then takes this view's open explorer too."""
        from .planner import BudgetPlanner

        if not isinstance(planner, BudgetPlanner):
            raise TypeError(f"planner must be a BudgetPlanner, got {type(planner).__name__}")
        self.planner = planner
        planner.link_explorer(self)
        b = self.controls["use_grid"]
        b.disabled = self.explorer is None
        b.tooltip = "put the explorer's grid into the linked planner's plan"
        return self

    def use_grid(self) -> Plan:
        """Put the open explorer's grid into the linked planner's plan (see
        :meth:`BudgetPlanner.use_grid`); returns the planner's new plan."""
        if self.planner is None:
            raise ValueError("no planner linked: call view.link_planner(planner) first")
        if self.explorer is None:
            raise ValueError("no explorer open: pick a layer and press explore layer")
        plan = self.planner.use_grid(self.explorer)
        self.message.info(self.planner.message.text)
        return plan

    @property
    def snapshot_title(self) -> str:
        return f"Sensitivity scan: {SCOPE_LABELS[self.state.scope]} SQNR, {len(self.table.layers)} layers"

    def snapshot(self) -> tuple[bytes, str]:
        """The heatmap as PNG and the table (with the message line) as HTML: a static copy of
        what the view shows, for notebooks viewed without a kernel."""
        note = f"<div>{html.escape(self.message.text)}</div>" if self.message.text else ""
        return self.canvas.last_png, self.table_html.value + note

    def save_figure(self, path: str | os.PathLike) -> None:
        """Write the heatmap as PNG or SVG (by the file's extension)."""
        self.canvas.save(path)


def _summary(t: SensitivityTable, layer: str, bits: int, g=None) -> str:
    """The picked cell's figures (weights on the ``g`` grids shown, when the table has several)."""
    g = None if g is None or t.quantize == "input" or t.kind(layer) == "activation" else g
    parts = [f"{s} SQNR {t.sqnr_db(layer, bits, s, granularity=g):.2f} dB" for s in t.scopes]
    if len(t.granularities) > 1 and g is not None:
        parts[0] = f"{granularity_label(g)}: {parts[0]}"
    parts.append(f"{t.params(layer):,} weights, {t.macs(layer):,} MACs per sample")
    return ", ".join(parts)


