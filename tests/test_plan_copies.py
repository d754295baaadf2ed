"""Applying and evaluating a plan copies the model once (a 1.1B-parameter model is 4.4 GB), and
evaluation compares outputs in blocks (no float64 copy of a language model's whole logits).

Outside check: the number of ``copy.deepcopy`` calls made on the user's model, counted by
wrapping Python's own ``copy.deepcopy``; the planned copy's output is compared with a naive
copy written here (deep copy, each planned weight overwritten with its quantized values).
"""

from __future__ import annotations

import copy

import torch
from torch import nn

from qwidgets.core.rounding import quantize
from qwidgets.planning.apply import apply_plan
from qwidgets.planning.evaluate import evaluate_plan
from qwidgets.planning.scanning import scan
from qwidgets.planning.solver import plan_budget


def _count_model_copies(monkeypatch, model) -> list:
    calls, real = [], copy.deepcopy

    def counting(x, memo=None, _nil=[]):  # noqa: B006 (copy.deepcopy's own signature)
        if x is model:
            calls.append(1)
        return real(x, memo)

    monkeypatch.setattr(copy, "deepcopy", counting)
    return calls


def test_apply_and_evaluate_copy_the_model_once(monkeypatch):
    torch.manual_seed(0)
    net = nn.Sequential(nn.Linear(8, 16), nn.ReLU(), nn.Linear(16, 4)).eval()
    x = torch.randn(32, 8)
    plan = plan_budget(scan(net, x, bits=(4, 8), progress=False), mean_bits=12)
    calls = _count_model_copies(monkeypatch, net)
    planned = apply_plan(net, plan)
    assert len(calls) == 1
    report = evaluate_plan(net, x, plan)
    assert len(calls) == 2  # one more, for evaluate_plan's own copy
    naive = copy.deepcopy(net)
    with torch.no_grad():
        for name, setting in plan.layers.items():
            naive.get_submodule(name).weight.copy_(quantize(naive.get_submodule(name).weight, setting.weight))
        assert torch.equal(planned(x), naive(x))
    assert report.measured_sqnr_db > 20


def test_output_comparison_in_blocks_gives_the_sums_of_one_pass(monkeypatch):
    # evaluate_plan compares a language model's logits a block of values at a time (no float64
    # copy of the whole output); the sums are those of one float64 pass written here, to
    # float64 rounding of a different summation order (relative 1e-12)
    from qwidgets.model import outputs

    g = torch.Generator().manual_seed(0)
    r = torch.randn(3, 50, 7, generator=g)
    a = r + 0.05 * torch.randn(r.shape, generator=g)
    monkeypatch.setattr(outputs, "_BLOCK", 64)  # 17 blocks
    c = outputs.OutputComparison()
    c.add([r], [a])
    rd, ad = r.reshape(-1).double(), a.reshape(-1).double()
    e = ad - rd
    for got, want in ((c.sig, rd.dot(rd)), (c.err, e.dot(e)), (c.app, ad.dot(ad)), (c.cross, rd.dot(ad))):
        assert abs(got / float(want) - 1) <= 1e-12
    assert (c.max_abs, c.lo, c.hi, c.n) == (float(e.abs().max()), float(r.min()), float(r.max()), r.numel())
