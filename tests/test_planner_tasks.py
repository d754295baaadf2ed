"""The budget planner's "refine" and "metric curve" buttons, driven headless.

References: the figures shown are the core functions' (refine_plan, evaluate_plan, metric_curve)
called independently in the test on the same data.
"""

from __future__ import annotations

import pytest
import torch
from naive_loops import naive_sqnr_db
from torch import nn

from qwidgets import BudgetPlanner, evaluate_plan, metric_curve
from tests.stored_bits import mean_bits_for


def _accuracy(out, t):
    return float((out.argmax(1) == t).float().mean())


@pytest.fixture
def setup():
    torch.manual_seed(5)
    net = nn.Sequential(nn.Linear(10, 32), nn.ReLU(), nn.Linear(32, 32), nn.ReLU(), nn.Linear(32, 4)).eval()
    x, held = torch.randn(256, 10), torch.randn(300, 10)
    with torch.no_grad():
        y, held_y = net(x).argmax(1), net(held).argmax(1)  # labels the float model gets right
    p = BudgetPlanner(net, x, metric=_accuracy, target=y, eval_data=held, eval_target=held_y,
                      bits=(2, 3, 4, 8), progress=False)
    p.set_budget("mean_bits", mean_bits_for(p.table, 3.0))  # stored bits: codes + scales
    return net, x, held, held_y, p


def test_refine_button_takes_the_refined_plan_and_measures_it(setup):
    net, x, held, held_y, p = setup
    p.refine_steps = 40
    start = p.plan
    p.controls["refine"].click()  # no running event loop here: the work runs in this thread
    res = p.refined
    assert res is not None and res.steps_run == 40
    # refine_plan's contract, never worse than the start, by the reference loop (within its
    # 1e-6 dB agreement with refine_plan's own measurement, tests/test_refine.py)
    assert naive_sqnr_db(net, x, res.plan) >= naive_sqnr_db(net, x, start) - 1e-6
    assert p.plan is res.plan and p.plan.bits == start.bits
    # the chosen point's measurement is the refined plan's, as evaluate_plan gives it (reference)
    ref = evaluate_plan(net, held, res.plan, metric=_accuracy, target=held_y)
    assert p.report.measured_sqnr_db == pytest.approx(ref.measured_sqnr_db, abs=1e-9)
    assert "refined" in p.message.text and "->" in p.message.text and not p.message.is_error
    assert p.controls["refine"].description == "refine"  # the stop button turned back


def test_metric_curve_button_draws_the_core_curve(setup):
    net, x, held, held_y, p = setup
    p.curve_points = 3
    p.controls["curve"].click()
    assert not p.message.is_error, p.message.text
    got = p.curve_points_measured
    ref = metric_curve(net, held, p.table, metric=_accuracy, target=held_y, cost=p.kind, points=3)
    assert [c.budget for c in got] == [c.budget for c in ref]
    assert [c.metric_planned for c in got] == [c.metric_planned for c in ref]
    assert [(c.drop_low, c.drop_high) for c in got] == [(c.drop_low, c.drop_high) for c in ref]
    line = p.figure.ax_curve.lines
    assert line and "metric curve: 3 plans" in p.message.text


def test_a_stopped_curve_draws_nothing_and_says_so(setup):
    *_, p = setup
    assert p._curve_work(lambda *a: None, lambda: True, 3) is None  # stop asked after the first point
    p._curve_done(None)
    assert "stopped" in p.message.text


def test_curve_needs_a_metric():
    net = nn.Sequential(nn.Linear(4, 3)).eval()
    p = BudgetPlanner(net, torch.randn(32, 4), bits=(4, 8), progress=False)
    assert p.controls["curve"].disabled
    with pytest.raises(ValueError, match="needs metric"):
        p.curve()
