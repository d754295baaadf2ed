"""Weights and inputs planned on their own: scan(quantize="separate"), tables with input rows,
plans with an input width per entry, apply / evaluate.

Outside checks:
- every scanned number equals the naive method written here: deep-copy the model, quantize
  that one entry's weight (overwrite it) or its input (a pre-hook), run the whole model and
  compare with the float output (SQNR by hand), to 1e-4 dB or float32's rounding bound where
  that is larger (conftest.f32_sqnr_tol_db); a conv net and an MLP, each written here;
- plan_budget on a "separate" table equals exhaustive enumeration of every (weight width,
  input width) per entry, costs counted here by hand (BOPs = MACs x weight bits x input bits,
  common practice);
- apply_plan's output equals the naive deep copy with those grids, exactly.
"""

from __future__ import annotations

import copy
import itertools
import json
import math

import numpy as np
import pytest
import torch
from conftest import f32_sqnr_tol_db
from hypothesis import given, settings
from hypothesis import strategies as st
from torch import nn

from qwidgets.core.rounding import quantize
from qwidgets.planning.apply import apply_plan
from qwidgets.planning.evaluate import evaluate_plan
from qwidgets.planning.scanning import scan
from qwidgets.planning.solver import pareto_front, plan_budget
from qwidgets.planning.table import SensitivityTable


def _sqnr(ref: torch.Tensor, out: torch.Tensor) -> float:
    ref, out = ref.double(), out.double()
    return 10 * math.log10(float(ref.pow(2).sum()) / float((out - ref).pow(2).sum()))


def _tol(sqnr_db: float) -> float:
    """1e-4 dB, or float32's rounding bound where that is larger: the scan runs the model under
    other batch shapes than the naive copy, and at 8 bits (about 51 dB) the kernels' rounding
    alone moves the SQNR by 1.5e-4 dB on some CPUs (seen on one with AVX-512 FP16 / AMX)."""
    return max(1e-4, f32_sqnr_tol_db(sqnr_db))


def _naive(model, x, name, wgrid=None, igrid=None):
    """Deep copy, quantize one entry's weight and / or input in the copy, full forward."""
    c = copy.deepcopy(model)
    layer = c.get_submodule(name)
    with torch.no_grad():
        if wgrid is not None:
            layer.weight.copy_(quantize(layer.weight.detach(), wgrid))
        if igrid is not None:
            layer.register_forward_pre_hook(lambda m, a: (quantize(a[0], igrid),) + tuple(a[1:]))
        return c(x)


def _conv_net():
    torch.manual_seed(3)
    return nn.Sequential(nn.Conv2d(2, 5, 3, padding=1), nn.ReLU(), nn.Conv2d(5, 4, 3), nn.ReLU(),
                         nn.Flatten(), nn.Linear(4 * 4 * 4, 3)).eval(), torch.randn(16, 2, 6, 6)


def _mlp():
    torch.manual_seed(4)
    return nn.Sequential(nn.Linear(6, 12), nn.Tanh(), nn.Linear(12, 4)).eval(), torch.randn(40, 6)


@pytest.mark.parametrize("make", [_conv_net, _mlp])
def test_separate_scan_equals_naive_deep_copy(make):
    model, x = make()
    state = {k: v.clone() for k, v in model.state_dict().items()}
    t = scan(model, x, bits=(2, 4, 8), quantize="separate", input_bits=(3, 6), progress=False)
    for k, v in model.state_dict().items():
        assert torch.equal(v, state[k])  # the user's model is untouched
    assert t.quantize == "separate" and t.input_bits == (3, 6) and t.bits == (2, 4, 8)
    ref = model(x).detach()
    for name in t.layers:
        for b in t.bits:
            naive = _sqnr(ref, _naive(model, x, name, wgrid=t.weight_grid(name, b)))
            assert t.sqnr_db(name, b, source="weight") == pytest.approx(naive, abs=_tol(naive))
            assert t.weight_grid(name, b).bits == b
        for b in t.input_bits:
            g = t.input_grid(name, b)
            assert g.bits == b
            naive = _sqnr(ref, _naive(model, x, name, igrid=g))
            assert t.sqnr_db(name, b, source="input") == pytest.approx(naive, abs=_tol(naive))
            # layer scope: the layer's output with its input quantized, by a hook written here
            lay = model.get_submodule(name)
            seen = []
            h = lay.register_forward_pre_hook(lambda m, a, seen=seen: seen.append(a[0].detach()))
            model(x)
            h.remove()
            xin = seen[0]
            naive_layer = _sqnr(lay(xin).detach(), lay(quantize(xin, g)).detach())
            assert t.sqnr_db(name, b, scope="layer", source="input") == pytest.approx(naive_layer, abs=_tol(naive_layer))
        with pytest.raises(KeyError, match="not scanned for the input"):
            t.sqnr_db(name, 4, source="input")
    assert len(t.to_rows()) == len(t.layers) * (len(t.bits) + len(t.input_bits))


def test_separate_table_json_round_trip_and_old_modes(tmp_path):
    model, x = _mlp()
    t = scan(model, x, bits=(4, 8), quantize="separate", input_bits=(4, 6, 8), progress=False)
    t.save(tmp_path / "t.json")
    u = SensitivityTable.load(tmp_path / "t.json")
    assert u.input_bits == (4, 6, 8) and u.quantize == "separate"
    for scope in ("layer", "model"):
        for source in ("weight", "input"):
            np.testing.assert_array_equal(u.sqnr_array(scope, source), t.sqnr_array(scope, source))
    assert u.input_grid("2", 6).scale_tensor().item() == pytest.approx(t.input_grid("2", 6).scale_tensor().item())
    # the input rows are in the JSON; the schema is strict about them
    d = json.loads((tmp_path / "t.json").read_text())
    assert len(d["layers"][0]["input_model_sqnr_db"]) == 3
    d["layers"][0]["input_model_sqnr_db"] = [1.0]
    (tmp_path / "bad.json").write_text(json.dumps(d))
    with pytest.raises(ValueError, match="input_model_sqnr_db must hold 3 values"):
        SensitivityTable.load(tmp_path / "bad.json")
    # the older modes: input widths are their bits or none
    w = scan(model, x, bits=(4, 8), progress=False)
    assert w.input_bits == ()
    with pytest.raises(ValueError, match="no input rows"):
        w.sqnr_db("0", 4, source="input")
    both = scan(model, x, bits=(4, 8), quantize="both", progress=False)
    assert both.input_bits == (4, 8) and both.sqnr_db("0", 4, source="input") == both.sqnr_db("0", 4)
    with pytest.raises(ValueError, match="source must be 'weight' or 'input'"):
        both.sqnr_db("0", 4, source="bias")


def _separate_table(rng, n, wbits=(2, 4, 8), ibits=(4, 8)):
    params = rng.integers(20, 400, n)
    sw = np.sort(6.02 * np.array(wbits)[None] + rng.normal(0, 4, (n, 1)) + rng.normal(0, 1, (n, len(wbits))), 1)
    si = np.sort(6.02 * np.array(ibits)[None] + rng.normal(3, 4, (n, 1)) + rng.normal(0, 1, (n, len(ibits))), 1)
    return SensitivityTable.synthetic(sw, params=params.tolist(), bits=wbits, input_sqnr_db=si,
                                      input_bits=ibits, macs=(params * rng.integers(1, 30, n)).tolist())


def _brute(t, budgets, fixed=None, allowed=None):
    """Least-noise (weight, input) widths per entry by enumeration; costs counted here."""
    fixed, allowed = fixed or {}, allowed or {}
    nw = 10 ** (-t.sqnr_array("model", "weight") / 10)
    ni = 10 ** (-t.sqnr_array("model", "input") / 10)
    menus = []
    for n in t.layers:
        opts = [(w, i) for w in t.bits for i in t.input_bits]
        pin = fixed.get(n)
        if isinstance(pin, int):
            opts = [o for o in opts if o[0] == pin]
        elif pin is not None:
            opts = [o for o in opts if o == pin]
        else:
            opts = [o for o in opts if o[0] in allowed.get("weight", t.bits) and o[1] in allowed.get("input", t.input_bits)]
        menus.append(opts)
    best = None
    for combo in itertools.product(*menus):
        kib = sum(t.params(n) * w + 64 for n, (w, _) in zip(t.layers, combo, strict=True)) / 8192
        bops = sum(t.macs(n) * w * i for n, (w, i) in zip(t.layers, combo, strict=True))
        mean = kib * 8192 / sum(t.params(n) for n in t.layers)  # stored bits per weight
        cost = {"planned_kib": kib, "bops": bops, "mean_bits": mean}
        if all(cost[k] <= v for k, v in budgets.items()):
            noise = sum(nw[r, t.bits.index(w)] + ni[r, t.input_bits.index(i)] for r, (w, i) in enumerate(combo))
            if best is None or noise < best[0]:
                best = (noise, combo)
    return best


@settings(max_examples=25, deadline=None)
@given(st.integers(0, 10**6), st.integers(1, 4), st.sampled_from(["kib+bops", "bops", "mean+bops"]),
       st.booleans())
def test_plan_budget_on_separate_table_equals_enumeration(seed, n, kinds, restrict):
    rng = np.random.default_rng(seed)
    t = _separate_table(rng, n)
    lo_b = sum(t.macs(x) * 2 * 4 for x in t.layers)
    hi_b = sum(t.macs(x) * 8 * 8 for x in t.layers)
    budgets = {"bops": float(rng.uniform(lo_b, hi_b))}
    if kinds == "kib+bops":
        budgets["planned_kib"] = float(rng.uniform(sum(t.params(x) * 2 + 64 for x in t.layers),
                                                  sum(t.params(x) * 8 + 64 for x in t.layers))) / 8192
    elif kinds == "mean+bops":
        budgets["mean_bits"] = float(rng.uniform(2, 8))
    fixed = {t.layers[0]: (8, 4)} if restrict else None
    allowed = {"weight": (2, 8), "input": (8,)} if restrict else None
    best = _brute(t, budgets, fixed, allowed)
    if best is None:
        with pytest.raises(ValueError, match="infeasible"):
            plan_budget(t, **budgets, fixed=fixed, allowed_bits=allowed)
        return
    plan = plan_budget(t, **budgets, fixed=fixed, allowed_bits=allowed)
    assert plan.predicted_sqnr_db == pytest.approx(-10 * math.log10(best[0]), abs=1e-6)
    assert plan.bops <= budgets["bops"]
    # Plan.bops by hand: each entry with its own input width
    assert plan.bops == sum(t.macs(x) * plan.bits[x] * plan.chosen_input_bits[x] for x in t.layers)
    if fixed:
        assert (plan.bits[t.layers[0]], plan.chosen_input_bits[t.layers[0]]) == (8, 4)


def test_make_plan_input_widths_and_bops():
    rng = np.random.default_rng(0)
    t = _separate_table(rng, 3)
    a, b, c = t.layers
    p = t.make_plan({a: 2, b: 4, c: 8}, chosen_input_bits={a: 4, b: None})
    assert p.chosen_input_bits == {a: 4, b: None, c: None}
    # floats inputs count the assumed width (8 by default) in BOPs
    assert p.bops == t.macs(a) * 2 * 4 + t.macs(b) * 4 * 8 + t.macs(c) * 8 * 8
    q = t.make_plan({a: 2, b: 4, c: 8}, chosen_input_bits=8)
    assert q.chosen_input_bits == {a: 8, b: 8, c: 8}
    with pytest.raises(KeyError, match="not scanned for the input"):
        t.make_plan({a: 2}, chosen_input_bits=6)
    w = SensitivityTable.synthetic(np.array([[10.0, 20.0]]), params=[10], bits=(4, 8))
    with pytest.raises(ValueError, match="chosen_input_bits needs a table scanned with quantize='separate'"):
        w.make_plan({"layer0": 4}, chosen_input_bits={"layer0": 8})
    assert w.make_plan({"layer0": 4}, assumed_input_bits=4).chosen_input_bits == {"layer0": None}


def test_bops_budget_chooses_input_widths_and_front():
    # one entry, counted by hand: the 8-bit input costs twice the BOPs of the 4-bit one
    t = SensitivityTable.synthetic([[20.0, 40.0]], params=[100], bits=(4, 8), input_sqnr_db=[[24.0, 48.0]],
                                   input_bits=(4, 8), macs=[1000])
    assert plan_budget(t, bops=1000 * 8 * 4).chosen_input_bits == {"layer0": 4}
    p = plan_budget(t, bops=1000 * 4 * 8)  # (4, 8) or (8, 4): noise 1e-2 + 1.6e-5 beats 1e-4 + 4e-3
    assert (p.bits["layer0"], p.chosen_input_bits["layer0"]) == (8, 4)
    assert plan_budget(t, model_kib=1.0).chosen_input_bits == {"layer0": 8}  # inputs free: the widest
    front = pareto_front(t, "bops")
    assert [c for c, _, _ in front] == [16000, 32000, 64000]


def test_apply_and_evaluate_quantize_the_planned_inputs():
    model, x = _conv_net()
    t = scan(model, x, bits=(4, 8), quantize="separate", input_bits=(4, 8), progress=False)
    plan = plan_budget(t, bops=0.5 * sum(t.macs(n) * 8 * 8 for n in t.layers) + 1)
    assert any(v == 4 for v in plan.chosen_input_bits.values())
    out = apply_plan(model, plan)(x).detach()
    # naive: deep copy, overwrite every planned weight, pre-hooks on the planned inputs
    c = copy.deepcopy(model)
    for name, s in plan.layers.items():
        lay = c.get_submodule(name)
        with torch.no_grad():
            lay.weight.copy_(quantize(lay.weight.detach(), s.weight))
        if s.input is not None:
            lay.register_forward_pre_hook(lambda m, a, g=s.input: (quantize(a[0], g),))
    assert torch.equal(out, c(x).detach())
    rep = evaluate_plan(model, x, plan)
    assert rep.measured_sqnr_db == pytest.approx(_sqnr(model(x).detach(), out), abs=1e-6)
    assert rep.bops == plan.bops
    back = type(plan).from_json(plan.to_json())
    assert back.chosen_input_bits == plan.chosen_input_bits and back.bops == plan.bops


def test_separate_reads_a_one_shot_generator_for_both_sides():
    # both sides share one data source, so a generator (read once) serves the input side too;
    # the table equals the one scanned from the same batches given as a list
    torch.manual_seed(0)
    net = nn.Sequential(nn.Linear(8, 16), nn.ReLU(), nn.Linear(16, 4)).eval()
    x = torch.randn(32, 8)
    once = scan(net, (b for b in x.split(8)), bits=(4, 8), input_bits=(6, 8), quantize="separate",
                progress=False)
    again = scan(net, _Reiterable(x.split(8)), bits=(4, 8), input_bits=(6, 8), quantize="separate",
                 progress=False)
    assert once.input_bits == (6, 8)
    for source in ("weight", "input"):
        assert (once.sqnr_array("model", source) == again.sqnr_array("model", source)).all()


class _Reiterable:
    def __init__(self, batches):
        self.batches = list(batches)

    def __iter__(self):
        return iter(self.batches)
