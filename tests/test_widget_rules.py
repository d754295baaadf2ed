"""GridExplorer under DeviceRules: the controls offer only what the device runs.

Outside check: powers of two read with math.frexp; the grid's error compared with the core's
quantize on the same tensor (the package's reference arithmetic, itself checked against torch's
fake quantization in tests/test_quantize.py).
"""

from __future__ import annotations

import math

import torch
from torch import nn

from qwidgets import DeviceRules, GridExplorer


def _pow2(v):
    return math.frexp(float(v))[0] == 0.5


def test_explorer_controls_follow_the_device_rules():
    torch.manual_seed(0)
    layer, x = nn.Linear(24, 12), torch.randn(40, 24)
    rules = DeviceRules(pow2_scales=True, symmetric_weights=True, weight_bits=(4, 8), input_bits=(8,))
    ex = GridExplorer(layer, x, bits=5, rules=rules)
    c = ex.controls
    assert ex.grid.bits == 8 and rules.obeys(ex.grid, "weight")  # 5 is not on the menu: the next one
    assert c["offset"].disabled
    ex.state.scale = 0.3 * float(ex.grid.scale)
    ex.refresh()
    assert _pow2(ex.grid.scale) and rules.obeys(ex.grid, "weight")
    ex.state.offset = 0.2
    assert ex.grid.zero_point == 0
    assert [v for _, v in c["bits"].options] == [4, 8]  # the buttons offer the menu
    ex.state.bits = 7  # a script asks for 7, down from 8: the next width below on the menu
    assert ex.grid.bits == 4 and rules.obeys(ex.grid, "weight")
    assert "7 bits is not in the device's menu" in ex.message.text  # and it says so
    ex.state.bits = 5  # up from 4
    assert ex.grid.bits == 8 and _pow2(ex.grid.scale)
    ex.fit("minmax")
    assert rules.obeys(ex.grid, "weight")
    c["source"].value = "input"
    assert ex.grid.bits == 8 and rules.obeys(ex.grid, "input") and not c["offset"].disabled
    ex.learn(steps=3)
    assert rules.obeys(ex.grid, "input")
    c["source"].value = "weight"
    ex.learn(steps=3)
    assert rules.obeys(ex.grid, "weight")
    s = ex.to_setting()
    assert rules.obeys(s.weight, "weight") and rules.obeys(s.input, "input")


def test_explorer_without_per_channel_weights_disables_the_choice():
    torch.manual_seed(1)
    ex = GridExplorer(nn.Linear(8, 4), torch.randn(10, 8), rules=DeviceRules(per_channel_weights=False))
    assert ex.controls["per_channel"].disabled and ex.grid.axis is None
    assert ex.grid.has_zero_point()


def test_budget_planner_plans_only_what_the_device_runs():
    import pytest

    from qwidgets import BudgetPlanner

    torch.manual_seed(2)
    net = nn.Sequential(nn.Linear(8, 16), nn.ReLU(), nn.Linear(16, 4))
    rules = DeviceRules(pow2_scales=True, symmetric_weights=True, weight_bits=(4, 8))
    with pytest.raises(ValueError, match=r"width\(s\) \[2\] that the device rules do not allow"):
        BudgetPlanner(net, torch.randn(64, 8), bits=(2, 4, 8), rules=rules, progress=False)
    p = BudgetPlanner(net, torch.randn(64, 8), bits=(4, 8), rules=rules, progress=False)
    plan = p.set_budget("mean_bits", 12).plan  # stored bits: about 6 for the codes, 6 for the scales
    assert set(plan.bits.values()) <= {4, 8}
    assert all(rules.obeys(s.weight, "weight") for s in plan.layers.values())
    assert all(_pow2(v) for s in plan.layers.values() for v in s.weight.scale_tensor().reshape(-1))


def test_scan_view_and_planner_note_unfolded_batchnorm_after_planned_layers():
    from qwidgets import BudgetPlanner, ScanView, fold_batchnorm

    torch.manual_seed(3)
    net = nn.Sequential(nn.Conv2d(3, 4, 3), nn.BatchNorm2d(4), nn.ReLU(), nn.Flatten(), nn.Linear(4 * 16, 2)).eval()
    x = torch.randn(16, 3, 6, 6)
    view = ScanView(net, x, bits=(4, 8), progress=False)
    planner = BudgetPlanner(net, x, bits=(4, 8), progress=False)
    for w in (view, planner):
        assert "1 after 0" in w.batchnorm_note.value and "fold_batchnorm" in w.batchnorm_note.value
    folded = fold_batchnorm(net)
    assert ScanView(folded, x, bits=(4, 8), progress=False).batchnorm_note.value == ""
    assert BudgetPlanner(folded, x, bits=(4, 8), progress=False).batchnorm_note.value == ""
