"""metric_curve, evaluate_plan(confidence=...) and the paired bootstrap behind them.

Outside checks:
- the paired percentile bootstrap (Efron, B. & Tibshirani, R. J., 1993, An Introduction to the
  Bootstrap, Chapman & Hall: resample the sample indices, recompute both metrics on the same
  resample, take the percentiles of the differences): on simulated per-sample correctness of
  two models with a known true accuracy drop, the 95 % interval covers the true drop in close
  to 95 % of independent repetitions (binomial spread over 200 repetitions: about 1.5 points);
- the interval of one resampling loop written here (numpy, the same seed stream) equals the
  library's, number for number;
- each curve point equals evaluate_plan of the same plan (metric, measured SQNR), and the
  plans are the front's optima at their budgets (plan_budget, milp).
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import nn

from qwidgets import CurvePoint, metric_curve
from qwidgets.planning.bootstrap import paired_drop_interval
from qwidgets.planning.evaluate import evaluate_plan
from qwidgets.planning.scanning import scan
from qwidgets.planning.solver import plan_budget
from tests.stored_bits import mean_bits_for


def _mean(out, target):
    return float(out.float().mean())


def test_bootstrap_interval_covers_a_known_drop_at_the_nominal_rate():
    # Efron & Tibshirani 1993, percentile interval for a paired difference. Truth: the float
    # model is right with p = 0.85; the planned one loses each right answer with q = 0.04 and
    # gains a wrong one with r = 0.01, so the true drop is 0.85 q - 0.15 r = 0.0325.
    true_drop = 0.85 * 0.04 - 0.15 * 0.01
    rng = np.random.default_rng(2024)
    reps, n, hits = 200, 400, 0
    for k in range(reps):
        right = rng.random(n) < 0.85
        u = rng.random(n)
        planned = np.where(right, u >= 0.04, u < 0.01)
        lo, hi = paired_drop_interval(_mean, torch.tensor(right), torch.tensor(planned), None,
                                      confidence=0.95, n_boot=400, seed=k)
        hits += lo <= true_drop <= hi
    assert 0.90 <= hits / reps <= 0.99, hits / reps


def test_bootstrap_equals_a_loop_written_here():
    rng = np.random.default_rng(5)
    a, b = rng.random(50), rng.random(50)
    target = rng.integers(0, 2, 50)

    def metric(o, t):
        return float(np.mean((o > 0.5) == t))

    lo, hi = paired_drop_interval(metric, a, b, target, confidence=0.9, n_boot=300, seed=7)
    g = np.random.default_rng(7)
    d = []
    for _ in range(300):
        idx = g.integers(0, 50, 50)
        d.append(metric(a[idx], target[idx]) - metric(b[idx], target[idx]))
    assert (lo, hi) == (float(np.quantile(d, 0.05)), float(np.quantile(d, 0.95)))


def _classifier():
    torch.manual_seed(0)
    net = nn.Sequential(nn.Linear(10, 32), nn.ReLU(), nn.Linear(32, 4)).eval()
    x = torch.randn(600, 10)
    with torch.no_grad():
        y = net(x).argmax(1)  # labels the float model gets right, flipped for a fifth
    flip = torch.rand(600) < 0.2
    y = torch.where(flip, (y + 1) % 4, y)
    return net, x, y


def _accuracy(out, target):
    return float((out.argmax(1) == target).float().mean())


def test_metric_curve_points_equal_evaluate_plan_and_plan_budget():
    net, x, y = _classifier()
    calib, held_x, held_y = x[:200], x[200:], y[200:]
    t = scan(net, calib, bits=(2, 3, 4, 8), progress=False)
    calls = []
    curve = metric_curve(net, held_x, t, metric=_accuracy, target=held_y, cost="mean_bits", points=4,
                         n_boot=200, progress=lambda i, n: calls.append((i, n)))
    assert calls == [(1, 4), (2, 4), (3, 4), (4, 4)]
    assert [round(p.budget, 6) for p in curve] == [round(mean_bits_for(t, b), 6) for b in (2, 4, 6, 8)]
    for k, p in enumerate(curve):
        assert isinstance(p, CurvePoint)
        assert p.plan.mean_bits <= p.budget + 1e-9
        best = plan_budget(t, mean_bits=p.budget)
        assert p.predicted_sqnr_db == pytest.approx(best.predicted_sqnr_db, abs=1e-6)
        rep = evaluate_plan(net, held_x, p.plan, metric=_accuracy, target=held_y, confidence=0.95,
                            n_boot=200, seed=k)
        assert (p.metric_float, p.metric_planned, p.measured_sqnr_db) == (
            rep.metric_float, rep.metric_planned, rep.measured_sqnr_db)
        assert p.drop == pytest.approx(p.metric_float - p.metric_planned)
        assert (p.drop_low, p.drop_high) == (rep.drop_low, rep.drop_high)
        assert p.drop_low <= p.drop <= p.drop_high
    assert curve[-1].measured_sqnr_db > curve[0].measured_sqnr_db


def test_evaluate_plan_interval_over_many_batches_equals_one_batch():
    net, x, y = _classifier()
    t = scan(net, x[:100], bits=(2, 4), progress=False)
    plan = plan_budget(t, mean_bits=mean_bits_for(t, 2))
    one = evaluate_plan(net, x, plan, metric=_accuracy, target=y, confidence=0.9, n_boot=100)
    batches = torch.utils.data.DataLoader(torch.utils.data.TensorDataset(x), batch_size=150)
    targets = [y[i:i + 150] for i in range(0, 600, 150)]
    many = evaluate_plan(net, batches, plan, metric=_accuracy, target=targets, confidence=0.9, n_boot=100)
    assert (many.drop_low, many.drop_high) == (one.drop_low, one.drop_high)
    assert evaluate_plan(net, x, plan, metric=_accuracy, target=y).drop_low is None
    assert "interval" in str(one)


@pytest.mark.parametrize("kwargs, err, msg", [
    ({"confidence": 1.5}, ValueError, r"confidence must be a number in \(0, 1\)"),
    ({"n_boot": 3}, ValueError, "n_boot must be an int >= 10"),
    ({"points": 0}, ValueError, "points must be an int >= 1"),
    ({"cost": "kib"}, ValueError, "cost must be one of"),
    ({"metric": 3}, TypeError, "metric must be a callable"),
])
def test_bad_arguments(kwargs, err, msg):
    net, x, y = _classifier()
    t = scan(net, x[:50], bits=(2, 4), progress=False)
    args = {"metric": _accuracy, "target": y[:50], **kwargs}
    with pytest.raises(err, match=msg):
        metric_curve(net, x[:50], t, **args)


def test_confidence_needs_a_metric():
    net, x, _ = _classifier()
    t = scan(net, x[:50], bits=(2, 4), progress=False)
    with pytest.raises(ValueError, match="confidence needs a metric"):
        evaluate_plan(net, x[:50], plan_budget(t, mean_bits=mean_bits_for(t, 4)), confidence=0.95)
