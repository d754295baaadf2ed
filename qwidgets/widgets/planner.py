"""BudgetPlanner: pick a budget, see the best plan on the Pareto curve, check it, save it.

The budget's kind and value, a second budget and the chosen plan live in one
``traitlets.HasTraits`` model, :class:`~qwidgets.widgets.planner_state.PlannerState`
(``planner.state``); the controls are bound to it, and the figure
(:class:`~qwidgets.viz.planner_figure.PlannerFigure`), the table and the readout only draw it.
A change of the plan that the person did not ask for does not happen: a new budget unit keeps
the plan, and a budget that cannot be met is written on the message line with what was done.
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
from .events import Coalescer, MessageLine
from .fold_note import batchnorm_note
from .image_canvas import PlotCanvas
from .number_control import bind
from .plan_saving import save_plan
from .planner_controls import CSS, UNITS, planner_controls, show_limit_kind
from .planner_grids import GridTaking
from .planner_state import PlannerState, budget_positions
from .planner_tasks import PlannerTasks
from .planner_text import (
    AXIS_LABELS,
    KIND_LABELS,
    budget_kind,
    fmt_cost,
    initial_budget,
    layers_html,
    plan_cost,
    plan_readout_html,
    si_prefix,
)

__all__ = ["BudgetPlanner"]



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
    ``rules`` (:class:`qwidgets.DeviceRules`) go to the scan, the budget and the Pareto front; ``inputs`` (and ``target`` / ``eval_target`` as an index, a key or a function) pick each batch's parts everywhere, as in :func:`qwidgets.evaluate_plan`.
    A grid learned in a :class:`~qwidgets.GridExplorer` reaches the plan with :meth:`use_grid`
    (or the "use explorer's grid" button once :meth:`link_explorer` is called).

    ``state`` (:class:`~qwidgets.widgets.planner_state.PlannerState`) holds the budget
    (``kind``, ``budget``, ``limit_kind``, ``limit``) and the chosen ``plan``: set, observe or
    link its traits. The budget's slider moves 1 % a position; its box takes a typed value.

    >>> import torch
    >>> from torch import nn
    >>> _ = torch.manual_seed(0)
    >>> net = nn.Sequential(nn.Linear(8, 16), nn.ReLU(), nn.Linear(16, 4))
    >>> p = BudgetPlanner(net, torch.randn(64, 8), bits=(2, 4, 8), progress=False)
    >>> p.set_budget("mean_bits", 10).plan.mean_bits <= 10  # stored bits per weight, scales included
    True
    >>> plan = p.plan
    >>> p.state.kind = "bops"  # another unit: the same plan, the budget is its cost
    >>> p.plan is plan, p.state.budget == plan.bops
    (True, True)
    """

    def __init__(self, model: nn.Module, data: Data, *, metric: Callable | None = None, target: Any = None,
                 eval_data: Data = None, eval_target: Any = None, table: SensitivityTable | None = None,
                 bits: Sequence[int] = (2, 3, 4, 5, 6, 8), quantize: str = "weight", method: str = "mse",
                 per_channel: bool = True, assumed_input_bits: int | None = 8, max_samples: int | None = None,
                 output: Callable | None = None, progress: bool = True, width: int = 760,
                 rules: DeviceRules | None = None, estimate: str = "exact", batch_size: int | None = None,
                 inputs: int | str | Callable | None = None, **renamed: Any):
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
                         estimate=estimate, batch_size=batch_size, inputs=inputs)
        elif not isinstance(table, SensitivityTable):
            raise TypeError(f"table must be a SensitivityTable, got {type(table).__name__}")
        if "model" not in table.scopes:
            raise ValueError("the table holds no model-scope SQNR; scan with scope='model' or 'both'")
        self.model, self.data, self.metric, self.target, self.output = model, data, metric, target, output
        self.eval_data, self.eval_target, self.table, self.inputs = eval_data, eval_target, table, inputs
        self.assumed_input_bits, self.rules, self._max_samples = assumed_input_bits, check_rules(rules), max_samples
        self._fronts: dict[str, list] = {}
        self.report: PlanReport | None = None
        self._predicted: float | None = None  # the allocator's prediction for the scan's grids
        self._taken: dict = {}  # (layer, bits) -> LayerSetting taken from an explorer
        self._explorer_source, self._scale = None, 1.0  # _scale: the figure's unit for BOPs (k, M, G)
        params = [p for p in model.parameters() if p.is_floating_point()]
        self.dtype = str(params[0].dtype).replace("torch.", "") if params else "no"
        self.state = st = PlannerState()
        self._updater = Coalescer(self._update, delay=0.05,
                                  on_error=lambda e: self.message.error(e, "update"))
        # the planner's own observers first: the controls' bindings then see a consistent state
        st.observe(self._kind_changed, names="kind")
        st.observe(self._budget_changed, names="budget")
        st.observe(self._limit_kind_changed, names="limit_kind")
        st.observe(lambda _ch: self._updater.request(), names="limit")
        st.observe(lambda _ch: self._draw(), names="plan")
        self._build(width)
        self._place_budget()
        st.budget = initial_budget(self.front())
        self._updater.flush()

    # ------------------------------------------------------------------ layout
    def _build(self, width: int) -> None:
        st = self.state
        self.message = MessageLine()
        before = self.message.clear  # a person's move: a note about the state before goes
        c = planner_controls(st, on_error=self._refused, before=before)
        c["limit"].disabled = True
        self.controls = c
        for name, w in c.items():
            w.add_class(CSS[name])
        bind(st, "kind", c["kind"], on_error=self._refused, before=before)
        show = lambda: show_limit_kind(c["limit_kind"], st)  # noqa: E731
        bind(st, "limit_kind", c["limit_kind"], on_error=self._refused, before=before, show=show)
        st.observe(lambda _ch: show(), names="kind")
        c["measure"].on_click(lambda _b: self.message.run("measure", self.measure))
        c["use_grid"].on_click(lambda _b: self.message.run("use explorer's grid", self.use_grid))
        c["save"].on_click(lambda _b: self.message.run("save", lambda: self.save(c["path"].value)))
        c["path"].observe(lambda _ch: self._clear_note(), names="value")
        c["overwrite"].observe(lambda _ch: self._clear_note(), names="value")

        with_curve = self.metric is not None  # the metric curve goes under the front
        self.canvas = PlotCanvas(width, 490 if with_curve else 350)
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

    def _refused(self, exc: BaseException, name: str) -> None:
        self.message.error(exc, f"setting {name}")

    def _clear_note(self) -> None:
        self.message.clear()  # a note about the last save no longer describes these settings

    # ------------------------------------------------------------------ state
    @property
    def plan(self) -> Plan | None:
        """The chosen plan (``state.plan``)."""
        return self.state.plan

    @plan.setter
    def plan(self, plan: Plan) -> None:
        self.state.plan = plan

    @property
    def kind(self) -> str: return self.state.kind  # noqa: E704 (the budget's kind)

    @property
    def budget(self) -> float: return self.state.budget  # noqa: E704 (in the kind's unit)

    def front(self, kind: str | None = None) -> list:
        """The Pareto front for a budget kind (cached): ``[(cost, predicted dB, Plan), ...]``."""
        kind = self.kind if kind is None else kind
        if kind not in self._fronts:
            self._fronts[kind] = pareto_front(self.table, kind, assumed_input_bits=self.assumed_input_bits,
                                              rules=self.rules)
        return self._fronts[kind]

    def _span(self, kind: str) -> tuple[float, float]:
        """The costs of the front of ``kind``, and of the chosen plan."""
        front = self.front(kind)
        lo, hi = front[0][0], front[-1][0]
        if self.plan is not None:
            cost = plan_cost(self.plan, kind)
            lo, hi = min(lo, cost), max(hi, cost)
        return lo, hi

    def _place_budget(self) -> None:
        """The budget's slider spans the front of the current kind (and the plan's cost)."""
        kind = self.kind
        lo, hi = self._span(kind)
        self._scale = 10.0 ** (3 * math.floor(math.log10(hi) / 3)) if kind == "bops" and hi >= 1e3 else 1.0
        c = self.controls["budget"]
        c.slider.description = f"budget ({UNITS[kind]})"
        c.set_positions(budget_positions(lo, hi))
        front = self.front(kind)
        unit = f" ({si_prefix(self._scale)}BOPs)" if kind == "bops" and self._scale != 1 else ""
        self.figure.show_front([cost / self._scale for cost, _, _ in front], [d for _, d, _ in front],
                               AXIS_LABELS[kind] + unit)

    def _kind_changed(self, change) -> None:
        """A new budget unit keeps the plan: the budget becomes its cost in that unit."""
        st, kind = self.state, change["new"]
        note = ""
        if st.limit_kind == kind:  # one budget per kind: the second one goes, and it is said
            note = f"; the second budget in {KIND_LABELS[kind]} went (it is the budget now)"
            st.limit_kind = ""
        self._place_budget()
        if st.plan is None:
            st.budget = initial_budget(self.front(kind))
            return
        st.budget = plan_cost(st.plan, kind)
        self._draw()
        self.message.info(f"budget in {KIND_LABELS[kind]}: kept the plan, which costs "
                          f"{fmt_cost(st.budget, kind)} {KIND_LABELS[kind]}{note}")

    def _budget_changed(self, change) -> None:
        st = self.state
        if st.plan is not None and change["new"] == plan_cost(st.plan, st.kind):
            self._draw()  # the plan meets this budget exactly: it stays
            return
        self._updater.request()

    def _limit_kind_changed(self, change) -> None:
        st, kind = self.state, change["new"]
        c = self.controls["limit"]
        c.disabled = not kind
        if kind:
            lo, hi = self._span(kind)
            c.slider.description = f"limit ({UNITS[kind]})"
            c.set_positions(budget_positions(lo, hi))
            st.limit = hi if st.plan is None else plan_cost(st.plan, kind)
        else:
            c.slider.description = "limit"
        self._updater.request()

    def set_budget(self, kind: str, value: float) -> BudgetPlanner:
        """Set the budget kind (a :func:`qwidgets.plan_budget` keyword) and value, plan, and
        redraw (synchronously)."""
        kind = check_choice(budget_kind(kind), COSTS, "kind")
        if not isinstance(value, (int, float)) or isinstance(value, bool) or not math.isfinite(value):
            raise ValueError(f"budget value must be a finite number, got {value!r}")
        lo, hi = self._span(kind)
        if not lo * (1 - 1e-12) <= value <= hi * (1 + 1e-12):
            raise ValueError(f"budget {value:g} is outside the feasible range {lo:g} .. {hi:g} "
                             f"for {KIND_LABELS[kind]}")
        self.state.kind = kind
        self.state.budget = float(value)
        self._updater.cancel()
        self._update()  # a script asked for this budget: plan it, even at the plan's own cost
        return self

    def refresh(self) -> BudgetPlanner:
        """Run a pending update now (for scripts and tests)."""
        self._updater.flush()
        return self

    def _update(self) -> None:
        """Plan for the state's budget (and second budget)."""
        st = self.state
        value, lo = st.budget, self.front()[0][0]
        note = ""
        if value < lo:
            note = (f"no plan fits {fmt_cost(value, st.kind)} {KIND_LABELS[st.kind]}: planned for the "
                    f"cheapest, {fmt_cost(lo, st.kind)}")
            value = lo
        limit = {st.limit_kind: st.limit} if st.limit_kind else {}
        plan = plan_budget(self.table, **{st.kind: value}, **limit,
                           assumed_input_bits=self.assumed_input_bits, rules=self.rules)
        self._predicted = plan.predicted_sqnr_db
        for name in plan.layers:  # grids taken from an explorer come back at their width
            setting = self._taken.get((name, plan.bits[name]))
            if setting is not None:
                plan = plan.with_setting(name, setting)
        self.report = None
        self.message.clear()  # any note was about the previous plan
        if note:
            self.message.info(note)
        st.plan = plan

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
                                    output=self.output, max_samples=limit, inputs=self.inputs)
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
        p, r, st = self.plan, self.report, self.state
        if p is None:
            return
        edited = self._edited()
        also = "" if not st.limit_kind else f" and {fmt_cost(st.limit, st.limit_kind)} {KIND_LABELS[st.limit_kind]}"
        self.figure.show_choice(
            st.budget / self._scale, plan_cost(p, st.kind) / self._scale,
            self._predicted, measured_db=None if r is None else r.measured_sqnr_db,
            weight_bits=[p.layers[n].weight.bits if n in p.layers and p.layers[n].weight is not None
                         else None for n in self.table.layers],
            input_bits=[p.chosen_input_bits.get(n) for n in self.table.layers])
        self.readout.value = plan_readout_html(
            p, r, kind=st.kind, budget=st.budget, also=also, predicted_db=self._predicted, edited=edited,
            metric=self.metric is not None, measured_on=self._measured_on(), dtype=self.dtype,
            coverage=str(self.table.coverage))
        self.table_html.value = layers_html(self.table, p, edited)
        self.canvas.render()
