"""BudgetPlanner: pick a budget, see the best plan on the Pareto curve, check it, save it.

State lives in the planner (the table, the budget kind and value, the current plan, the grids
taken from an explorer and the last measurement); the controls edit it, and the figure
(:class:`~qwidgets.viz.planner_figure.PlannerFigure`), the table and the readout only draw it.
Every number comes from the core: :func:`qwidgets.scan`, :func:`qwidgets.plan_budget`,
:func:`qwidgets.pareto_front`, :func:`qwidgets.evaluate_plan`, :meth:`Plan.with_setting` and
:meth:`Plan.save`. Moving the budget slider schedules one update
(:class:`~.events.Coalescer`), so dragging it builds no backlog.
"""

from __future__ import annotations

import html
import math
import os
from collections.abc import Callable, Sequence
from typing import Any

import ipywidgets as widgets
import torch
from torch import nn

from ..core.checks import check_choice
from ..core.device_rules import DeviceRules, check_rules
from ..core.renamed import take_renamed
from ..model.sources import Data
from ..planning.costs import COSTS
from ..planning.evaluate import PlanReport, evaluate_plan
from ..planning.plan import CAUTION, Plan
from ..planning.scanning import scan
from ..planning.solver import pareto_front, plan_budget
from ..planning.table import SensitivityTable
from ..viz.planner_figure import PlannerFigure
from .display_snapshot import SnapshotDisplay
from .events import Coalescer, MessageLine, observe_value
from .fold_note import batchnorm_note
from .image_canvas import PlotCanvas
from .plan_saving import save_plan
from .planner_grids import GridTaking
from .planner_limit import SecondBudget
from .planner_tasks import PlannerTasks
from .planner_text import (
    AXIS_LABELS,
    KIND_LABELS,
    budget_kind,
    configure_slider,
    fmt_cost,
    initial_budget,
    layers_html,
    plan_cost,
    plan_readout_html,
    si_prefix,
)

__all__ = ["BudgetPlanner"]

CSS = {
    "root": "qw-planner",
    "plot": "qw-planner-plot",
    "kind": "qw-planner-kind",
    "budget": "qw-planner-budget",
    "measure": "qw-planner-measure",
    "use_grid": "qw-planner-use-grid",
    "path": "qw-planner-path",
    "overwrite": "qw-planner-overwrite",
    "save": "qw-planner-save",
    "limit_kind": "qw-planner-limit-kind",
    "limit": "qw-planner-limit",
    "refine": "qw-planner-refine",
    "curve": "qw-planner-curve",
    "readout": "qw-planner-readout",
    "table": "qw-planner-table",
    "caution": "qw-planner-caution",
}


class BudgetPlanner(SnapshotDisplay, GridTaking, PlannerTasks, widgets.VBox):
    """Choose a budget (``model_kib``, ``planned_kib``, ``mean_bits`` or ``bops``: the
    :func:`qwidgets.plan_budget` keywords, each limiting the :class:`Plan` attribute of that
    name) and see the least-noise plan for it.

    Scans ``model`` on ``data`` (model scope; keywords ``bits``, ``quantize``, ``method``,
    ``per_channel``, ``max_samples``, ``progress``, ``output``, ``estimate`` and ``batch_size``
    go to :func:`qwidgets.scan`) unless a ``table`` is given. "measure" (:meth:`measure`) runs
    the float and the planned model on ``eval_data`` (held-out data: give it when you have it)
    or else on ``data``, and computes ``metric(output, target) -> float`` for both, with
    ``eval_target`` (or ``target`` for ``data``). ``assumed_input_bits``: the input width
    counted in BOPs when only weights are planned (``input_bits`` until the next release).
    ``rules`` (:class:`qwidgets.DeviceRules`) go to the scan, the budget and the Pareto front.
    A grid learned in a :class:`~qwidgets.GridExplorer` reaches the plan with :meth:`use_grid`
    (or the "use explorer's grid" button once :meth:`link_explorer` is called).

    >>> import torch
    >>> from torch import nn
    >>> _ = torch.manual_seed(0)
    >>> net = nn.Sequential(nn.Linear(8, 16), nn.ReLU(), nn.Linear(16, 4))
    >>> p = BudgetPlanner(net, torch.randn(64, 8), bits=(2, 4, 8), progress=False)
    >>> p.set_budget("mean_bits", 4).plan.mean_bits <= 4
    True
    """

    def __init__(self, model: nn.Module, data: Data, *, metric: Callable | None = None, target: Any = None,
                 eval_data: Data = None, eval_target: Any = None, table: SensitivityTable | None = None,
                 bits: Sequence[int] = (2, 3, 4, 5, 6, 8), quantize: str = "weight", method: str = "mse",
                 per_channel: bool = True, assumed_input_bits: int | None = 8, max_samples: int | None = None,
                 output: Callable | None = None, progress: bool = True, width: int = 760,
                 rules: DeviceRules | None = None, estimate: str = "exact", batch_size: int | None = None,
                 **renamed: Any):
        super().__init__()
        assumed_input_bits = take_renamed(renamed, {"input_bits": "assumed_input_bits"}, "BudgetPlanner"
                                          ).get("assumed_input_bits", assumed_input_bits)
        if not isinstance(model, nn.Module):
            raise TypeError(f"model must be a torch.nn.Module, got {type(model).__name__}")
        if metric is not None and not callable(metric):
            raise TypeError(f"metric must be a callable metric(output, target) -> float, got {type(metric).__name__}")
        if output is not None and not callable(output):
            raise TypeError(f"output must be a callable picking the tensor to compare, got {type(output).__name__}")
        if eval_target is not None and eval_data is None:
            raise ValueError("eval_target needs eval_data (the held-out inputs it belongs to)")
        if table is None:
            table = scan(model, data, bits, quantize=quantize, method=method, per_channel=per_channel,
                         scope="model", max_samples=max_samples, progress=progress, output=output, rules=rules,
                         estimate=estimate, batch_size=batch_size)
        elif not isinstance(table, SensitivityTable):
            raise TypeError(f"table must be a SensitivityTable, got {type(table).__name__}")
        if "model" not in table.scopes:
            raise ValueError("the table holds no model-scope SQNR; scan with scope='model' or 'both'")
        self.model, self.data, self.metric, self.target, self.output = model, data, metric, target, output
        self.eval_data, self.eval_target, self.table = eval_data, eval_target, table
        self.assumed_input_bits = assumed_input_bits
        self.rules = check_rules(rules)
        self._max_samples = max_samples
        self._fronts: dict[str, list] = {}
        self.kind = "model_kib"
        self.plan: Plan | None = None
        self.report: PlanReport | None = None
        self._predicted: float | None = None  # the allocator's prediction for the scan's grids
        self._taken: dict = {}  # (layer, bits) -> LayerSetting taken from an explorer
        self._explorer_source = None
        self._budget_value, self._scale = 0.0, 1.0
        params = [p for p in model.parameters() if p.is_floating_point()]
        self.dtype = str(params[0].dtype).replace("torch.", "") if params else "no"
        self._build(width)
        self._updater = Coalescer(self._update, delay=0.05,
                                  on_error=lambda e: self.message.error(e, "update"))
        self._syncing, self._exact = False, None  # _exact: set_budget's value, used once
        self._set_kind("model_kib", initial=True)

    # ------------------------------------------------------------------ layout
    def _build(self, width: int) -> None:
        c = {
            "kind": widgets.ToggleButtons(options=[(KIND_LABELS[k], k) for k in COSTS], value="model_kib",
                                          description="budget in", style={"description_width": "70px",
                                                                          "button_width": "100px"}),
            "budget": widgets.FloatSlider(value=1.0, min=0.0, max=1.0, step=0.01, description="budget",
                                          readout_format=".4g", continuous_update=True,
                                          style={"description_width": "120px"},
                                          layout=widgets.Layout(width="520px")),
            "measure": widgets.Button(description="measure", icon="flask",
                                      tooltip="run the float and the planned model on the data",
                                      layout=widgets.Layout(width="110px")),
            "use_grid": widgets.Button(description="use explorer's grid", icon="arrow-down",
                                       disabled=True, tooltip="link an explorer first: link_explorer(...)",
                                       layout=widgets.Layout(width="170px")),
            "path": widgets.Text(value="plan.json", description="save to", placeholder="path/to/plan.json",
                                 style={"description_width": "60px"}, layout=widgets.Layout(width="420px")),
            "overwrite": widgets.Checkbox(value=False, description="overwrite", indent=False,
                                          layout=widgets.Layout(width="100px")),
            "save": widgets.Button(description="save plan", icon="save", layout=widgets.Layout(width="110px")),
        }
        self.limit = SecondBudget(self._on_budget)
        c["limit_kind"], c["limit"] = self.limit.kind_control, self.limit.slider
        self.controls = c
        for name, w in c.items():
            w.add_class(CSS[name])
        c["kind"].observe(lambda ch: self.message.run("budget kind", lambda: self._set_kind(ch["new"])),
                          names="value")
        observe_value(c["budget"], self._on_budget)
        observe_value(c["limit"], self._on_budget)
        c["limit_kind"].observe(lambda ch: None if self._syncing else self.message.run(
            "also within", lambda: self._set_limit(ch["new"] or None)), names="value")
        c["measure"].on_click(lambda _b: self.message.run("measure", self.measure))
        c["use_grid"].on_click(lambda _b: self.message.run("use explorer's grid", self.use_grid))
        c["save"].on_click(lambda _b: self.message.run("save", lambda: self.save(c["path"].value)))
        c["path"].observe(lambda _ch: self._clear_note(), names="value")
        c["overwrite"].observe(lambda _ch: self._clear_note(), names="value")

        with_curve = self.metric is not None  # the metric curve goes under the front
        self.canvas = PlotCanvas(width, 470 if with_curve else 330)
        self.canvas.image.add_class(CSS["plot"])
        self.figure = PlannerFigure(self.canvas, self.table.layers, self.table.bits,
                                    inputs=bool(getattr(self.table, "input_bits", ())), curve=with_curve)
        self.readout = widgets.HTML(layout=widgets.Layout(width=f"{width}px"))
        self.readout.add_class(CSS["readout"])
        self.table_html = widgets.HTML(layout=widgets.Layout(max_height="300px", overflow="auto",
                                                             width=f"{width}px"))
        self.table_html.add_class(CSS["table"])
        self.caution = widgets.HTML(
            f'<div style="font-size:90%;color:#6b4e00;background:#fff6d6;padding:4px 8px;'
            f'border-left:3px solid #e0a800">{html.escape(CAUTION)}</div>',
            layout=widgets.Layout(width=f"{width}px"))
        self.caution.add_class(CSS["caution"])
        self.message = MessageLine()
        tasks = self._build_tasks()
        self.batchnorm_note = batchnorm_note(self.model, self.table.layers, width)
        row = widgets.Layout(align_items="center")
        self.children = [
            c["kind"],
            widgets.HBox([c["budget"], c["measure"], c["use_grid"]], layout=row),
            widgets.HBox([c["limit_kind"], c["limit"]], layout=row),
            tasks,
            self.canvas.image,
            self.readout,
            self.table_html,
            widgets.HBox([c["path"], c["overwrite"], c["save"]], layout=row),
            self.message.widget,
            self.batchnorm_note,
            self.caution,
        ]
        self.add_class(CSS["root"])

    def _clear_note(self) -> None:
        self.message.clear()  # a note about the last save no longer describes these settings

    # ------------------------------------------------------------------ state
    def front(self, kind: str | None = None) -> list:
        """The Pareto front for a budget kind (cached): ``[(cost, predicted dB, Plan), ...]``."""
        kind = self.kind if kind is None else kind
        if kind not in self._fronts:
            self._fronts[kind] = pareto_front(self.table, kind, assumed_input_bits=self.assumed_input_bits,
                                              rules=self.rules)
        return self._fronts[kind]

    @property
    def budget(self) -> float:
        """The budget in the current kind's unit (what the plan was made for)."""
        return self._budget_value

    def _set_kind(self, kind: str, initial: bool = False) -> None:
        """Switch the budget kind; the current plan is kept and the budget becomes its cost."""
        kind = check_choice(budget_kind(kind), COSTS, "kind")
        if kind == self.kind and not initial:
            return
        self.kind = kind
        self._syncing = True
        try:
            if self.limit.offer(kind):  # one budget per kind: the second one went
                self.limit.set_kind(None, None, None)
        finally:
            self._syncing = False
        front = self.front(kind)
        lo, hi = front[0][0], front[-1][0]
        if self.plan is not None:
            lo, hi = min(lo, plan_cost(self.plan, kind)), max(hi, plan_cost(self.plan, kind))
        value = initial_budget(front) if self.plan is None else plan_cost(self.plan, kind)
        self._syncing = True
        try:
            self._scale = configure_slider(self.controls["budget"], kind, lo, hi, value)
            if self.controls["kind"].value != kind:
                self.controls["kind"].value = kind
        finally:
            self._syncing = False
        self._budget_value = value
        xs = [c / self._scale for c, _, _ in front]
        unit = f" ({si_prefix(self._scale)}BOPs)" if kind == "bops" and self._scale != 1 else ""
        self.figure.show_front(xs, [d for _, d, _ in front], AXIS_LABELS[kind] + unit)
        if self.plan is None:
            self._update(value)
        else:
            self._draw()
            self.message.info(f"budget in {KIND_LABELS[kind]}: kept the plan, which costs "
                              f"{fmt_cost(value, kind)} {KIND_LABELS[kind]}")

    def _on_budget(self, change) -> None:
        if not self._syncing:
            self._updater.request()

    def set_budget(self, kind: str, value: float) -> BudgetPlanner:
        """Set the budget kind (a :func:`qwidgets.plan_budget` keyword) and value, plan, and
        redraw (synchronously)."""
        kind = budget_kind(kind)
        if kind != self.kind:
            self._set_kind(kind)
        if not isinstance(value, (int, float)) or isinstance(value, bool) or not math.isfinite(value):
            raise ValueError(f"budget value must be a finite number, got {value!r}")
        s = self.controls["budget"]
        v = value / self._scale
        if not s.min - 1e-12 <= v <= s.max + 1e-12:
            raise ValueError(f"budget {value:g} is outside the feasible range "
                             f"{s.min * self._scale:g} .. {s.max * self._scale:g} for {KIND_LABELS[kind]}")
        self._syncing = True
        try:
            s.value = min(max(v, s.min), s.max)
        finally:
            self._syncing = False
        self._exact = float(value)
        self._update()
        return self

    def refresh(self) -> BudgetPlanner:
        """Run a pending update now (for scripts and tests)."""
        self._updater.flush()
        return self

    def _update(self, value: float | None = None) -> None:
        """Plan for the budget (``value``, else set_budget's exact value, else the slider's)."""
        exact, self._exact = self._exact, None
        if value is None:
            value = exact if exact is not None else self.controls["budget"].value * self._scale
        value = max(value, self.front()[0][0])  # the slider's rounding must not make it infeasible
        plan = plan_budget(self.table, **{self.kind: value}, **self.limit.kwargs(),
                           assumed_input_bits=self.assumed_input_bits, rules=self.rules)
        self._predicted = plan.predicted_sqnr_db
        for name in plan.layers:  # grids taken from an explorer come back at their width
            setting = self._taken.get((name, plan.bits[name]))
            if setting is not None:
                plan = plan.with_setting(name, setting)
        self.plan = plan
        self._budget_value = value
        self.report = None
        self.message.clear()  # any note was about the previous plan
        self._draw()

    def _set_limit(self, kind: str | None) -> None:
        """A second budget that plans must meet too (None: none); it starts at the plan's cost."""
        self._syncing = True
        try:
            self.limit.set_kind(kind, None if kind is None else self.front(kind),
                                None if kind is None or self.plan is None else plan_cost(self.plan, kind))
        finally:
            self._syncing = False
        self._update(self._budget_value)

    def _edited(self) -> dict:
        return {n: "learned grid" for n in self.plan.layers if (n, self.plan.bits[n]) in self._taken}

    def measure(self) -> PlanReport:
        """Run the float and the planned model on the held-out data (else the scan's data)."""
        if self.plan is None:
            raise ValueError("no plan yet")
        if self.eval_data is not None:
            data, target = self.eval_data, self.eval_target
            limit = None
        else:
            data, target, limit = self.data, self.target, self._max_samples
            if limit is not None and isinstance(target, torch.Tensor):
                target = target[:limit]  # the samples the scan used
        self.report = evaluate_plan(self.model, data, self.plan, metric=self.metric, target=target,
                                    output=self.output, max_samples=limit)
        self._draw()
        self.message.info(f"measured: {self.report.measured_sqnr_db:.2f} dB model-output SQNR "
                          f"on {self._measured_on()}")
        return self.report

    def _measured_on(self) -> str:
        return "the held-out data" if self.eval_data is not None else "the scan's data"

    # ------------------------------------------------------------------ files
    def save(self, path: str | os.PathLike, overwrite: bool | None = None) -> str:
        """Write the current plan's JSON; returns the path written.

        An existing file is replaced only with ``overwrite`` (default: the "overwrite" box);
        otherwise the plan goes to the first free numbered name (``plan-1.json``, ...). The
        message line says what was written where.
        """
        if self.plan is None:
            raise ValueError("no plan yet")
        if overwrite is None:
            overwrite = self.controls["overwrite"].value
        target, note = save_plan(self.plan, path, bool(overwrite))
        self.message.info(note)
        return target

    snapshot_title = "Budget planner"

    def snapshot(self) -> tuple[bytes, str]:
        """The figure as PNG and readout, table and caution as HTML (a static copy)."""
        return self.canvas.last_png, self.readout.value + self.table_html.value + self.caution.value

    def save_figure(self, path: str | os.PathLike) -> None:
        """Write the Pareto curve and the bits-per-layer chart as PNG or SVG."""
        self.canvas.save(path)

    # ------------------------------------------------------------------ drawing
    def _draw(self) -> None:
        p, r = self.plan, self.report
        edited = self._edited()
        self.figure.show_choice(
            self._budget_value / self._scale, plan_cost(p, self.kind) / self._scale,
            self._predicted, measured_db=None if r is None else r.measured_sqnr_db,
            weight_bits=[p.layers[n].weight.bits if n in p.layers and p.layers[n].weight is not None
                         else None for n in self.table.layers],
            input_bits=[p.chosen_input_bits.get(n) for n in self.table.layers])
        self.readout.value = plan_readout_html(
            p, r, kind=self.kind, budget=self._budget_value, also=self.limit.text(), predicted_db=self._predicted, edited=edited,
            metric=self.metric is not None, measured_on=self._measured_on(), dtype=self.dtype,
            coverage=str(self.table.coverage))
        self.table_html.value = layers_html(self.table, p, edited)
        self.canvas.render()
