"""refine_plan under device rules: every refined grid still obeys them (checked with the rules'
own violations list and, independently, with the power-of-two and zero-point tests written here)."""

from __future__ import annotations

import math

import pytest
import torch
from naive_loops import naive_sqnr_db
from torch import nn

from qwidgets import DeviceRules, refine_plan, scan


def _net():
    torch.manual_seed(1)
    return nn.Sequential(nn.Linear(12, 24), nn.ReLU(), nn.Linear(24, 5)).eval(), torch.randn(128, 12)


def _plan(net, x, rules):
    t = scan(net, x, bits=(4,), quantize="both", rules=rules, progress=False)
    return t.make_plan({n: 4 for n in t.layers})


def _is_pow2(v: float) -> bool:  # written here: log2 of the value is a whole number
    e = math.log2(v)
    return e == round(e)


@pytest.mark.parametrize("rules", [DeviceRules(pow2_scales=True, symmetric_weights=True),
                                   DeviceRules(pow2_scales=True),
                                   DeviceRules(symmetric_weights=True)])
def test_refined_grids_obey_the_rules(rules):
    net, x = _net()
    plan = _plan(net, x, rules)
    res = refine_plan(net, x, plan, steps=20, batch_size=32, progress=False, rules=rules)
    # never worse than the start (the contract), both measured by the reference loop; its
    # figures and refine_plan's agree within 1e-6 dB (tests/test_refine.py)
    assert naive_sqnr_db(net, x, res.plan) >= naive_sqnr_db(net, x, plan) - 1e-6
    for name, s in res.plan.layers.items():
        for role, g in (("weight", s.weight), ("input", s.input)):
            if g is None:
                continue
            assert rules.violations(g, role) == [], (name, role)
            if rules.pow2_scales:
                assert all(_is_pow2(float(v)) for v in g.scale_tensor().reshape(-1)), (name, role)
            z = torch.as_tensor(g.zero_point)  # raises when there is no integer zero point
            if role == "weight" and rules.symmetric_weights:
                assert bool((z == 0).all()), name


def test_a_plan_that_breaks_the_rules_is_refused():
    net, x = _net()
    plan = _plan(net, x, None)  # fitted without rules: MSE steps, not powers of two
    with pytest.raises(ValueError, match="breaks the device rules"):
        refine_plan(net, x, plan, steps=2, progress=False, rules=DeviceRules(pow2_scales=True))
