"""The user's metric along the Pareto front: plans at several budgets, each measured on data."""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from numbers import Integral
from typing import Any

import numpy as np
from torch import nn

from ..core.device_rules import DeviceRules
from .bootstrap import check_confidence
from .choices import check_cost
from .evaluate import evaluate_plan
from .old_names import cost_name
from .plan import Plan
from .solver import pareto_front
from .table import SensitivityTable


@dataclass(frozen=True)
class CurvePoint:
    """One budget of :func:`metric_curve`: its plan, predicted and measured SQNR, the metric of
    the float and the planned model, and the paired bootstrap interval of the drop.

    ``drop`` is ``metric_float - metric_planned`` (positive: the plan does worse);
    ``drop_low`` / ``drop_high`` bound it at the curve's confidence (resampling samples).
    """

    budget: float
    plan: Plan
    predicted_sqnr_db: float
    measured_sqnr_db: float
    metric_float: float
    metric_planned: float
    drop: float
    drop_low: float
    drop_high: float


def metric_curve(model: nn.Module, data: Any, table: SensitivityTable, *, metric: Callable,
                 target: Any = None, cost: str = "model_kib", points: int = 6, confidence: float = 0.95,
                 n_boot: int = 1000, seed: int = 0, progress: Callable | None = None,
                 output: Callable | None = None, inputs: int | str | Callable | None = None,
                 assumed_input_bits: int | None = 8, rules: DeviceRules | None = None) -> list[CurvePoint]:
    """The metric at ``points`` budgets spread evenly in cost along the Pareto front.

    ``cost`` as in :func:`pareto_front` (``"model_kib"``, ``"planned_kib"``, ``"mean_bits"``,
    ``"bops"``): each point's ``budget`` is in that unit and limits the plan's attribute of the
    same name (``getattr(point.plan, cost) <= point.budget``); ``assumed_input_bits`` and
    ``rules`` as in :func:`pareto_front`, so the curve's plans are the front's.

    For each budget: the least-noise plan of that cost or less (the front's point), applied
    to a copy of ``model`` and run on ``data`` with the float model; ``metric(output, target)
    -> float`` on both; the drop with a paired percentile bootstrap interval at
    ``confidence`` over ``n_boot`` resamples of the samples (Efron & Tibshirani 1993; see
    :func:`qwidgets.evaluate_plan` for how outputs and target are indexed: axis 0 is the
    sample axis). Use held-out data, not the data the table was scanned on: the interval
    covers the sampling of the data, not a choice made on the same data. ``progress(i,
    total)``, if given, is called after each point; raising in it stops the curve.
    ``output``, ``inputs`` and ``target`` as in :func:`qwidgets.evaluate_plan` (the measured
    SQNR compares ``output(model output)``; ``inputs`` / ``target`` may pick each batch's parts).

    >>> import torch
    >>> from torch import nn
    >>> from qwidgets import scan
    >>> _ = torch.manual_seed(0)
    >>> net = nn.Sequential(nn.Linear(8, 16), nn.ReLU(), nn.Linear(16, 3)).eval()
    >>> x, y = torch.randn(200, 8), torch.randint(0, 3, (200,))
    >>> t = scan(net, x[:100], bits=(2, 8), progress=False)
    >>> acc = lambda out, tgt: float((out.argmax(1) == tgt).float().mean())
    >>> curve = metric_curve(net, x[100:], t, metric=acc, target=y[100:], points=3, n_boot=200)
    >>> len(curve), curve[-1].measured_sqnr_db > curve[0].measured_sqnr_db
    (3, True)
    >>> all(p.drop_low <= p.drop <= p.drop_high for p in curve)
    True
    """
    if not callable(metric):
        raise TypeError(f"metric must be a callable metric(output, target) -> float, got {type(metric).__name__}")
    cost = check_cost(cost_name(cost, {}, "metric_curve"))
    if isinstance(points, bool) or not isinstance(points, Integral) or points < 1:
        raise ValueError(f"points must be an int >= 1, got {points!r}")
    check_confidence(confidence, n_boot)
    front = pareto_front(table, cost, assumed_input_bits=assumed_input_bits, rules=rules)
    costs = np.array([c for c, _, _ in front], dtype=float)
    budgets = np.linspace(costs[0], costs[-1], points) if points > 1 else costs[-1:]
    out = []
    for i, b in enumerate(budgets):
        j = int(np.searchsorted(costs, b * (1 + 1e-12), side="right")) - 1
        c, _, plan = front[max(j, 0)]
        rep = evaluate_plan(model, data, plan, metric=metric, target=target, confidence=confidence,
                            n_boot=n_boot, seed=seed + i, output=output, inputs=inputs)
        out.append(CurvePoint(budget=float(b) if cost != "bops" else float(round(b)), plan=plan,
                              predicted_sqnr_db=plan.predicted_sqnr_db if plan.predicted_sqnr_db is not None
                              else math.nan,
                              measured_sqnr_db=rep.measured_sqnr_db, metric_float=rep.metric_float,
                              metric_planned=rep.metric_planned, drop=rep.drop, drop_low=rep.drop_low,
                              drop_high=rep.drop_high))
        if progress is not None:
            progress(i + 1, len(budgets))
    return out
