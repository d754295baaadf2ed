"""A NaN / inf is named where it comes from: a metric that returns one (named with the plan),
a weight that holds one (named, not the next layer's input); and a ``fixed`` width outside
``allowed_bits`` stays allowed but the plan's report lists the pinned entries.

Outside checks: the NaN / inf counts in the messages against counts taken here with torch, the
metric's non-finite value against the same metric computed here with numpy, and the plan's
widths against the pins and the menu given.
"""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
import torch
from torch import nn

from qwidgets import (
    Plan,
    capture_inputs,
    evaluate_plan,
    export_codes,
    model_error,
    plan_budget,
    scan,
)
from qwidgets.core.grid import UniformGrid
from qwidgets.core.setting import LayerSetting


class _Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.c1, self.c2, self.fc = nn.Conv2d(3, 4, 3), nn.Conv2d(4, 4, 3), nn.Linear(64, 3)

    def forward(self, x):
        return self.fc(torch.relu(self.c2(torch.relu(self.c1(x)))).flatten(1))


def _setup():
    torch.manual_seed(0)
    net, x = _Net().eval(), torch.randn(16, 3, 8, 8)
    table = scan(net, x, bits=(4, 8), quantize="both", progress=False)
    return net, x, table


def test_a_metric_returning_nan_or_inf_is_an_error_naming_the_metric_and_the_plan():
    net, x, table = _setup()
    plan = plan_budget(table, mean_bits=40)
    labels = torch.zeros(16, dtype=torch.long)

    def log_recall_of_class_2(out, target):  # no sample of class 2: log(0 / 0)
        hits = ((out.argmax(1) == 2) & (target == 2)).sum().item()
        return math.log(hits / (target == 2).sum().item()) if (target == 2).any() else float("nan")

    # the same metric, computed here with numpy, is not finite on these labels
    with np.errstate(all="ignore"):
        assert not np.isfinite(np.log(np.float64(0) / np.float64((labels.numpy() == 2).sum())))
    with pytest.raises(ValueError, match=r"metric 'log_recall_of_class_2' returned nan on the float model "
                                         r"\(evaluating Plan\(3 layers"):
        evaluate_plan(net, x, plan, metric=log_recall_of_class_2, target=labels)
    with torch.no_grad():
        ref = net(x)  # the float output: the metric is finite there, inf on any other output
    with pytest.raises(ValueError, match=r"metric '<lambda>' returned inf on the planned model of Plan\("):
        evaluate_plan(net, x, plan, metric=lambda o, t: 1.0 if torch.equal(o, ref) else float("inf"),
                      target=labels)


def test_nan_in_a_weight_names_that_weight_not_the_next_layer_input():
    net, x, table = _setup()
    plan = plan_budget(table, mean_bits=40)
    bad = _Net().eval()
    bad.load_state_dict(net.state_dict())
    with torch.no_grad():
        bad.c2.weight[1, 2, 0, 1] = float("nan")
        bad.c2.weight[0, 0, 0, 0] = float("-inf")
    n_nan, n_inf = int(torch.isnan(bad.c2.weight).sum()), int(torch.isinf(bad.c2.weight).sum())
    named = re.escape(f"'c2.weight' ({n_nan} NaN, {n_inf} inf of {bad.c2.weight.numel()})")
    for call in (lambda: scan(bad, x, bits=(4, 8), progress=False),
                 lambda: scan(bad, x, bits=(4,), quantize="input", progress=False),
                 lambda: capture_inputs(bad, x),
                 lambda: model_error(bad, x, {"fc": LayerSetting(input=UniformGrid(8, 0.1))})):
        with pytest.raises(ValueError, match=named + r" holds NaN / inf values, so the input of layer 'fc'"):
            call()
    named = re.escape(f"weight 'c2.weight' holds {n_nan} NaN and {n_inf} inf value(s)")
    with pytest.raises(ValueError, match=named):
        evaluate_plan(bad, x, plan, allow_other_weights=True)
    with pytest.raises(ValueError, match=named):
        export_codes(bad, plan, allow_other_weights=True)
    last = _Net().eval()
    last.load_state_dict(net.state_dict())
    with torch.no_grad():
        last.fc.weight[0, 3] = float("inf")
    with pytest.raises(ValueError, match=re.escape("weight 'fc.weight' holds 0 NaN and 1 inf value(s)")):
        scan(last, x, bits=(4, 8), progress=False)


def test_a_fixed_width_outside_allowed_bits_is_kept_and_listed_as_pinned():
    net, x, table = _setup()
    plan = plan_budget(table, mean_bits=40, fixed={"c1": 8}, allowed_bits=(4,))
    # the pin holds although 8 is not in the menu; every other entry takes the menu's width
    assert plan.bits == {"c1": 8, "c2": 4, "fc": 4}
    pinned = {n: plan.bits[n] for n in plan.layers if plan.entries[n].get("pinned")}
    back = Plan.from_json(plan.to_json())
    assert pinned == {"c1": 8} and [n for n in back.layers if back.entries[n].get("pinned")] == ["c1"]
    report = evaluate_plan(net, x, plan)
    assert report.pinned == ("c1 (8 bits)",)
    assert "pinned by fixed= (not chosen by the budget): c1 (8 bits)" in str(report)
    free = plan_budget(table, mean_bits=40)
    assert not any(e.get("pinned") for e in free.entries.values()) and evaluate_plan(net, x, free).pinned == ()
