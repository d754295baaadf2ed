"""Each budget keyword of plan_budget limits the Plan attribute of the same name, on a real
model with biases, a LayerNorm and an embedding tied to the output layer (weights the table
does not plan), checked against a brute-force search written here."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
import torch
from torch import nn

from qwidgets import metric_curve, pareto_front, plan_budget, scan


class TiedNet(nn.Module):
    """Embedding tied to the output layer; biases and a LayerNorm stay float."""

    def __init__(self):
        super().__init__()
        self.emb = nn.Embedding(40, 12)
        self.fc = nn.Linear(12, 16)
        self.norm = nn.LayerNorm(16)
        self.mid = nn.Linear(16, 12)
        self.head = nn.Linear(12, 40)
        self.head.weight = self.emb.weight

    def forward(self, tokens):
        h = self.emb(tokens).mean(1)
        return self.head(self.mid(self.norm(torch.relu(self.fc(h)))))


@pytest.fixture(scope="module")
def tied():
    torch.manual_seed(0)
    net = TiedNet().eval()
    tokens = torch.randint(0, 40, (48, 6))
    return net, tokens, scan(net, tokens, bits=(2, 4, 8), progress=False)


def _naive_costs(net: nn.Module, plan, assumed_input_bits: int = 8) -> dict:
    """The four figures counted from the model itself: every floating-point parameter tensor
    once (tied tensors are one tensor), planned weights as codes plus one float32 scale and one
    int32 zero point per grid channel, the rest at 32 bits; MACs per sample by hand."""
    planned_tensor = {id(getattr(net, n).weight): n for n in plan.layers}
    model_bits = planned_bits = 0
    for p in {id(p): p for p in net.parameters()}.values():  # named_parameters lists a tied tensor once
        name = planned_tensor.get(id(p))
        if name is None:
            model_bits += 32 * p.numel()
            continue
        g = plan.layers[name].weight
        channels = 1 if g.axis is None else p.shape[g.axis]
        stored = p.numel() * plan.bits[name] + channels * (32 + 32)
        model_bits += stored
        planned_bits += stored
    weights = {n: getattr(net, n).weight.numel() for n in plan.layers}
    # MACs per sample: a lookup has none; each Linear in x out; head multiplies by emb's tensor
    macs = {"emb": 12 * 40, "fc": 12 * 16, "mid": 16 * 12}
    return {
        "model_kib": model_bits / 8192,
        "planned_kib": planned_bits / 8192,
        "mean_bits": planned_bits / sum(weights.values()),  # stored bits per planned weight
        "bops": sum(macs[n] * plan.bits[n] * assumed_input_bits for n in plan.layers),
    }


def _noise(table, bits: dict) -> float:
    """Summed predicted noise (relative to the signal) of one choice, from the table's SQNRs."""
    return sum(10 ** (-table.sqnr_db(n, b) / 10) for n, b in bits.items())


def test_every_budget_limits_the_attribute_of_its_name(tied):
    net, _, t = tied
    assert t.unplanned_bits() > 0 and t.shared_with("emb") == ["head"]  # the case that matters
    combos = [dict(zip(t.layers, c, strict=True)) for c in itertools.product(t.bits, repeat=len(t.layers))]
    plans = [t.make_plan(c) for c in combos]
    costs = [_naive_costs(net, p) for p in plans]
    for p, c in zip(plans, costs, strict=True):  # the plan's figures are the model's, counted here
        for name, v in c.items():
            assert getattr(p, name) == pytest.approx(v, rel=1e-12), name
    noise = np.array([_noise(t, c) for c in combos])
    for name in ("model_kib", "planned_kib", "mean_bits", "bops"):
        values = sorted({c[name] for c in costs})
        for budget in values[1:-1:max(1, len(values) // 6)] + [values[0], values[-1]]:
            plan = plan_budget(t, **{name: budget})
            assert getattr(plan, name) <= budget * (1 + 1e-12)
            feasible = [i for i, c in enumerate(costs) if c[name] <= budget * (1 + 1e-12)]
            best = min(noise[i] for i in feasible)  # the brute-force optimum
            # float64 sums of the same three terms in another order: relative 1e-12
            assert _noise(t, plan.bits) == pytest.approx(best, rel=1e-9), (name, budget)
            assert plan.predicted_sqnr_db == pytest.approx(-10 * math.log10(best), abs=1e-9)


def test_front_and_curve_costs_are_the_plan_attribute(tied):
    net, tokens, t = tied
    for name in ("model_kib", "planned_kib", "mean_bits", "bops"):
        front = pareto_front(t, name)
        assert all(c == pytest.approx(getattr(p, name), rel=1e-12) for c, _, p in front)
    acc = lambda out, tgt: float((out.argmax(1) == tgt).float().mean())  # noqa: E731
    target = net(tokens).argmax(1)
    curve = metric_curve(net, tokens, t, metric=acc, target=target, cost="model_kib", points=3, n_boot=50)
    assert all(p.plan.model_kib <= p.budget * (1 + 1e-12) for p in curve)
    # the one sign: drop = metric_float - metric_planned
    assert all(p.drop == p.metric_float - p.metric_planned for p in curve)
