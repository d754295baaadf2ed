"""Entries found by use: parameters reaching a product as its weight operand, whatever module
holds them, through scan -> plan -> apply -> evaluate.

Reference: a naive loop written here (deep copy, quantize that one tensor on the table's grid,
or quantize the product's other operand by a forward pre-hook; forward; SQNR against the float
model). Float32 sums over different orders differ in the last bits: SQNRs within 0.01 dB (see
tests/test_attention_activations.py).
"""

from __future__ import annotations

import copy
import math

import pytest
import torch
import torch.nn.functional as F
from torch import nn

from qwidgets import apply_plan, evaluate_plan, plan_budget, scan
from qwidgets.core.rounding import quantize
from qwidgets.model.usage import entries_named, find_usage
from tests.attention_models import AddmmMLP
from tests.stored_bits import mean_bits_for


def sqnr(ref, out) -> float:
    ref, out = ref.double(), out.double()
    return 10 * math.log10(float(ref.pow(2).sum()) / float((out - ref).pow(2).sum()))


def test_found_by_use_names_axes_and_inputs():
    model = AddmmMLP()
    u = find_usage(model, torch.randn(3, 6))
    found = {e.name: e for e in u.entries}
    assert list(found) == ["up", "down", "mix"]
    # [in, out] weights of x @ W (addmm): output channels on axis 1; mix is used as mix.t()
    # ([out, in] stored): axis 0
    assert (found["up"].axis, found["up"].param, found["up"].shape) == (1, "up.weight", (6, 12))
    assert (found["mix"].axis, found["mix"].param) == (0, "mix")
    assert all(e.kind == "product" and e.input_args == ("input",) for e in found.values())
    assert set(entries_named(model, ["up", "mix", "nothing"])) == {"up", "mix"}
    # a parameter of a known module class keeps its own entry and is no product entry
    known = nn.Sequential(nn.Linear(3, 2))
    assert entries_named(known, ["0", "0.weight"]) == {}


class Ops(nn.Module):
    """One parameter per product the taps know, each held by this module directly."""

    def __init__(self):
        super().__init__()
        g = torch.Generator().manual_seed(0)
        self.w_lin = nn.Parameter(torch.randn(5, 4, generator=g))      # F.linear: [out, in]
        self.w_mm = nn.Parameter(torch.randn(5, 3, generator=g))       # torch.mm: [in, out]
        self.w_left = nn.Parameter(torch.randn(3, 3, generator=g) + torch.eye(3))  # W @ x: [out, in]
        self.w_bmm = nn.Parameter(torch.randn(2, 3, 3, generator=g))   # torch.bmm: [b, in, out]
        self.w_conv = nn.Parameter(torch.randn(3, 1, 2, generator=g))  # F.conv1d: [out, in, k]

    def forward(self, x):
        h = torch.mm(F.linear(x, self.w_lin), self.w_mm)
        h = (self.w_left @ h.T).T
        h = torch.bmm(h.unsqueeze(0).expand(2, -1, -1), self.w_bmm).sum(0)
        return F.conv1d(h.unsqueeze(1), self.w_conv).flatten(1)


def test_each_product_op_and_its_axis():
    u = find_usage(Ops(), torch.randn(4, 4))
    axes = {e.name: e.axis for e in u.entries}
    assert axes == {"w_lin": 0, "w_mm": 1, "w_left": 0, "w_bmm": 2, "w_conv": 0}


def test_view_that_reorders_values_is_not_an_entry():
    class Flat(nn.Module):
        def __init__(self):
            super().__init__()
            self.w = nn.Parameter(torch.randn(4, 6))

        def forward(self, x):
            return x @ self.w.view(6, 4)  # a reshape, not a permutation of the axes

    model = Flat()
    u = find_usage(model, torch.randn(2, 6))
    assert u.entries == [] and "w" in u.unusable
    t = None
    with pytest.raises(ValueError, match="no quantizable|no entry"):
        t = scan(model, torch.randn(2, 6), bits=(4,), progress=False)
    assert t is None


@pytest.mark.parametrize("estimate", ["exact", "gain"])
def test_weights_found_by_use_scanned_like_a_naive_loop(estimate, untouched):
    torch.manual_seed(0)
    model, x = AddmmMLP().eval(), torch.randn(32, 6)
    keep = untouched(model)
    t = scan(model, x, bits=(3, 6), input_bits=(4,), quantize="separate", progress=False,
             estimate=estimate)
    keep.check()
    assert t.layers == ["up", "down", "mix"]
    assert t.weight_grid("up", 3).axis == 1 and t.weight_grid("up", 3).n_channels == 12
    assert t.macs("up") == 6 * 12 and t.macs("mix") == 5 * 4  # per sample
    with torch.no_grad():
        ref = model(x)
        for name, pname in (("up", "up.weight"), ("down", "down.weight"), ("mix", "mix")):
            for b in (3, 6):
                naive = copy.deepcopy(model)
                p = naive.get_parameter(pname)
                p.copy_(quantize(p, t.weight_grid(name, b)))
                assert abs(sqnr(ref, naive(x)) - t.sqnr_db(name, b, "model")) < 0.01, (name, b)
        for name in ("up", "down"):  # the other operand of addmm: the module's input
            naive = copy.deepcopy(model)
            grid = t.input_grid(name, 4)
            naive.get_submodule(name).register_forward_pre_hook(lambda m, a, g=grid: (quantize(a[0], g),))
            got = t.sqnr_db(name, 4, "model", source="input")
            assert abs(sqnr(ref, naive(x)) - got) < 0.01, name
        # layer scope of a weight: the product's own output, F.linear-style by hand
        h = torch.relu(model.up(x))
        w = model.down.weight
        want = torch.addmm(model.down.bias, h, w)
        q = torch.addmm(model.down.bias, h, quantize(w, t.weight_grid("down", 3)))
        assert abs(sqnr(want, q) - t.sqnr_db("down", 3, "layer")) < 0.01


def test_plan_applied_to_weights_found_by_use(untouched):
    torch.manual_seed(1)
    model, x = AddmmMLP().eval(), torch.randn(32, 6)
    keep = untouched(model)
    t = scan(model, x, bits=(4, 8), input_bits=(4, 8), quantize="separate", progress=False)
    plan = plan_budget(t, mean_bits=mean_bits_for(t, 6))
    planned = apply_plan(model, plan)
    keep.check()
    naive = copy.deepcopy(model)
    with torch.no_grad():
        for name, pname in (("up", "up.weight"), ("down", "down.weight"), ("mix", "mix")):
            p = naive.get_parameter(pname)
            p.copy_(quantize(p, plan.layers[name].weight))
        gi = {n: plan.layers[n].input for n in ("up", "down", "mix")}
        h = torch.relu(naive.up(quantize(x, gi["up"])))
        h = torch.tanh(naive.down(quantize(h, gi["down"])))
        want = quantize(h, gi["mix"]) @ naive.mix.t()
        torch.testing.assert_close(planned(x), want, rtol=1e-5, atol=1e-6)
    report = evaluate_plan(model, x, plan)
    assert abs(report.measured_sqnr_db - sqnr(model(x).detach(), want)) < 0.01
    assert planned.qwidgets_applied == ("up", "down", "mix")
    with torch.no_grad():  # a copy of the planned model keeps its taps (bound-method hooks)
        torch.testing.assert_close(copy.deepcopy(planned)(x), want, rtol=1e-5, atol=1e-6)


def test_owner_arguments_are_never_the_input_of_a_tapped_entry():
    # attn.query's input is the projected query, computed inside the attention: hooks on the
    # attention module must not touch its query argument for it
    from qwidgets.model.entries import call_inputs, find_entries, replace_inputs

    mha = nn.MultiheadAttention(4, 1)
    e = {x.name: x for x in find_entries(mha)}["query"]
    q = torch.randn(2, 1, 4)
    assert call_inputs(e, (q, q, q), {}) == []
    args, _ = replace_inputs(e, (q, q, q), {}, lambda v: v * 0)
    assert all(a is q for a in args)
