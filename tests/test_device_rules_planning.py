"""scan, plan_budget and pareto_front under DeviceRules.

Outside checks: powers of two read with math.frexp; the model-scope SQNR of a rule-obeying
grid recomputed with a naive loop written here (deep copy, overwrite the weight, full forward).
"""

from __future__ import annotations

import copy
import math

import pytest
import torch
from torch import nn

from qwidgets import DeviceRules, pareto_front, plan_budget, scan


def _net():
    torch.manual_seed(0)
    return nn.Sequential(nn.Conv2d(3, 6, 3, padding=1), nn.ReLU(), nn.Flatten(),
                         nn.Linear(6 * 5 * 5, 10), nn.ReLU(), nn.Linear(10, 4)).eval()


def _x():
    return torch.randn(24, 3, 5, 5, generator=torch.Generator().manual_seed(1))


RULES = DeviceRules(pow2_scales=True, symmetric_weights=True, weight_bits=(4, 8), input_bits=(8,))


def _pow2(v):
    return math.frexp(v)[0] == 0.5


def test_scan_under_rules_fits_only_what_the_device_runs():
    net, x = _net(), _x()
    before = {k: v.clone() for k, v in net.state_dict().items()}
    with pytest.raises(ValueError, match=r"width\(s\) \[2, 6\] that the device rules do not allow"):
        scan(net, x, bits=(2, 4, 6, 8), rules=RULES, progress=False)
    t = scan(net, x, bits=(4, 8), rules=RULES, progress=False)
    assert t.bits == (4, 8)
    for name in t.layers:
        for b in t.bits:
            g = t.weight_grid(name, b)
            assert all(_pow2(v) for v in g.scale_tensor().tolist())
            assert g.zero_point.tolist() == [0] * g.scale_tensor().numel()
    assert all(torch.equal(v, before[k]) for k, v in net.state_dict().items())
    # naive loop: deep copy, overwrite one weight with the table's grid, full forward
    g = t.weight_grid("3", 4)
    with torch.no_grad():
        ref = net(x)
    q = copy.deepcopy(net)
    with torch.no_grad():
        s = g.scale_tensor().reshape(-1, 1)
        q[3].weight.copy_(torch.clamp(torch.round(q[3].weight / s), -8, 7) * s)
        out = q(x)
    sqnr = 10 * math.log10(float(ref.double().square().sum() / (out.double() - ref.double()).square().sum()))
    assert t.sqnr_db("3", 4) == pytest.approx(sqnr, abs=1e-3)


def test_scan_under_rules_with_input_grids_and_per_tensor_weights():
    net, x = _net(), _x()
    rules = DeviceRules(pow2_scales=True, per_channel_weights=False, input_bits=(8,), weight_bits=(8,))
    t = scan(net, x, bits=(8,), quantize="both", rules=rules, progress=False)
    for name in t.layers:
        wg, ig = t.weight_grid(name, 8), t.input_grid(name, 8)
        assert wg.axis is None and ig.axis is None and _pow2(wg.scale) and _pow2(ig.scale)
        assert rules.obeys(wg, "weight") and rules.obeys(ig, "input")
    with pytest.raises(ValueError, match=r"bits=\(2, 3\) asks for width\(s\) \[2, 3\]"):
        scan(net, x, bits=(2, 3), rules=rules, progress=False)


def test_plan_budget_uses_only_the_menu_and_refuses_tables_scanned_without_rules():
    net, x = _net(), _x()
    t = scan(net, x, bits=(2, 4, 6, 8), progress=False)
    with pytest.raises(ValueError, match="breaks the device rules.*scan with rules="):
        plan_budget(t, mean_bits=6, rules=RULES)
    menu_only = DeviceRules(weight_bits=(4, 8))
    p = plan_budget(t, mean_bits=6, rules=menu_only)
    assert set(p.bits.values()) <= {4, 8}
    # the exact optimum over the menu: no plan using only 4 / 8 bits within budget is better
    free = plan_budget(t, mean_bits=6)
    assert free.predicted_sqnr_db >= p.predicted_sqnr_db - 1e-9
    front = pareto_front(t, "mean_bits", rules=menu_only)
    assert all(set(plan.bits.values()) <= {4, 8} for _, _, plan in front)
    with pytest.raises(ValueError, match="assumed_input_bits=4 is not allowed"):
        plan_budget(t, mean_bits=6, rules=RULES, assumed_input_bits=4)
    tr = scan(net, x, bits=(4, 8), rules=RULES, progress=False)
    pr = plan_budget(tr, mean_bits=6, rules=RULES)
    assert set(pr.bits.values()) <= {4, 8}
    assert all(RULES.obeys(s.weight, "weight") for s in pr.layers.values())
