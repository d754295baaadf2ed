"""Per-token (dynamic, per-row) input grids: quantize, scan, plan, files, apply, refine, export.

Outside checks: a loop over rows written here (each row's own symmetric min-max grid in
float32); scan's token SQNR against a naive loop written here (a deep copy, a forward pre-hook
quantizing the input row by row, SQNR by hand); the planner against exhaustive search over
every option of a small table; the ONNX file in the ONNX reference evaluator and ONNX Runtime
with graph optimizations off (GUIDE.md: with them on, Runtime fuses quantize / dequantize
pairs) against apply_plan's model, float32 (relative 1e-5).
"""

from __future__ import annotations

import copy
import itertools
import json
import math

import numpy as np
import onnxruntime as ort
import pytest
import torch
from attention_models import MHAClassifier, TokenMLP, sequences
from onnx.reference import ReferenceEvaluator

from qwidgets import (
    LayerSetting,
    Plan,
    SensitivityTable,
    TokenGrid,
    apply_plan,
    evaluate_plan,
    export_codes,
    export_onnx,
    plan_budget,
    quantize,
    refine_plan,
    scan,
)
from qwidgets.planning.choices import build_menu


def rows_by_loop(x: torch.Tensor, bits: int) -> torch.Tensor:
    """Reference written here: every row (all axes but the last) on its own grid, one at a time."""
    qmax = 2 ** (bits - 1) - 1
    flat = x.float().reshape(-1, x.shape[-1])
    out = torch.empty_like(flat)
    for i in range(flat.shape[0]):
        row = flat[i]
        # float32 arithmetic, as a device computes it: the row's peak over qmax, at least tiny
        s = torch.maximum(row.abs().max() / qmax, torch.tensor(torch.finfo(torch.float32).tiny))
        out[i] = torch.clamp(torch.round(row / s), -qmax, qmax) * s
    return out.reshape(x.shape)


@pytest.mark.parametrize("bits", [2, 4, 6, 8])
def test_token_grid_quantizes_each_row_like_a_loop_over_rows(bits):
    x = torch.randn(3, 5, 17) * torch.logspace(-3, 2, 5).reshape(1, 5, 1)
    x[1, 2] = 0.0  # an all-zero row stays zero
    got = quantize(x, TokenGrid(bits))
    torch.testing.assert_close(got, rows_by_loop(x, bits), rtol=0, atol=0)
    assert torch.equal(got[1, 2], torch.zeros(17))
    # symmetric: each row's largest |x| is a grid value, so nothing is clipped
    assert torch.equal(got.abs().amax(-1), x.abs().amax(-1))


def test_token_grid_refuses_one_bit_and_rides_in_settings():
    with pytest.raises(ValueError, match="bits of a TokenGrid must be >= 2"):
        TokenGrid(1)
    s = LayerSetting(input=TokenGrid(8))
    assert s.input_granularity == "token" and LayerSetting().input_granularity is None
    with pytest.raises(TypeError, match="LayerSetting.weight must be a UniformGrid"):
        LayerSetting(weight=TokenGrid(8))


@pytest.fixture(scope="module")
def token_setup():
    torch.manual_seed(5)
    net = TokenMLP().eval()
    with torch.no_grad():
        net.fc2.weight[:, 3] *= 10.0  # an outlying input column: blocks pay off there
    x = torch.randn(24, 6, 16) * torch.logspace(-1, 1.5, 6).reshape(1, 6, 1)  # tokens of unlike ranges
    t = scan(net, x, bits=(3, 4, 8), quantize="separate", input_bits=(4, 8), progress=False,
             granularity=("channel", 8), input_granularity=("tensor", "token"))
    return net, x, t


def naive_token_sqnr(net, x, name, bits, scope):
    """Reference written here: a deep copy whose ``name`` gets its input quantized row by row
    in a forward pre-hook; SQNR of the layer's or the model's output, by hand in float64."""
    q = copy.deepcopy(net)
    outs = {}
    q.get_submodule(name).register_forward_pre_hook(lambda m, a: (rows_by_loop(a[0], bits),))
    ref_layer = {}
    net_copy = copy.deepcopy(net)
    net_copy.get_submodule(name).register_forward_hook(lambda m, a, o: ref_layer.setdefault("y", o))
    q.get_submodule(name).register_forward_hook(lambda m, a, o: outs.setdefault("y", o))
    with torch.no_grad():
        ref, got = net_copy(x).double(), q(x).double()
    if scope == "layer":
        ref, got = ref_layer["y"].double(), outs["y"].double()
    return 10 * math.log10(float(ref.square().sum()) / float((got - ref).square().sum()))


@pytest.mark.parametrize("name", ["fc1", "fc2", "head"])
def test_scan_token_rows_match_a_naive_loop(token_setup, name):
    net, x, t = token_setup
    assert t.input_granularities == ("tensor", "token")
    for b in (4, 8):
        for scope in ("layer", "model"):
            got = t.sqnr_db(name, b, scope=scope, source="input", granularity="token")
            # float32 forwards computed in other batch shapes: agree to float32 rounding
            assert got == pytest.approx(naive_token_sqnr(net, x, name, b, scope), abs=1e-3)
    # the tokens' ranges differ by 300x: a scale per token beats one per tensor at 4 bits
    assert t.sqnr_db(name, 4, source="input", granularity="token") > t.sqnr_db(name, 4, source="input")


def test_default_scan_measures_tensor_inputs_only_and_options_are_checked(token_setup):
    net, x, _ = token_setup
    t = scan(net, x[:4], bits=(8,), quantize="separate", input_bits=(8,), progress=False, scope="layer")
    assert t.input_granularities == ("tensor",)
    with pytest.raises(KeyError, match="was not scanned"):
        t.sqnr_db("fc1", 8, scope="layer", source="input", granularity="token")
    with pytest.raises(ValueError, match="needs quantize='separate'"):
        scan(net, x[:4], bits=(8,), progress=False, input_granularity=("tensor", "token"))
    with pytest.raises(ValueError, match="'tensor' and 'token'|options are 'tensor'"):
        scan(net, x[:4], bits=(8,), quantize="separate", progress=False, input_granularity=("row",))


def test_table_file_round_trips_token_rows(token_setup, tmp_path):
    _, _, t = token_setup
    t.save(tmp_path / "t.json")
    back = SensitivityTable.load(tmp_path / "t.json")
    assert back.input_granularities == ("tensor", "token")
    for scope in ("layer", "model"):
        np.testing.assert_array_equal(back.sqnr_array(scope, "input", "token"), t.sqnr_array(scope, "input", "token"))
    d = json.loads((tmp_path / "t.json").read_text())
    d["version"] = 5  # an older file cannot hold token rows
    (tmp_path / "old.json").write_text(json.dumps(d))
    with pytest.raises(ValueError, match="input_granularities|fields"):
        SensitivityTable.load(tmp_path / "old.json")


def _exhaustive(table, cost):
    """Reference written here: every combination of every entry's options; the least noise
    within the budget (same menu, same additive-noise prediction, same integer costs)."""
    menu = build_menu(table)
    costs = menu.costs(table, "bops")
    best = None
    for pick in itertools.product(*[range(len(o)) for o in menu.options]):
        c = sum(int(costs[i][k]) for i, k in enumerate(pick))
        if c <= cost:
            noise = sum(float(menu.noise[i][k]) for i, k in enumerate(pick))
            if best is None or noise < best[0]:
                best = (noise, [menu.options[i][k] for i, k in enumerate(pick)])
    return best


def test_planner_chooses_token_where_it_helps_and_matches_exhaustive_search():
    # layer0's input loses much more per tensor than per token; layer1's does not
    t = SensitivityTable.synthetic([[20.0, 40.0], [20.0, 40.0]], params=[100, 100], bits=(4, 8),
                                   input_sqnr_db=[[10.0, 30.0], [30.0, 50.0]], input_bits=(4, 8),
                                   input_token_sqnr_db=[[25.0, 45.0], [28.0, 48.0]])
    budget = 100 * 8 * 4 + 100 * 8 * 4
    p = plan_budget(t, bops=budget)
    noise, picked = _exhaustive(t, budget)
    assert p.predicted_sqnr_db == pytest.approx(-10 * math.log10(noise))
    assert [p.input_granularity[n] for n in t.layers] == [o[3] for o in picked]
    assert p.input_granularity == {"layer0": "token", "layer1": "tensor"}
    assert p.bops == budget  # a token grid costs the BOPs of its width
    q = plan_budget(t, bops=budget, allowed_input_granularity=("tensor",))
    assert set(q.input_granularity.values()) == {"tensor"} and q.predicted_sqnr_db < p.predicted_sqnr_db
    r = plan_budget(t, bops=budget, fixed={"layer1": {"input_granularity": "token"}})
    assert r.input_granularity["layer1"] == "token"
    with pytest.raises(ValueError, match="did not scan"):
        plan_budget(SensitivityTable.synthetic([[20.0]], params=[10], bits=(4,), input_sqnr_db=[[9.0]],
                                               input_bits=(4,)), bops=1e9,
                    allowed_input_granularity=("token",))


def test_plan_file_round_trips_token_inputs_and_older_files_read_as_tensor(token_setup):
    _, _, t = token_setup
    p = t.make_plan({n: 4 for n in t.layers}, chosen_input_bits={n: 8 for n in t.layers},
                    input_granularity={"fc1": "token", "head": "token"})
    assert p.input_granularity == {"fc1": "token", "fc2": "tensor", "head": "token"}
    back = Plan.from_json(p.to_json())
    assert back.input_granularity == p.input_granularity and back.layers["fc1"].input == TokenGrid(8)
    assert p.planned_kib == back.planned_kib and p.bops == back.bops
    d = json.loads(p.to_json())
    assert d["layers"]["fc1"]["input"] == {"bits": 8, "granularity": "token"}
    d["version"] = 5
    with pytest.raises(ValueError, match="from version 6"):
        Plan.from_json(json.dumps(d))
    old = t.make_plan({n: 4 for n in t.layers}, chosen_input_bits=8)
    d = json.loads(old.to_json())
    d["version"] = 5  # a version 5 file: fitted input grids, read as "tensor"
    assert set(Plan.from_json(json.dumps(d)).input_granularity.values()) == {"tensor"}


def _mixed_plan(t):
    """The issue's plan: per-channel and block weight grids, static and per-token inputs, under
    a KiB budget."""
    kib = 0.3 * 32 * sum(t.params(n) for n in t.layers) / 8192
    return plan_budget(t, planned_kib=kib, fixed={
        "fc1": {"bits": 4, "granularity": "channel", "input_bits": 8, "input_granularity": "token"},
        "fc2": {"granularity": 8, "input_bits": 8, "input_granularity": "tensor"},
        "head": {"input_bits": 4, "input_granularity": "token"}})


def test_mixed_plan_applies_evaluates_and_exports_codes_exactly(token_setup):
    net, x, t = token_setup
    p = _mixed_plan(t)
    assert p.granularity["fc1"] == "channel" and p.granularity["fc2"] == 8
    assert p.input_granularity == {"fc1": "token", "fc2": "tensor", "head": "token"}
    assert p.planned_kib <= 0.3 * 32 * sum(t.params(n) for n in t.layers) / 8192
    q = apply_plan(net, p)
    with torch.no_grad():
        got = q(x)
        # reference written here: the weights quantized in a copy, inputs by the row loop / grid
        ref = copy.deepcopy(net)
        for name, s in p.layers.items():
            m = ref.get_submodule(name)
            m.weight.copy_(quantize(m.weight, s.weight))
            m.register_forward_pre_hook(lambda mod, a, g=s.input: (
                rows_by_loop(a[0], g.bits) if isinstance(g, TokenGrid) else quantize(a[0], g),))
        torch.testing.assert_close(got, ref(x), rtol=0, atol=0)
    codes = export_codes(net, p)
    for name, entry in codes.items():
        want = q.get_submodule(name).weight.detach()
        g = p.layers[name].weight
        s, z = entry["scale"].double(), entry["zero_point"].double()
        if g.blocked:
            n = entry["codes"].shape[1]
            s = s.repeat_interleave(g.block_size, 1)[:, :n]
            z = z.repeat_interleave(g.block_size, 1)[:, :n]
        else:
            s, z = s.reshape(-1, 1), z.reshape(-1, 1)
        assert torch.equal(((entry["codes"].double() - z) * s).float(), want)
    assert codes["fc1"]["input"]["granularity"] == "token" and codes["fc1"]["input"]["scale"] is None
    rep = evaluate_plan(net, x, p)
    with torch.no_grad():
        r, o = net(x).double(), got.double()
    assert rep.measured_sqnr_db == pytest.approx(10 * math.log10(float(r.square().sum()) /
                                                                  float((o - r).square().sum())), abs=1e-6)


def _ort(path):
    so = ort.SessionOptions()
    so.graph_optimization_level = ort.GraphOptimizationLevel.ORT_DISABLE_ALL
    return ort.InferenceSession(str(path), so, providers=["CPUExecutionProvider"])


def test_mixed_plan_onnx_matches_apply_plan(token_setup, tmp_path):
    net, x, t = token_setup
    p = _mixed_plan(t)
    path = tmp_path / "m.onnx"
    proto = export_onnx(net, p, path, x[:2])
    ops = [n.op_type for n in proto.graph.node]
    assert ops.count("ReduceMax") == 2  # one per token input, scales computed in the graph
    with torch.no_grad():
        want = apply_plan(net, p)(x).numpy()
    feed = {"input_0": x.numpy()}
    for got in (ReferenceEvaluator(str(path)).run(None, feed)[0], _ort(path).run(None, feed)[0]):
        # the same grids; float32 matmuls summed in another order
        np.testing.assert_allclose(got, want, rtol=1e-5, atol=1e-5 * float(np.abs(want).max()))


def test_refine_keeps_token_inputs_and_learns_the_rest(token_setup):
    net, x, t = token_setup
    start = t.make_plan({n: 3 for n in t.layers}, chosen_input_bits=4, input_granularity={"fc1": "token"})
    r = refine_plan(net, x, start, steps=20, progress=False)
    assert r.plan.layers["fc1"].input == TokenGrid(4)
    assert r.plan.input_granularity == start.input_granularity
    assert r.sqnr_db > r.start_sqnr_db


@pytest.mark.filterwarnings("ignore::qwidgets.planning.scanning.ScanNote")
@pytest.mark.parametrize("kind", ["sdpa", "mha"])
def test_attention_activations_take_token_grids_in_apply_and_onnx(tmp_path, kind):
    from attention_models import MHAClassifier, SdpaBlock

    torch.manual_seed(2)
    if kind == "sdpa":
        net = SdpaBlock(16, 2).eval()
        x = torch.randn(6, 5, 16) * torch.logspace(-1, 1, 5).reshape(1, 5, 1)
    else:
        net = MHAClassifier().eval()
        x = torch.randn(6, 5, net.inp.in_features) * torch.logspace(-1, 1, 5).reshape(1, 5, 1)
    t = scan(net, x, bits=(8,), quantize="separate", input_bits=(4, 8), progress=False,
             input_granularity=("tensor", "token"))
    acts = [n for n in t.layers if t.kind(n) == "activation"]
    assert ("sdpa.query" if kind == "sdpa" else "attn.probs") in acts
    for n in acts:
        assert np.isfinite(t.sqnr_db(n, 8, source="input", granularity="token"))
    p = plan_budget(t, mean_bits=64, fixed={n: {"input_bits": 8, "input_granularity": "token"} for n in acts})
    assert all(p.input_granularity[n] == "token" for n in acts)
    with torch.no_grad():
        want = apply_plan(net, p)(x).numpy()
    path = tmp_path / "a.onnx"
    export_onnx(net, p, path, x[:2])
    feed = {"input_0": x.numpy()}
    for got in (ReferenceEvaluator(str(path)).run(None, feed)[0], _ort(path).run(None, feed)[0]):
        # float32 attention and matmuls summed in another order
        np.testing.assert_allclose(got, want, rtol=1e-5, atol=1e-5 * float(np.abs(want).max()))


def test_table_views_show_token_rows_and_device_rules_decide(token_setup):
    from qwidgets import DeviceRules

    net, x, t = token_setup
    rows = [r for r in t.to_rows() if r.get("input_granularity") == "token"]
    assert len(rows) == len(t.layers) * len(t.input_bits)
    assert rows[0]["model_sqnr_db"] == t.sqnr_db(rows[0]["layer"], rows[0]["bits"], source="input", granularity="token")
    assert "a scale per token" in t.to_html()
    with pytest.raises(ValueError, match="per_tensor_inputs=True"):
        scan(net, x[:4], bits=(8,), quantize="separate", input_bits=(8,), progress=False,
             rules=DeviceRules(), input_granularity=("tensor", "token"))
    ok = scan(net, x[:4], bits=(8,), quantize="separate", input_bits=(8,), progress=False, scope="layer",
              rules=DeviceRules(per_tensor_inputs=False), input_granularity=("tensor", "token"))
    assert ok.input_granularities == ("tensor", "token")
    assert DeviceRules().violations(TokenGrid(8), "input") and not \
        DeviceRules(per_tensor_inputs=False).violations(TokenGrid(8), "input")


def test_gain_estimate_and_split_scan_measure_token_rows(token_setup):
    from concurrent.futures import ThreadPoolExecutor

    net, x, t = token_setup
    kw = dict(bits=(4, 8), quantize="separate", input_bits=(4, 8), progress=False,
              granularity=("channel", 8), input_granularity=("tensor", "token"))
    with ThreadPoolExecutor(2) as pool:
        split = scan(net, x, executor=pool, **kw)
    np.testing.assert_array_equal(split.sqnr_array("model", "input", "token"), t.sqnr_array("model", "input", "token"))
    gain = scan(net, x, estimate="gain", **kw)
    # first-order estimate of the same noise: close at 8 bits (common practice: fine grids add noise linearly)
    np.testing.assert_allclose(gain.sqnr_array("model", "input", "token")[:, 1],
                               t.sqnr_array("model", "input", "token")[:, 1], atol=1.0)


def test_check_onnx_accepts_the_token_file(token_setup, tmp_path):
    from qwidgets import check_onnx

    net, x, t = token_setup
    p = _mixed_plan(t)
    export_onnx(net, p, tmp_path / "m.onnx", x[:2])
    c = check_onnx(tmp_path / "m.onnx", net, p, x)
    assert c.matches, c


def test_separate_scan_of_attention_keeps_every_weight_granularity_on_its_row():
    # a separate scan adds rows without weights (the attention's query ... probs) between the
    # weight rows; each block option's rows must follow the names (before: the weight scan's
    # block rows were kept in their own order and the table refused them). Reference: the
    # weight-only scan of the same model and data, which has no activation rows
    torch.manual_seed(2)
    net, x = MHAClassifier().eval(), sequences(n=12)
    kw = dict(bits=(4, 8), granularity=("channel", 8), progress=False)
    both = scan(net, x, quantize="separate", input_bits=(8,), **kw)
    weights = scan(net, x, **kw)
    assert "attn.probs" in both.layers and "attn.probs" not in weights.layers
    for name in weights.layers:
        for b in (4, 8):
            np.testing.assert_equal(both.sqnr_db(name, b, granularity=8),  # NaN: 'inp' skips blocks
                                    weights.sqnr_db(name, b, granularity=8))
            assert both.weight_grid(name, b, granularity=8) == weights.weight_grid(name, b, granularity=8)
    assert both.weight_grid("attn.probs", 4, granularity=8) is None
