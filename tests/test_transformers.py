"""Transformers end to end: scan -> plan -> refine -> export -> check, for nn.MultiheadAttention,
nn.TransformerEncoder / nn.TransformerDecoderLayer and a GPT-style decoder written with
F.scaled_dot_product_attention (keyword input, tied embedding, deep-copied blocks, a
dataclass output, data from a DataLoader of (inputs, targets) pairs).

Outside checks: a naive loop written here (deep copy of the model, each planned tensor
rounded onto its grid with torch's round / clamp, each planned attention input rounded by a
forward pre-hook written here, forward); the ONNX reference evaluator
(onnx.reference.ReferenceEvaluator) and ONNX Runtime with graph optimizations off run each
exported file (through check_onnx, and once directly here). Tolerances: float32 results of
the same arithmetic in another operation order (the attention fast path, the runtime's
kernels) differ by a few float32 roundings, so "equal" is a relative difference < 1e-5.
"""

from __future__ import annotations

import copy
import dataclasses
import math
import warnings

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import torch
import torch.nn.functional as F
from onnx.reference import ReferenceEvaluator
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

from qwidgets import (
    apply_plan,
    check_onnx,
    evaluate_plan,
    export_onnx,
    metric_curve,
    plan_budget,
    refine_plan,
    scan,
)
from tests.attention_models import SdpaBlock
from tests.stored_bits import mean_bits_for

RTOL = 1e-5  # a few float32 roundings of outputs of order 1
METRIC_ABS = 1e-6  # a float32 mean of 0 / 1 values, per batch or over all samples at once


def _rel(a, b) -> float:
    a, b = torch.as_tensor(np.asarray(a)).double(), torch.as_tensor(np.asarray(b)).double()
    return float((a - b).norm() / b.norm())


# ---------------------------------------------------------------------------- the naive loop
def _naive_round(x: torch.Tensor, grid) -> torch.Tensor:
    """Round ``x`` onto ``grid`` by hand: codes clamp(round(x / S) + Z), values (q - Z) * S."""
    s = grid.scale_tensor().to(torch.float64)
    z = torch.as_tensor(grid.zero_point, dtype=torch.float64)
    if grid.axis is not None:
        shape = [1] * x.dim()
        shape[grid.axis] = -1
        s, z = s.reshape(shape), z.reshape(shape) if z.dim() else z
    q = torch.clamp(torch.round(x.double() / s) + z, grid.qmin, grid.qmax)
    return ((q - z) * s).to(x.dtype)


def _naive_planned(model: nn.Module, plan) -> nn.Module:
    """Deep copy; every planned weight rounded; every planned input rounded by a pre-hook."""
    net = copy.deepcopy(model).eval()
    with torch.no_grad():
        for name, s in plan.layers.items():
            path, attr = _param_of(net, name)
            owner = net.get_submodule(path) if path else net
            if s.weight is not None:
                p = getattr(owner, attr)
                p.copy_(_naive_round(p.detach(), s.weight))
            if s.input is not None:
                # the arguments this entry's weight multiplies: an attention's query, key and
                # value for in_proj, one of them for q_proj / k_proj / v_proj, else the first
                which = {"in_proj": (0, 1, 2), "q_proj": (0,), "k_proj": (1,), "v_proj": (2,)}.get(
                    name.rsplit(".", 1)[-1], (0,)) if isinstance(owner, nn.MultiheadAttention) else (0,)

                def hook(module, args, kwargs, g=s.input, which=which):
                    done = {}

                    def r(v):
                        if id(v) not in done:
                            done[id(v)] = _naive_round(v, g)
                        return done[id(v)]
                    return tuple(r(a) if i in which else a for i, a in enumerate(args)), kwargs
                owner.register_forward_pre_hook(hook, with_kwargs=True)
    return net


def _hooked_part(plan):
    """The plan's weights, and the inputs its owner module receives: what the naive loop above
    reaches with module hooks. Attention's own activations (query / key / value /
    probabilities, the context entering out_proj, scaled_dot_product_attention's operands)
    are checked against hand-written attentions in test_attention_activations.py; here the
    full plan is checked through the exported file against apply_plan."""
    from qwidgets import LayerSetting, Plan

    layers = {}
    for n, s in plan.layers.items():
        if plan.entries[n].get("kind") == "activation":
            continue
        inp = None if n.endswith("out_proj") else s.input  # the context: inside the attention
        layers[n] = LayerSetting(weight=s.weight, input=inp)
    return Plan(layers, {n: plan.bits[n] for n in layers}, fingerprint=plan.fingerprint,
                weight_shapes={n: plan.weight_shapes[n] for n in layers},
                macs={n: plan.macs[n] for n in layers},
                entries={n: {k: v for k, v in plan.entries[n].items() if k != "partner"} for n in layers})


def _param_of(net, name):
    """(owner path, parameter attribute) of a plan entry, written out here per entry kind."""
    if name.endswith(".in_proj"):
        return name[: -len(".in_proj")], "in_proj_weight"
    for k in ("q", "k", "v"):
        if name.endswith(f".{k}_proj"):
            return name[: -len(f".{k}_proj")], f"{k}_proj_weight"
    return name, "weight"


# ---------------------------------------------------------------------------- the models
class Attention(nn.Module):
    """Self-attention, then cross-attention to a memory of another width (separate q/k/v)."""

    def __init__(self):
        super().__init__()
        self.inp = nn.Linear(6, 16)
        self.self_attn = nn.MultiheadAttention(16, 2, batch_first=True)
        self.cross = nn.MultiheadAttention(16, 2, kdim=5, vdim=5, batch_first=True)
        self.head = nn.Linear(16, 3)

    def forward(self, x, memory):
        h = self.inp(x)
        h = h + self.self_attn(h, h, h, need_weights=False)[0]
        h = h + self.cross(h, memory, memory, need_weights=False)[0]
        return self.head(h.mean(1))


class EncoderDecoder(nn.Module):
    """nn.TransformerEncoder (two byte-identical layers as built) and a TransformerDecoderLayer."""

    def __init__(self):
        super().__init__()
        self.inp = nn.Linear(6, 16)
        layer = nn.TransformerEncoderLayer(16, 2, 32, dropout=0.0, batch_first=True)
        self.enc = nn.TransformerEncoder(layer, 2, enable_nested_tensor=False)
        self.dec = nn.TransformerDecoderLayer(16, 2, 32, dropout=0.0, batch_first=True)
        self.head = nn.Linear(16, 3)

    def forward(self, x):
        mem = self.enc(self.inp(x))
        return self.head(self.dec(mem[:, :3], mem).mean(1))


@dataclasses.dataclass
class LMOutput:
    logits: torch.Tensor
    hidden: torch.Tensor


def Block(d: int, heads: int) -> nn.Module:  # noqa: N802 - a block class with a wider MLP
    return SdpaBlock(d, heads, mlp=4)


class TinyGPT(nn.Module):
    """GPT-style decoder: tied embedding, deep-copied (byte-identical) blocks, keyword input."""

    def __init__(self, vocab=23, d=16, heads=2, n=2, length=8):
        super().__init__()
        self.emb = nn.Embedding(vocab, d)
        self.pos = nn.Parameter(torch.randn(1, length, d) * 0.1)
        self.blocks = nn.ModuleList([copy.deepcopy(Block(d, heads))] * 1 + [None] * 0)
        first = self.blocks[0]
        for _ in range(n - 1):
            self.blocks.append(copy.deepcopy(first))
        self.ln = nn.LayerNorm(d)
        self.head = nn.Linear(d, vocab, bias=False)
        self.head.weight = self.emb.weight

    def forward(self, input_ids):
        h = self.emb(input_ids) + self.pos
        for blk in self.blocks:
            h = blk(h)
        h = self.ln(h)
        return LMOutput(logits=self.head(h), hidden=h)


def _token_acc(out, target) -> float:
    return float((out.logits.argmax(-1) == target).float().mean())


# ---------------------------------------------------------------------------- fixtures
@pytest.fixture(params=[True, False], ids=["fastpath-on", "fastpath-off"])
def user_fastpath(request):
    before = torch.backends.mha.get_fastpath_enabled()
    torch.backends.mha.set_fastpath_enabled(request.param)
    yield request.param
    torch.backends.mha.set_fastpath_enabled(before)


def _planned_pair(net, data, **kw):
    table = scan(net, data, bits=(4, 8), quantize="separate", input_bits=(8,), progress=False, **kw)
    return table, plan_budget(table, mean_bits=mean_bits_for(table, 6.5))


# ---------------------------------------------------------------------------- tests
@pytest.mark.parametrize("family", ["attention", "encoder-decoder"])
def test_attention_models_scan_plan_refine_export_check(family, user_fastpath, tmp_path):
    torch.manual_seed(0)
    net = (Attention() if family == "attention" else EncoderDecoder()).eval()
    if family == "attention":
        data = (torch.randn(48, 7, 6), torch.randn(48, 4, 5))
    else:
        data = (torch.randn(48, 7, 6),)
        a, b = net.enc.layers[0].self_attn.in_proj_weight, net.enc.layers[1].self_attn.in_proj_weight
        assert torch.equal(a, b)  # byte-identical layers, as nn.TransformerEncoder builds them
    state = {k: v.clone() for k, v in net.state_dict().items()}
    table, plan = _planned_pair(net, data)
    assert torch.backends.mha.get_fastpath_enabled() is user_fastpath  # the user's setting, restored
    inputs_planned = [n for n, s in plan.layers.items() if s.input is not None]
    assert any(n.endswith("in_proj") or n.endswith("_proj") for n in inputs_planned)

    # apply_plan and evaluate_plan against the naive loop (float32 rounding apart)
    held = tuple(d[:16] for d in data)
    hooked = _hooked_part(plan)
    naive = _naive_planned(net, hooked)
    with torch.no_grad():
        want = naive(*held)
        got = apply_plan(net, hooked)(*held)
        ref = net(*held)
    assert _rel(got, want) < RTOL
    report = evaluate_plan(net, held, hooked)
    naive_db = 10 * math.log10(float(ref.double().square().sum() / (want.double() - ref.double()).square().sum()))
    assert report.measured_sqnr_db == pytest.approx(naive_db, abs=0.01)

    # refine_plan accepts the plan, input rows included, and keeps widths
    r = refine_plan(net, data, plan, steps=4, batch_size=16, progress=False)
    assert r.plan.bits == plan.bits and r.sqnr_db >= r.start_sqnr_db
    assert all(r.plan.layers[n].input is not None for n in inputs_planned)

    # export: the file matches apply_plan in the reference evaluator and plain ONNX Runtime
    path = tmp_path / f"{family}.onnx"
    proto = export_onnx(net, plan, path, tuple(d[:2] for d in data))
    assert torch.backends.mha.get_fastpath_enabled() is user_fastpath
    assert sum(n.op_type == "QuantizeLinear" for n in proto.graph.node) >= len(inputs_planned)
    check = check_onnx(path, net, plan, held)
    assert check.matches, str(check)
    assert check.reference_diff < RTOL and check.runtime_diff < RTOL
    assert math.isfinite(check.optimized_diff) or check.optimized_error
    feed = {f"input_{i}": d.numpy() for i, d in enumerate(held)}
    with torch.no_grad():
        planned = apply_plan(net, plan)(*held)
    assert _rel(ReferenceEvaluator(str(path)).run(None, feed)[0], planned) < RTOL  # direct
    activations = [n for n in plan.layers if plan.entries[n].get("kind") == "activation"]
    assert {n.rsplit(".", 1)[-1] for n in activations} >= {"query", "key", "value", "probs"}
    q_nodes = {n.name.rsplit("_quantize", 1)[0] for n in proto.graph.node if n.op_type == "QuantizeLinear"}
    assert {f"{n}.input" for n in activations} <= q_nodes  # every planned activation quantized
    hooked_path = tmp_path / f"{family}-hooked.onnx"  # the naive loop's plan, through a file
    export_onnx(net, hooked, hooked_path, tuple(d[:2] for d in data))
    assert _rel(ReferenceEvaluator(str(hooked_path)).run(None, feed)[0], want) < RTOL
    assert all(torch.equal(v, state[k]) for k, v in net.state_dict().items())
    if family == "encoder-decoder":  # each identical layer has its own weight in the file
        dq = [n.output[0] for n in proto.graph.node if n.op_type == "DequantizeLinear"]
        assert {"enc.layers.0.self_attn.in_proj_weight", "enc.layers.1.self_attn.in_proj_weight"} <= set(dq)


def test_float_passes_equal_the_float_model_with_the_fast_path_on(user_fastpath):
    """The tool's passes run the decomposed attention; their float output equals the model's
    own (fast path or not) up to float32 rounding: a plan that quantizes nothing measurably
    measures an SQNR far above any quantization effect."""
    torch.manual_seed(1)
    net = EncoderDecoder().eval()
    x = torch.randn(16, 7, 6)
    table, plan = _planned_pair(net, x)
    with torch.no_grad():
        ref = net(x)
    from qwidgets.model.fastpath import attention_fastpath_off

    with attention_fastpath_off(), torch.no_grad():
        slow = net(x)
    assert _rel(slow, ref) < RTOL
    assert torch.backends.mha.get_fastpath_enabled() is user_fastpath


def test_one_module_switches_the_fast_path():
    """Every pass goes through model/fastpath.py; no second helper sets torch's switch."""
    from pathlib import Path

    root = Path(__file__).resolve().parents[1] / "qwidgets"
    setters = sorted(str(p.relative_to(root)) for p in root.rglob("*.py")
                     if "set_fastpath_enabled" in p.read_text())
    assert setters == ["model/fastpath.py"]


def test_gpt_decoder_keyword_input_dataclass_output_and_loader_pairs(tmp_path):
    torch.manual_seed(2)
    net = TinyGPT().eval()
    assert torch.equal(net.blocks[0].qkv.weight, net.blocks[1].qkv.weight)
    ids = torch.randint(0, 23, (64, 8))
    nxt = torch.roll(ids, -1, dims=1)
    loader = DataLoader(TensorDataset(ids, nxt), batch_size=16, shuffle=True,
                        generator=torch.Generator().manual_seed(0))
    pick = lambda b: {"input_ids": b[0]}  # noqa: E731
    logits = lambda o: o.logits  # noqa: E731
    with pytest.raises(TypeError, match=r"inputs=0"):
        scan(net, loader, bits=(8,), progress=False)  # a pair without inputs=: the error says so
    table = scan(net, loader, bits=(4, 8), progress=False, inputs=pick, output=logits)
    plan = plan_budget(table, mean_bits=mean_bits_for(table, 6))
    assert "emb" in plan.layers and "head" not in plan.layers  # tied: one entry

    report = evaluate_plan(net, loader, plan, metric=_token_acc, target=1, inputs=pick, output=logits,
                           confidence=0.9, n_boot=50)
    assert report.drop_low <= report.drop <= report.drop_high
    naive = _naive_planned(net, plan)
    with torch.no_grad():
        ref, want = net(input_ids=ids), naive(input_ids=ids)
    naive_acc = float((want.logits.argmax(-1) == nxt).float().mean())
    assert report.metric_planned == pytest.approx(naive_acc, abs=METRIC_ABS)  # every sample once, any order
    db = 10 * math.log10(float(ref.logits.double().square().sum()
                               / (want.logits.double() - ref.logits.double()).square().sum()))
    assert report.measured_sqnr_db == pytest.approx(db, abs=0.01)
    curve = metric_curve(net, loader, table, metric=_token_acc, target=1, inputs=pick, output=logits,
                         points=2, n_boot=20)
    assert len(curve) == 2

    r = refine_plan(net, {"input_ids": ids}, plan, steps=3, batch_size=16, progress=False, output=logits)
    assert r.plan.bits == plan.bits

    path = tmp_path / "gpt.onnx"
    proto = export_onnx(net, plan, path, {"input_ids": ids[:2]})
    assert [i.name for i in proto.graph.input] == ["input_ids"]
    check = check_onnx(path, net, plan, loader, inputs=pick, target=1, metric=_token_acc, output=logits)
    assert check.matches, str(check)
    assert check.metric_planned == pytest.approx(naive_acc, abs=METRIC_ABS)
    so = ort.SessionOptions()
    so.graph_optimization_level = ort.GraphOptimizationLevel.ORT_DISABLE_ALL
    got = ort.InferenceSession(str(path), so, providers=["CPUExecutionProvider"]).run(
        None, {"input_ids": ids.numpy()})
    assert _rel(got[0], want.logits) < RTOL  # output_0: the dataclass's first tensor

    # activations too: scaled_dot_product_attention's operands and every layer's input
    sep = scan(net, {"input_ids": ids}, bits=(4, 8), quantize="separate", input_bits=(8,), progress=False,
               output=logits)
    both = plan_budget(sep, mean_bits=mean_bits_for(sep, 6))
    sdpa = [n for n in both.layers if ".sdpa." in n]
    assert {n.rsplit(".", 1)[-1] for n in sdpa} == {"query", "key", "value"}
    r = refine_plan(net, {"input_ids": ids}, both, steps=2, batch_size=16, progress=False, output=logits)
    assert r.plan.bits == both.bits
    export_onnx(net, both, tmp_path / "gpt-both.onnx", {"input_ids": ids[:2]})
    check = check_onnx(tmp_path / "gpt-both.onnx", net, both, {"input_ids": ids}, output=logits)
    assert check.matches, str(check)


@pytest.mark.parametrize("dtype", [torch.float16, torch.bfloat16])
def test_half_precision_models_export_as_float32_files(dtype, tmp_path):
    torch.manual_seed(3)
    half = nn.Sequential(nn.Linear(8, 16), nn.ReLU(), nn.Linear(16, 4)).eval().to(dtype)
    x = torch.randn(64, 8).to(dtype)
    table = scan(half, x, bits=(4, 8), quantize="separate", input_bits=(8,), progress=False)
    plan = plan_budget(table, mean_bits=mean_bits_for(table, 6))
    with pytest.warns(UserWarning, match="computes in float32"):
        proto = export_onnx(half, plan, tmp_path / "h.onnx", x[:2])
    assert "float32" in proto.doc_string
    onnx.checker.check_model(proto, full_check=True)
    check = check_onnx(tmp_path / "h.onnx", half, plan, x)
    assert check.matches, str(check)
    assert "float32 copy" in check.note and str(dtype).replace("torch.", "") in check.note


def test_check_onnx_and_export_say_what_to_install(monkeypatch, tmp_path):
    import sys

    net = nn.Linear(3, 2)
    monkeypatch.setitem(sys.modules, "onnxruntime", None)  # import fails as when not installed
    with pytest.raises(ImportError, match=r"pip install 'qwidgets\[onnx\]'"):
        check_onnx(tmp_path / "x.onnx", net, None, torch.zeros(1, 3))
    monkeypatch.setitem(sys.modules, "onnx", None)
    with pytest.raises(ImportError, match=r"pip install 'qwidgets\[onnx\]'"):
        export_onnx(net, None, tmp_path / "x.onnx", torch.zeros(1, 3))


def test_loader_pairs_need_inputs_and_take_index_targets():
    torch.manual_seed(4)
    net = nn.Sequential(nn.Linear(5, 8), nn.ReLU(), nn.Linear(8, 3)).eval()
    x, y = torch.randn(40, 5), torch.randint(0, 3, (40,))
    loader = DataLoader(TensorDataset(x, y), batch_size=16)
    with pytest.raises(TypeError, match=r"pass inputs=0 \(and target=1"):
        scan(net, loader, bits=(8,), progress=False)
    table = scan(net, loader, bits=(4, 8), progress=False, inputs=0)
    plan = plan_budget(table, mean_bits=mean_bits_for(table, 6))
    with pytest.raises(TypeError, match=r"data batch 0 is a tuple of 2 values.*pass inputs=0"):
        evaluate_plan(net, loader, plan)

    def acc(out, t):
        return float((out.argmax(1) == t).float().mean())
    by_pairs = evaluate_plan(net, loader, plan, metric=acc, target=1, inputs=0)
    whole = evaluate_plan(net, x, plan, metric=acc, target=y)
    assert by_pairs.metric_planned == pytest.approx(whole.metric_planned, abs=METRIC_ABS)
    one = evaluate_plan(net, (x, y), plan, metric=acc, target=1, inputs=0)
    assert one.metric_planned == pytest.approx(whole.metric_planned, abs=METRIC_ABS)
    with pytest.raises(ValueError, match=r"inputs='x' names a key"):
        evaluate_plan(net, loader, plan, inputs="x")
    with pytest.raises(TypeError, match="inputs must be None, an int index"):
        evaluate_plan(net, loader, plan, inputs=1.5)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        r = refine_plan(net, (x, y), plan, steps=2, progress=False, inputs=0, target=1,
                        loss=lambda o, t: F.cross_entropy(o, t))
    assert r.plan.bits == plan.bits


def test_check_text_explains_what_a_difference_means():
    from qwidgets import OnnxCheck

    same = OnnxCheck("m.onnx", 8, 1e-7, 1e-7, 1e-7, 1e-7, 1e-7, 1e-7, plan_diff=0.05)
    fused = OnnxCheck("m.onnx", 8, 1e-7, 1e-7, 1e-2, 1e-7, 1e-7, 0.1, plan_diff=0.05)
    flipped = OnnxCheck("m.onnx", 8, 2e-4, 2e-4, 1e-4, 0.1, 0.1, 0.1, plan_diff=0.05)
    assert same.matches and fused.matches and not flipped.matches
    assert "integer kernel" not in str(same) and "integer kernel" in str(fused)
    assert "neighbouring level" in str(flipped) and "does NOT match" in str(flipped)


class _InOut(nn.Module):
    """A weight stored [in, out] and used through torch.addmm (a common way to write blocks)."""

    def __init__(self, i, o):
        super().__init__()
        self.weight = nn.Parameter(torch.randn(i, o) * 0.2)
        self.bias = nn.Parameter(torch.zeros(o))

    def forward(self, x):
        return torch.addmm(self.bias, x.reshape(-1, x.shape[-1]), self.weight).view(*x.shape[:-1], -1)


def test_weights_found_by_use_export_with_their_inputs(tmp_path):
    torch.manual_seed(5)
    net = nn.Sequential(_InOut(6, 12), nn.ReLU(), _InOut(12, 3)).eval()
    x = torch.randn(32, 5, 6)
    table = scan(net, x, bits=(4, 8), quantize="separate", input_bits=(8,), progress=False)
    plan = plan_budget(table, mean_bits=mean_bits_for(table, 6))
    assert {n: (s.weight.axis, s.input is not None) for n, s in plan.layers.items()} == {
        "0": (1, True), "2": (1, True)}  # output channels on axis 1 of an [in, out] weight
    proto = export_onnx(net, plan, tmp_path / "use.onnx", x[:2])
    axes = [a.i for n in proto.graph.node if n.op_type == "DequantizeLinear" and n.output[0].endswith(".weight")
            for a in n.attribute if a.name == "axis"]
    assert axes == [1, 1]
    check = check_onnx(tmp_path / "use.onnx", net, plan, x)
    assert check.matches, str(check)


def test_scan_view_takes_loader_pairs_with_inputs():
    from qwidgets import ScanView

    torch.manual_seed(6)
    net = nn.Sequential(nn.Linear(5, 8), nn.ReLU(), nn.Linear(8, 3)).eval()
    x, y = torch.randn(40, 5), torch.randint(0, 3, (40,))
    view = ScanView(net, DataLoader(TensorDataset(x, y), batch_size=16), inputs=0, bits=(4, 8), progress=False)
    whole = scan(net, x, bits=(4, 8), progress=False)
    for name in whole.layers:  # the same data, read in batches: float64 sums (float32 rounding apart)
        assert view.table.sqnr_db(name, 4) == pytest.approx(whole.sqnr_db(name, 4), abs=1e-3)
    assert view.pick("2", bits=4).explorer.grid.bits == 4  # the explorer reads the picked inputs


def test_budget_planner_takes_loader_pairs_with_inputs_and_index_targets():
    from qwidgets import BudgetPlanner

    torch.manual_seed(7)
    net = nn.Sequential(nn.Linear(5, 8), nn.ReLU(), nn.Linear(8, 3)).eval()
    x, y = torch.randn(48, 5), torch.randint(0, 3, (48,))

    def acc(out, t):
        return float((out.argmax(1) == t).float().mean())
    p = BudgetPlanner(net, DataLoader(TensorDataset(x, y), batch_size=16), inputs=0, metric=acc, target=1,
                      bits=(4, 8), progress=False)
    from qwidgets import pareto_front

    p.set_budget("mean_bits", pareto_front(p.table, "mean_bits")[0][0])  # the front's cheapest point
    report = p.measure()
    want = evaluate_plan(net, x, p.plan, metric=acc, target=y)
    assert report.metric_planned == pytest.approx(want.metric_planned, abs=METRIC_ABS)


def test_notes_from_passes_with_the_fast_path_off_point_at_the_callers_line():
    """Switching the fast path off adds no frame between the user's call and its warnings
    (a DeprecationWarning attributed to a qwidgets module is hidden by Python's filters)."""
    from qwidgets.planning.scanning import ScanNote

    torch.manual_seed(8)
    net = Attention().eval()
    data = (torch.randn(8, 7, 6), torch.randn(8, 4, 5))
    with pytest.warns(ScanNote) as seen:
        scan(net, data, bits=(8,), progress=False)
    assert {w.filename for w in seen if issubclass(w.category, ScanNote)} == {__file__}


def test_grid_explorer_takes_a_transformer_batch_with_inputs():
    """GridExplorer(model, (tokens, targets), layer=..., inputs=0) explores what a forward
    pre-hook on that layer sees when the model runs on the tokens alone (the naive capture)."""
    from qwidgets import GridExplorer
    from tests.attention_models import TinyDecoder, token_ids

    torch.manual_seed(3)
    net = TinyDecoder().eval()
    ids = token_ids(12, 8)
    nxt = torch.roll(ids, -1, dims=1)
    seen = []
    h = net.blocks[1].fc.register_forward_pre_hook(lambda m, a: seen.append(a[0].detach().clone()))
    with torch.no_grad():
        net(ids)
    h.remove()
    ex = GridExplorer(net, (ids, nxt), layer="blocks.1.fc", inputs=0)
    # float32 passes on other thread counts or batch splits round differently: a float32 tolerance
    close = dict(rtol=1e-5, atol=1e-6)
    torch.testing.assert_close(ex.subject.values["input"], seen[0].reshape(ex.subject.values["input"].shape),
                               **close)
    loader = DataLoader(TensorDataset(ids, nxt), batch_size=4)
    by_batches = GridExplorer(net, loader, layer="blocks.1.fc", inputs=lambda b: b[0])
    torch.testing.assert_close(by_batches.subject.values["input"], ex.subject.values["input"], **close)
    layer_only = GridExplorer(net.blocks[1].fc, (seen[0], nxt), inputs=0)  # a layer and its input pair
    assert torch.equal(layer_only.subject.values["input"], seen[0])
    with pytest.raises(TypeError, match="inputs=0"):
        GridExplorer(net, (ids, nxt), layer="blocks.1.fc")  # a pair without inputs=: the error says so
    with pytest.raises(TypeError, match="inputs"):
        GridExplorer(torch.randn(4, 4), inputs=0)
    with pytest.raises(TypeError, match="inputs must be"):
        GridExplorer(net, (ids, nxt), layer="blocks.1.fc", inputs=1.5)
