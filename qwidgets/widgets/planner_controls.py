"""The budget planner's controls (by name), bound to a :class:`~.planner_state.PlannerState`.

The budget and the second budget are :class:`~.number_control.NumberControl` s: a slider of
whole positions 1 % apart and a box that prints the exact budget as the readout does and takes
a typed one. Every control carries a stable CSS class (:data:`CSS`).
"""

from __future__ import annotations

import ipywidgets as widgets

from ..planning.costs import COSTS
from .number_control import NumberControl
from .planner_state import PlannerState, budget_positions
from .planner_text import KIND_LABELS, fmt_cost

UNITS = {"model_kib": "KiB", "planned_kib": "KiB", "mean_bits": "bits", "bops": "BOPs"}  # short, for the sliders
__all__ = ["CSS", "UNITS", "limit_options", "planner_controls", "show_limit_kind"]

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


def limit_options(kind: str) -> list:
    """The second budget's kinds: none, or any but the first budget's."""
    return [("nothing else", "")] + [(KIND_LABELS[k], k) for k in COSTS if k != kind]


def show_limit_kind(control, st: PlannerState) -> None:
    """The second budget's kinds for the state's first budget, and its choice."""
    with control.hold_sync():
        control.options = limit_options(st.kind)
        control.value = st.limit_kind


def planner_controls(st: PlannerState, *, on_error, before) -> dict:
    """The planner's controls; the budgets bound to ``st`` (the rest bound by the planner).

    >>> c = planner_controls(PlannerState(), on_error=None, before=None)
    >>> sorted(c)[:4], c["budget"].box.value
    (['budget', 'kind', 'limit', 'limit_kind'], '0.00')
    """
    c = {
        "kind": widgets.ToggleButtons(options=[(KIND_LABELS[k], k) for k in COSTS], value=st.kind,
                                      description="budget in", style={"description_width": "70px",
                                                                      "button_width": "100px"}),
        "budget": NumberControl(st, "budget", budget_positions(1.0, 2.0), description="budget",
                                fmt=lambda v: fmt_cost(v, st.kind), on_error=on_error,
                                before=before, slider_width="330px", box_width="130px",
                                description_width="120px",
                                tooltip="the budget: drag (1 % a step, arrow keys too) or type it"),
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
        "limit_kind": widgets.Dropdown(options=limit_options(st.kind), value="", description="also within",
                                       style={"description_width": "80px"},
                                       layout=widgets.Layout(width="250px")),
        "limit": NumberControl(st, "limit", budget_positions(1.0, 2.0), description="limit",
                               fmt=lambda v: fmt_cost(v, st.limit_kind or st.kind), on_error=on_error,
                               before=before, slider_width="230px", box_width="130px",
                               description_width="120px", tooltip="the second budget"),
    }
    return c
