"""Text of the budget planner: the readout and the per-layer table as HTML, costs, units.

Plain functions of the planner's state (no ipywidgets, no matplotlib), so the widget stays a
holder of state and the text can be checked on its own.
"""

from __future__ import annotations

import html
import math

from ..core.renamed import warn_renamed
from ..planning.evaluate import PlanReport
from ..planning.plan import Plan
from ..planning.table import SensitivityTable

__all__ = ["KIND_LABELS", "AXIS_LABELS", "budget_kind", "plan_cost", "si_prefix",
           "fmt_cost", "plan_readout_html", "layers_html", "initial_budget"]

# the budget kinds are plan_budget's keywords and the Plan attributes of the same names
KIND_LABELS = {"model_kib": "model_kib", "planned_kib": "planned_kib", "mean_bits": "mean_bits",
               "bops": "bops"}
AXIS_LABELS = {"model_kib": "model_kib: weight storage of the whole model (KiB)",
               "planned_kib": "planned_kib: weight storage of the planned layers (KiB)",
               "mean_bits": "mean_bits: mean bits per planned weight",
               "bops": "bops: bit operations per sample"}


def budget_kind(kind: str) -> str:
    """A budget kind by today's name (``"weight_kib"``, the previous release's name of the whole
    model's storage, warns once and reads as ``"model_kib"``).

    >>> budget_kind("bops")
    'bops'
    """
    if kind == "weight_kib":
        warn_renamed("kind 'weight_kib'", "'model_kib' (or 'planned_kib')", "BudgetPlanner")
        return "model_kib"
    return kind


def plan_cost(plan: Plan, kind: str) -> float:
    """A plan's cost in one budget kind.

    >>> from qwidgets import LayerSetting, UniformGrid
    >>> p = Plan({"": LayerSetting(weight=UniformGrid(4, 0.1))}, {"": 4}, fingerprint="-",
    ...          weight_shapes={"": (2, 4)}, macs={"": 8})
    >>> plan_cost(p, "mean_bits"), plan_cost(p, "bops")
    (12.0, 256)
    """
    if kind == "model_kib" and plan.model_kib is None:  # a plan that does not record the rest
        return plan.planned_kib
    return getattr(plan, kind)


def si_prefix(scale: float) -> str:
    return {1.0: "", 1e3: "k", 1e6: "M", 1e9: "G", 1e12: "T", 1e15: "P"}.get(scale, f"x{scale:g} ")


def fmt_cost(v: float, kind: str) -> str:
    """A cost as the readout prints it.

    >>> fmt_cost(5.4321, "model_kib"), fmt_cost(1234567.0, "bops")
    ('5.43', '1,234,567')
    """
    if kind == "bops":
        return f"{v:,.0f}"
    return f"{v:,.3f}" if kind == "mean_bits" else f"{v:,.2f}"


def initial_budget(front: list) -> float:
    """A starting budget: the cheapest plan predicted within 1 dB of the best, if any."""
    best = max(s for _, s, _ in front)
    if not math.isfinite(best):
        return front[-1][0]
    for c, s, _ in front:
        if s >= best - 1.0:
            return c
    return front[-1][0]


def _db(v: float | None) -> str:
    if v is None:
        return "-"
    return "exact (no error)" if v == math.inf else f"{v:.2f} dB"


def plan_readout_html(plan: Plan, report: PlanReport | None, *, kind: str, budget: float, also: str = "",
                 predicted_db: float | None, edited: dict, metric: bool, measured_on: str,
                 dtype: str, coverage: str = "") -> str:
    """The planner's readout: budget, predicted and measured SQNR, costs, metric, model dtype.

    ``edited``: layer -> note, for layers whose grids came from an explorer (the prediction
    was made for the scan's grids); ``measured_on``: which data "measure" runs on.
    """
    pred = _db(predicted_db)
    if edited:
        pred += f" (for the scan's grids; learned grids in {', '.join(edited)}: measure to check)"
    rows = [
        ("budget", f"{fmt_cost(budget, kind)} {KIND_LABELS[kind]}{also}"),
        ("predicted SQNR", pred),
        ("measured SQNR", "press measure" if report is None else
         f"{_db(report.measured_sqnr_db)} on {measured_on}"),
        ("model_kib", "-" if plan.model_kib is None else
         f"{plan.model_kib:,.2f} KiB (the whole model: the planned weights at their planned "
         "widths, every other weight as stored)"),
        ("planned_kib", f"{plan.planned_kib:,.2f} KiB (the planned layers; float32 "
                        f"{plan.float_planned_kib:,.2f} KiB, "
                        f"{plan.float_planned_kib / plan.planned_kib:.1f}x smaller)"),
        ("scanned", coverage or "-"),
        ("mean_bits", f"{plan.mean_bits:.3f} (per planned weight)"),
        ("bops", f"{plan.bops:,} per sample (float32 {plan.float_bops:,}, "
                            f"{plan.float_bops / max(plan.bops, 1):.1f}x fewer)"),
    ]
    if metric:
        rows.append(("metric", "press measure" if report is None or report.metric_float is None else
                     f"float {report.metric_float:.4g}, planned {report.metric_planned:.4g}, "
                     f"drop {report.drop:.4g} (float - planned) on {measured_on}"))
    rows.append(("model", f"{dtype} weights"))
    cells = "".join(f"<tr><td style='padding-right:12px;color:#555'>{html.escape(k)}</td>"
                    f"<td><b>{html.escape(v)}</b></td></tr>" for k, v in rows)
    return f"<table>{cells}</table>"


def layers_html(table: SensitivityTable, plan: Plan, edited: dict) -> str:
    """One row per planned layer: bits (weight, and input where planned), size, BOPs, SQNR alone."""
    rows = plan.to_rows()
    with_inputs = any(r["input_bits"] is not None for r in rows)
    grans = getattr(table, "granularities", ("channel",))
    with_grans = len(grans) > 1  # the scan measured several: say which each entry got
    body = []
    for row in rows:
        name = row["layer"]
        w, g = row["weight_bits"], row["granularity"]
        g = g if g in grans else None
        alone = table.sqnr_db(name, w, "model", granularity=g) \
            if w in table.bits and name in table.layers else None
        note = f" ({edited[name]})" if name in edited else ""
        ig = " per token" if row.get("input_granularity") == "token" else ""  # scales at run time
        inp = f"<td style='text-align:right'>{row['input_bits'] or 'float'}{ig}</td>" if with_inputs else ""
        gcell = "" if not with_grans else f"<td style='text-align:right'>{_granularity_label(row['granularity'])}</td>"
        body.append(
            f"<tr><td>{html.escape(name + note)}</td><td style='text-align:right'>{w or 'float'}</td>{gcell}{inp}"
            f"<td style='text-align:right'>{row['params']:,}</td>"
            f"<td style='text-align:right'>{row['kib']:,.3f}</td>"
            f"<td style='text-align:right'>{row['bops']:,}</td>"
            f"<td style='text-align:right'>{'-' if alone is None else f'{alone:.1f}'}</td></tr>")
    head_in = ("<th>granularity</th>" if with_grans else "") + ("<th>input bits</th>" if with_inputs else "")
    return ("<table><tr><th>layer</th><th>weight bits</th>" + head_in +
            "<th>weights</th><th>KiB</th><th>BOPs</th><th>model SQNR alone (dB)</th></tr>"
            + "".join(body) + "</table>")


def _granularity_label(g) -> str:
    """"per channel", "per tensor", "blocks of 32" or "-" (float weights)."""
    if g is None:
        return "-"
    return f"per {g}" if isinstance(g, str) else f"blocks of {g}"
