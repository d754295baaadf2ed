"""BudgetPlanner: pick a budget, see the best plan on the Pareto curve, check it, save it.

State lives in the planner (the table, the budget kind and value, the current plan and the
last measurement); the controls edit it and the figure, table and readouts only draw it.
Every number comes from the core: :func:`qwidgets.scan`, :func:`qwidgets.plan_budget`,
:func:`qwidgets.pareto_front`, :func:`qwidgets.evaluate_plan` and :meth:`Plan.save`.
Moving the budget slider schedules one update (:class:`~._render.Coalescer`), so dragging
it builds no backlog.
"""

from __future__ import annotations

import html
import math
import os
from collections.abc import Callable

import ipywidgets as widgets
import numpy as np
import torch
from torch import nn

from ..planning.costs import COSTS
from ..planning.evaluate import PlanReport, evaluate_plan
from ..planning.plan import CAUTION, Plan
from ..planning.scanning import scan
from ..planning.solver import pareto_front, plan_budget
from ..planning.table import SensitivityTable
from .events import Coalescer, MessageLine, observe_value
from .image_canvas import PlotCanvas

__all__ = ["BudgetPlanner"]

CSS = {
    "root": "qw-planner",
    "plot": "qw-planner-plot",
    "kind": "qw-planner-kind",
    "budget": "qw-planner-budget",
    "measure": "qw-planner-measure",
    "path": "qw-planner-path",
    "save": "qw-planner-save",
    "readout": "qw-planner-readout",
    "table": "qw-planner-table",
    "caution": "qw-planner-caution",
}
KIND_LABELS = {"weight_kib": "weight KiB", "mean_bits": "mean bits", "bops": "BOPs"}
AXIS_LABELS = {"weight_kib": "weight storage (KiB)", "mean_bits": "mean weight bits",
               "bops": "bit operations per sample"}


class BudgetPlanner(widgets.VBox):
    """Choose a budget (weight KiB, mean bits or BOPs) and see the least-noise plan for it.

    Scans ``model`` on ``data`` (model scope; keywords ``bits``, ``quantize``, ``method``,
    ``per_channel``, ``max_samples``, ``progress``, ``output`` go to :func:`qwidgets.scan`;
    ``output`` also to :func:`qwidgets.evaluate_plan`) unless a
    ``table`` is given. ``metric(output, target) -> float`` is measured for the float and the
    planned model when "measure" is pressed (:meth:`measure`). ``input_bits`` is the input
    width counted in BOPs when only weights are planned.

    >>> import torch
    >>> from torch import nn
    >>> _ = torch.manual_seed(0)
    >>> net = nn.Sequential(nn.Linear(8, 16), nn.ReLU(), nn.Linear(16, 4))
    >>> p = BudgetPlanner(net, torch.randn(64, 8), bits=(2, 4, 8), progress=False)
    >>> p.set_budget("mean_bits", 4).plan.mean_weight_bits <= 4
    True
    """

    def __init__(self, model: nn.Module, data, *, metric: Callable | None = None, target=None,
                 table: SensitivityTable | None = None, bits=(2, 3, 4, 5, 6, 8),
                 quantize: str = "weight", method: str = "mse", per_channel: bool = True,
                 input_bits: int | None = 8, max_samples: int | None = None, progress: bool = True,
                 width: int = 760, output=None):
        super().__init__()
        if not isinstance(model, nn.Module):
            raise TypeError(f"model must be a torch.nn.Module, got {type(model).__name__}")
        if metric is not None and not callable(metric):
            raise TypeError(f"metric must be a callable metric(output, target) -> float, got {type(metric).__name__}")
        if table is None:
            table = scan(model, data, bits, quantize=quantize, method=method, per_channel=per_channel,
                         scope="model", max_samples=max_samples, progress=progress, output=output)
        elif not isinstance(table, SensitivityTable):
            raise TypeError(f"table must be a SensitivityTable, got {type(table).__name__}")
        if "model" not in table.scopes:
            raise ValueError("the table holds no model-scope SQNR; scan with scope='model' or 'both'")
        self.model, self.data, self.metric, self.target = model, data, metric, target
        self.output = output
        self.table = table
        self.input_bits = input_bits
        self._max_samples = max_samples
        self._fronts: dict[str, list] = {}
        self.kind = "weight_kib"
        self.plan: Plan | None = None
        self.report: PlanReport | None = None
        self._build(width)
        self._updater = Coalescer(self._update, delay=0.05,
                                  on_error=lambda e: self.message.error(e, "update"))
        self._syncing = False
        self._exact: float | None = None
        self._set_kind("weight_kib", initial=True)

    # ------------------------------------------------------------------ layout
    def _build(self, width: int) -> None:
        c = {
            "kind": widgets.ToggleButtons(options=[(KIND_LABELS[k], k) for k in COSTS], value="weight_kib",
                                          description="budget in", style={"description_width": "70px",
                                                                          "button_width": "100px"}),
            "budget": widgets.FloatSlider(value=1.0, min=0.0, max=1.0, step=0.001, description="budget",
                                          readout_format=".4g", continuous_update=True,
                                          style={"description_width": "120px"},
                                          layout=widgets.Layout(width="520px")),
            "measure": widgets.Button(description="measure", icon="flask",
                                      tooltip="run the float and the planned model on the data",
                                      layout=widgets.Layout(width="110px")),
            "path": widgets.Text(value="plan.json", description="save to", placeholder="path/to/plan.json",
                                 style={"description_width": "60px"}, layout=widgets.Layout(width="420px")),
            "save": widgets.Button(description="save plan", icon="save", layout=widgets.Layout(width="110px")),
        }
        self.controls = c
        for name, w in c.items():
            w.add_class(CSS[name])
        c["kind"].observe(lambda ch: self.message.run("budget kind", lambda: self._set_kind(ch["new"])),
                          names="value")
        observe_value(c["budget"], self._on_budget)
        c["measure"].on_click(lambda _b: self.message.run("measure", self.measure))
        c["save"].on_click(lambda _b: self.message.run("save", lambda: self.save(c["path"].value)))

        self.canvas = PlotCanvas(width, 330)
        self.canvas.image.add_class(CSS["plot"])
        fig = self.canvas.figure
        self._ax_front = fig.add_axes((0.09, 0.15, 0.50, 0.74))
        self._ax_bits = fig.add_axes((0.72, 0.15, 0.25, 0.74))
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
        self.children = [
            c["kind"],
            widgets.HBox([c["budget"], c["measure"]], layout=widgets.Layout(align_items="center")),
            self.canvas.image,
            self.readout,
            self.table_html,
            widgets.HBox([c["path"], c["save"]], layout=widgets.Layout(align_items="center")),
            self.message.widget,
            self.caution,
        ]
        self.add_class(CSS["root"])

    # ------------------------------------------------------------------ state
    def front(self, kind: str | None = None) -> list:
        """The Pareto front for a budget kind (cached): ``[(cost, predicted dB, Plan), ...]``."""
        kind = self.kind if kind is None else kind
        if kind not in self._fronts:
            self._fronts[kind] = pareto_front(self.table, kind, input_bits=self.input_bits)
        return self._fronts[kind]

    @property
    def budget(self) -> float:
        return float(self.controls["budget"].value) * self._scale

    def _set_kind(self, kind: str, initial: bool = False) -> None:
        if kind not in COSTS:
            raise ValueError(f"kind must be one of {COSTS}, got {kind!r}")
        self.kind = kind
        front = self.front(kind)
        lo, hi = front[0][0], front[-1][0]
        self._scale = 10.0 ** (3 * math.floor(math.log10(hi) / 3)) if kind == "bops" and hi >= 1e3 else 1.0
        s = self.controls["budget"]
        self._syncing = True
        try:
            if kind == "bops":
                s.description = f"budget ({_si_prefix(self._scale)}BOPs)"
            else:
                s.description = {"weight_kib": "budget (KiB)", "mean_bits": "budget (bits)"}[kind]
            s.max = max(hi / self._scale, s.min)
            s.min = lo / self._scale
            s.max = hi / self._scale
            s.step = max((hi - lo) / self._scale / 1000, 1e-6)
            s.value = front[len(front) // 2][0] / self._scale if not initial else \
                _initial_budget(front) / self._scale
            if self.controls["kind"].value != kind:
                self.controls["kind"].value = kind
        finally:
            self._syncing = False
        self._draw_front()
        self._update()

    def _on_budget(self, change) -> None:
        if not self._syncing:
            self._updater.request()

    def set_budget(self, kind: str, value: float) -> BudgetPlanner:
        """Set the budget kind and value, plan, and redraw (synchronously)."""
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

    def _update(self) -> None:
        # set_budget's exact value, else the slider's (whose rounding must not make the
        # cheapest plan infeasible)
        exact, self._exact = self._exact, None
        value = exact if exact is not None else self.controls["budget"].value * self._scale
        value = max(value, self.front()[0][0])
        self.plan = plan_budget(self.table, **{self.kind: value}, input_bits=self.input_bits)
        self._budget_value = value
        self.report = None
        self._draw_choice()
        self._draw_readout()
        self._draw_table()
        self.canvas.render()

    def measure(self) -> PlanReport:
        """Run the float and the planned model on the data: measured SQNR and metric."""
        if self.plan is None:
            raise ValueError("no plan yet")
        target = self.target
        if self._max_samples is not None and isinstance(target, torch.Tensor):
            target = target[: self._max_samples]  # the samples the scan used
        self.report = evaluate_plan(self.model, self.data, self.plan, metric=self.metric, target=target,
                                    output=self.output, max_samples=self._max_samples)
        self._draw_readout()
        self.message.info(f"measured: {self.report.measured_sqnr_db:.2f} dB model-output SQNR")
        return self.report

    def save(self, path) -> str:
        """Write the current plan's JSON to ``path`` (errors also shown on the message line)."""
        if self.plan is None:
            raise ValueError("no plan yet")
        if not isinstance(path, (str, os.PathLike)) or not str(path).strip():
            raise ValueError("type a file path to save the plan to, e.g. plans/board.json")
        path = os.path.expanduser(str(path).strip())
        self.plan.save(path)
        self.message.info(f"saved the plan ({len(self.plan.layers)} layers) to {os.path.abspath(path)}")
        return path

    def save_figure(self, path: str | os.PathLike) -> None:
        """Write the Pareto curve and the bits-per-layer chart as PNG or SVG."""
        self.canvas.save(path)

    # ------------------------------------------------------------------ drawing
    def _make_artists(self) -> None:
        """Create every artist once; updates only change their data (no stale copies)."""
        ax = self._ax_front
        (self._front_line,) = ax.plot([], [], drawstyle="steps-post", color="#1f77b4", lw=1.4,
                                      label="Pareto front")
        (self._front_dots,) = ax.plot([], [], ".", color="#1f77b4", ms=3)
        self._budget_line = ax.axvline(0.0, color="#888888", ls="--", lw=1, label="budget")
        (self._chosen,) = ax.plot([], [], "o", color="#d62728", ms=10, label="chosen plan")
        (self._measured,) = ax.plot([], [], "D", color="#2ca02c", ms=6, label="measured")
        ax.set_ylabel("predicted model-output SQNR (dB)")
        ax.set_title("best predicted SQNR for each budget", fontsize=10)
        ax.grid(alpha=0.3)
        ax.legend(loc="lower right", fontsize=8)
        axb = self._ax_bits
        layers = self.table.layers
        y = np.arange(len(layers))
        self._bars = axb.barh(y, np.zeros(len(layers)), color="#4c72b0", height=0.7)
        axb.set_yticks(y, layers, fontsize=8 if len(layers) <= 30 else 6)
        axb.invert_yaxis()
        axb.set_xlim(0, max(self.table.bits) + 0.5)
        axb.set_xticks(list(self.table.bits))
        axb.set_xlabel("bits")
        axb.set_title("bits per layer", fontsize=10)
        axb.grid(axis="x", alpha=0.3)
        self.canvas.animate(self._budget_line, self._chosen, self._measured, *self._bars)

    def _draw_front(self) -> None:
        if not hasattr(self, "_front_line"):
            self._make_artists()
        ax = self._ax_front
        front = self.front()
        xs = np.array([c for c, _, _ in front], dtype=float) / self._scale
        ys = np.array([s for _, s, _ in front], dtype=float)
        finite = np.isfinite(ys)
        self._front_line.set_data(xs[finite], ys[finite])
        self._front_dots.set_data(xs[finite], ys[finite])
        ax.set_xlabel(AXIS_LABELS[self.kind] + (f" ({_si_prefix(self._scale)}BOPs)"
                                                if self.kind == "bops" and self._scale != 1 else ""))
        if finite.any():
            pad = max(1.0, 0.05 * (ys[finite].max() - ys[finite].min()))
            ax.set_ylim(ys[finite].min() - pad, ys[finite].max() + pad)
        span = (xs.max() - xs.min()) or 1.0
        ax.set_xlim(xs.min() - 0.02 * span, xs.max() + 0.02 * span)
        self.canvas.invalidate()

    def _draw_choice(self) -> None:
        x = self._plan_cost(self.plan) / self._scale
        self._budget_line.set_xdata([self._budget_value / self._scale] * 2)
        y = self.plan.predicted_sqnr_db
        self._chosen.set_data([x], [y if math.isfinite(y) else self._ax_front.get_ylim()[1]])
        if self.report is not None:
            self._measured.set_data([x], [self.report.measured_sqnr_db])
        else:
            self._measured.set_data([], [])
        for bar, name in zip(self._bars, self.table.layers, strict=True):
            bar.set_width(self.plan.bits.get(name, 0))

    def _plan_cost(self, plan: Plan) -> float:
        kib = plan.model_kib if plan.model_kib is not None else plan.weight_kib
        return {"weight_kib": kib, "mean_bits": plan.mean_weight_bits, "bops": plan.bops}[self.kind]

    def _draw_readout(self) -> None:
        p, r = self.plan, self.report
        rows = [
            ("budget", f"{_fmt_cost(self._budget_value, self.kind)} {KIND_LABELS[self.kind]}"),
            ("predicted SQNR", f"{p.predicted_sqnr_db:.2f} dB"),
            ("measured SQNR", "press measure" if r is None else f"{r.measured_sqnr_db:.2f} dB"),
            ("weights", f"{p.weight_kib:,.2f} KiB (float32 {p.float_weight_kib:,.2f} KiB, "
                        f"{p.float_weight_kib / p.weight_kib:.1f}x smaller)"),
            ("whole model", "-" if p.model_kib is None else
             f"{p.model_kib:,.2f} KiB (weights not planned at their stored width)"),
            ("scanned", str(self.table.coverage)),
            ("mean weight bits", f"{p.mean_weight_bits:.3f}"),
            ("BOPs per sample", f"{p.bops:,} (float32 {p.float_bops:,}, {p.float_bops / max(p.bops, 1):.1f}x fewer)"),
        ]
        if self.metric is not None:
            rows.append(("metric", "press measure" if r is None else
                         f"float {r.metric_float:.4g}, planned {r.metric_planned:.4g} "
                         f"({r.metric_planned - r.metric_float:+.4g})"))
        cells = "".join(f"<tr><td style='padding-right:12px;color:#555'>{html.escape(k)}</td>"
                        f"<td><b>{html.escape(v)}</b></td></tr>" for k, v in rows)
        self.readout.value = f"<table>{cells}</table>"
        if self._measured is not None and r is not None:
            self._draw_choice()
            self.canvas.render()

    def _draw_table(self) -> None:
        t, p = self.table, self.plan
        body = []
        for row in p.to_rows():
            name = row["layer"]
            db = t.sqnr_db(name, row["bits"], "model")
            body.append(
                f"<tr><td>{html.escape(name)}</td><td style='text-align:right'>{row['bits']}</td>"
                f"<td style='text-align:right'>{row['params']:,}</td>"
                f"<td style='text-align:right'>{row['weight_kib']:,.3f}</td>"
                f"<td style='text-align:right'>{row['bops']:,}</td>"
                f"<td style='text-align:right'>{db:.1f}</td></tr>")
        self.table_html.value = (
            "<table><tr><th>layer</th><th>bits</th><th>weights</th><th>KiB</th><th>BOPs</th>"
            "<th>model SQNR alone (dB)</th></tr>" + "".join(body) + "</table>")


def _initial_budget(front: list) -> float:
    """A starting budget: the cheapest plan predicted within 1 dB of the best, if any."""
    best = max(s for _, s, _ in front)
    if not math.isfinite(best):
        return front[-1][0]
    for c, s, _ in front:
        if s >= best - 1.0:
            return c
    return front[-1][0]


def _si_prefix(scale: float) -> str:
    return {1.0: "", 1e3: "k", 1e6: "M", 1e9: "G", 1e12: "T", 1e15: "P"}.get(scale, f"x{scale:g} ")


def _fmt_cost(v: float, kind: str) -> str:
    if kind == "bops":
        return f"{v:,.0f}"
    return f"{v:,.3f}" if kind == "mean_bits" else f"{v:,.2f}"
