"""A second budget for the planner: plans must meet both (for example weight KiB AND BOPs)."""

from __future__ import annotations

import ipywidgets as widgets

from ..planning.costs import COSTS
from .planner_text import KIND_LABELS, configure_slider, fmt_cost

__all__ = ["SecondBudget"]


class SecondBudget:
    """The "also within" kind (or none) and its slider; :meth:`kwargs` gives ``plan_budget``'s
    extra budget. The slider spans the costs of the Pareto front of that kind."""

    def __init__(self, on_change):
        self.kind_control = widgets.Dropdown(
            options=[("nothing else", "")] + [(KIND_LABELS[k], k) for k in COSTS], value="",
            description="also within", style={"description_width": "80px"},
            layout=widgets.Layout(width="250px"))
        self.slider = widgets.FloatSlider(value=1.0, min=0.0, max=1.0, step=0.01, description="limit",
                                          readout_format=".4g", disabled=True,
                                          style={"description_width": "120px"},
                                          layout=widgets.Layout(width="420px"))
        self.scale = 1.0
        self._on_change = on_change

    def offer(self, primary: str) -> bool:
        """Offer every kind but the first budget's; returns True when the chosen one had to go."""
        keep = self.kind_control.value
        self.kind_control.options = [("nothing else", "")] + [(KIND_LABELS[k], k) for k in COSTS if k != primary]
        self.kind_control.value = keep if keep != primary else ""
        return keep == primary

    @property
    def kind(self) -> str | None:
        return self.kind_control.value or None

    def set_kind(self, kind: str | None, front: list | None, current: float | None) -> None:
        """Use ``kind`` as the second budget (None: none), its slider at ``current``."""
        if kind is None:
            self.slider.disabled = True
            self.slider.description = "limit"
            return
        lo, hi = front[0][0], front[-1][0]
        if current is not None:
            lo, hi = min(lo, current), max(hi, current)
        self.scale = configure_slider(self.slider, kind, lo, hi, hi if current is None else current,
                                      label="limit")
        self.slider.disabled = False

    def value(self) -> float | None:
        return None if self.kind is None else self.slider.value * self.scale

    def kwargs(self) -> dict:
        return {} if self.kind is None else {self.kind: self.value()}

    def text(self) -> str:
        """The readout's words for it ("" when there is none)."""
        return "" if self.kind is None else f" and {fmt_cost(self.value(), self.kind)} {KIND_LABELS[self.kind]}"
