"""The budget planner's state: one ``traitlets.HasTraits`` model, the one place it lives.

:class:`PlannerState` holds the budget's kind and value, an optional second budget and the
chosen plan (``budget.plan``). A user can ``observe`` it (e.g. react to every new plan) or
``link`` their own controls to it; the planner's controls are bound to it and its views only
render it. The rules that keep a person's plan:

- a new ``kind`` keeps the plan; the budget becomes the plan's cost in the new unit;
- a ``budget`` equal to the plan's cost keeps the plan (the plan meets it exactly);
- any other budget, or a second budget (``limit_kind`` and ``limit``), plans anew
  (:func:`qwidgets.plan_budget`), and grids taken from an explorer come back at their width.
"""

from __future__ import annotations

import math

import traitlets

from ..planning.costs import COSTS
from ..planning.plan import Plan
from .number_control import LinearPositions, LogPositions
from .planner_text import budget_kind

__all__ = ["PlannerState", "budget_positions", "BUDGET_RATIO"]

BUDGET_RATIO = 1.01  # one slider position (one arrow key) moves a budget by 1 %


class PlannerState(traitlets.HasTraits):
    """What a :class:`~qwidgets.BudgetPlanner` plans for and shows (``planner.state``).

    >>> st = PlannerState()
    >>> st.kind, st.limit_kind, st.plan is None
    ('model_kib', '', True)
    >>> st.limit_kind = "model_kib"  # the second budget must be of another kind
    Traceback (most recent call last):
    ...
    traitlets.traitlets.TraitError: limit_kind must differ from kind ('model_kib'); give another kind or ''
    """

    kind = traitlets.Enum(COSTS, default_value="model_kib", help="the budget's unit (a plan_budget keyword)")
    budget = traitlets.Float(0.0, help="the budget in the kind's unit (exact)")
    limit_kind = traitlets.Unicode("", help="a second budget's unit ('' for none)")
    limit = traitlets.Float(0.0, help="the second budget in its unit (exact)")
    plan = traitlets.Instance(Plan, allow_none=True, help="the chosen plan")

    @traitlets.validate("kind")
    def _check_kind(self, proposal):
        return budget_kind(proposal["value"])  # the previous release's "weight_kib" reads as "model_kib"

    @traitlets.validate("budget", "limit")
    def _check_number(self, proposal):
        v = float(proposal["value"])
        if not (math.isfinite(v) and v >= 0):
            raise traitlets.TraitError(f"{proposal['trait'].name} must be a finite number >= 0, "
                                       f"got {proposal['value']!r}")
        return v

    @traitlets.validate("limit_kind")
    def _check_limit_kind(self, proposal):
        v = proposal["value"] or ""
        if v and v not in COSTS:
            raise traitlets.TraitError(f"limit_kind must be one of {COSTS} or '', got {v!r}")
        if v and v == self.kind:
            raise traitlets.TraitError(f"limit_kind must differ from kind ({self.kind!r}); "
                                       "give another kind or ''")
        return v


def budget_positions(lo: float, hi: float):
    """Slider positions for budgets from ``lo`` to ``hi``: 1 % apart (a log scale), so the
    keyboard and the mouse move finely near any plan; linear when ``lo`` is 0.

    >>> p = budget_positions(2.0, 8.0)
    >>> p.n, round(p.value(1) / p.value(0), 4)
    (140, 1.01)
    """
    if not hi > lo:
        hi = lo * BUDGET_RATIO if lo > 0 else lo + 1.0
    if lo > 0:
        return LogPositions(lo, hi, ratio=BUDGET_RATIO)
    return LinearPositions(lo, hi, 100)
