"""Attention's activations as entries: nn.MultiheadAttention (alone and in nn.TransformerEncoder)
and F.scaled_dot_product_attention, through scan -> plan -> apply -> evaluate.

References: torch's own nn.MultiheadAttention (the written-out attention must compute what it
computes), and naive loops written here: a hand-written attention (or a hand-written block
forward around ``F.scaled_dot_product_attention``) that quantizes one activation on the
table's grid, run on a deep copy, compared with the float model. Float32 results computed
along different paths (torch's packed projection and its ``bmm`` / ``baddbmm`` versus the
hand-written ones) differ in the last bits, so SQNR figures are compared within 0.01 dB: a
relative error of 1e-6 in the signal or noise power moves an SQNR by 4e-6 dB, and the noise
here is 20 dB or more above the float32 rounding of these outputs.
"""

from __future__ import annotations

import copy
import json
import math
import types

import pytest
import torch
import torch.nn.functional as F
from torch import nn

from qwidgets import Plan, apply_plan, evaluate_plan, metric_curve, plan_budget, scan
from qwidgets.core.rounding import quantize
from qwidgets.model.attention import attention_forward
from qwidgets.model.taps import Tap, tapping
from tests.attention_models import (
    EncoderClassifier,
    MHAClassifier,
    TinyDecoder,
    sequences,
    token_ids,
)
from tests.stored_bits import mean_bits_for


def sqnr(ref: torch.Tensor, out: torch.Tensor) -> float:
    ref, out = ref.double(), out.double()
    return 10 * math.log10(float(ref.pow(2).sum()) / float((out - ref).pow(2).sum()))


def hand_attention(mha: nn.MultiheadAttention, x: torch.Tensor, role=None, grid=None):
    """Self-attention of batch-first ``x`` written by hand; ``role`` quantized on ``grid``."""
    def q_(name, t):
        return quantize(t, grid) if name == role else t

    n, t, e = x.shape
    h = mha.num_heads
    wq, wk, wv = mha.in_proj_weight.detach().chunk(3)
    bq, bk, bv = mha.in_proj_bias.detach().chunk(3)
    xt = x.transpose(0, 1)  # (L, N, E): the layout the attention's activations are tapped in
    q, k, v = q_("query", xt @ wq.T + bq), q_("key", xt @ wk.T + bk), q_("value", xt @ wv.T + bv)
    heads = [z.reshape(t, n * h, e // h).transpose(0, 1) for z in (q, k, v)]
    scores = heads[0] / math.sqrt(e // h) @ heads[1].transpose(1, 2)
    probs = q_("probs", torch.softmax(scores, dim=-1))
    ctx = q_("out_proj", (probs @ heads[2]).transpose(0, 1).reshape(t * n, e))
    out = ctx @ mha.out_proj.weight.detach().T + mha.out_proj.bias.detach()
    return out.view(t, n, e).transpose(0, 1)


@pytest.fixture
def fastpath_on():
    before = torch.backends.mha.get_fastpath_enabled()
    torch.backends.mha.set_fastpath_enabled(True)
    yield
    torch.backends.mha.set_fastpath_enabled(before)


@pytest.mark.parametrize("batch_first", [True, False])
@pytest.mark.parametrize("kdim", [None, 6])
def test_written_out_attention_matches_torch(batch_first, kdim):
    # reference: torch's nn.MultiheadAttention on the same arguments (masks of both kinds)
    mha = nn.MultiheadAttention(8, 2, batch_first=batch_first, kdim=kdim, vdim=kdim).eval()
    q, kv = torch.randn(3, 4, 8), torch.randn(3, 5, kdim or 8)
    if not batch_first:
        q, kv = q.transpose(0, 1), kv.transpose(0, 1)
    causal = torch.triu(torch.ones(4, 5, dtype=torch.bool), 1)
    pad = torch.zeros(3, 5, dtype=torch.bool)
    pad[1, 3:] = True

    class Written(Tap):
        def attention(self, path):
            return True

    for kw in ({}, {"attn_mask": causal}, {"key_padding_mask": pad, "need_weights": False},
               {"attn_mask": causal.float() * -1e4, "average_attn_weights": False}):
        with torch.no_grad():
            ref = mha(q, kv, kv, **kw)
            with tapping(mha, Written()):
                out = mha(q, kv, kv, **kw)
        torch.testing.assert_close(out[0], ref[0], rtol=1e-5, atol=1e-6)
        if ref[1] is not None:
            torch.testing.assert_close(out[1], ref[1], rtol=1e-5, atol=1e-6)


def test_attention_forward_refuses_bias_kv():
    mha = nn.MultiheadAttention(8, 2, add_bias_kv=True)
    x = torch.randn(4, 2, 8)
    args = (x, x, x, 8, 2, mha.in_proj_weight, mha.in_proj_bias, mha.bias_k, mha.bias_v, False, 0.0,
            mha.out_proj.weight, mha.out_proj.bias)
    with pytest.raises(ValueError, match="bias_k"):
        attention_forward(args, {}, lambda r, t: t)


@pytest.mark.parametrize("estimate", ["exact", "gain"])
def test_mha_activations_scanned_like_a_hand_written_attention(untouched, fastpath_on, estimate):
    torch.manual_seed(0)
    model, x = MHAClassifier().eval(), sequences()
    keep = untouched(model)
    t = scan(model, x, bits=(4, 6), quantize="input", progress=False, estimate=estimate)
    taps = ("attn.query", "attn.key", "attn.value", "attn.probs", "attn.out_proj")
    if estimate == "gain":  # tapped entries are measured exactly, and the table says so
        assert {t.model_pass(n) for n in taps} == {"per bit width"}
        assert t.model_pass("inp") == "probes"
        assert any("not estimated" in n and "attn.probs" in n for n in t.notes)
    assert torch.backends.mha.get_fastpath_enabled()  # the user's setting, restored
    keep.check()
    for name in ("attn.query", "attn.key", "attn.value", "attn.probs", "attn.out_proj"):
        assert t.has_input_rows(name)
    assert t.kind("attn.probs") == "activation" and t.params("attn.probs") == 0
    # MACs per sample of query x key: L * S * E (5 tokens, 16 features)
    assert t.macs("attn.query") == 5 * 5 * 16 and t.partner("attn.query") == "attn.key"
    with torch.no_grad():
        ref = model(x)
        h = model.inp(x)
        for name, role in (("attn.query", "query"), ("attn.probs", "probs"),
                           ("attn.out_proj", "out_proj")):
            for b in (4, 6):
                grid = t.input_grid(name, b)
                a = hand_attention(model.attn, h, role, grid)
                naive = model.head((h + a).mean(dim=1))
                assert abs(sqnr(ref, naive) - t.sqnr_db(name, b, "model")) < 0.01, (name, b)


def test_encoder_value_and_context_against_a_replaced_attention(fastpath_on):
    torch.manual_seed(1)
    model, x = EncoderClassifier().eval(), sequences()
    t = scan(model, x, bits=(4,), input_bits=(4, 8), quantize="separate", progress=False)
    att = "encoder.layers.1.self_attn"
    assert {f"{att}.{r}" for r in ("query", "key", "value", "probs")} <= set(t.layers)
    for name, role in ((f"{att}.value", "value"), (f"{att}.out_proj", "out_proj")):
        grid = t.input_grid(name, 4)
        naive_model = copy.deepcopy(model)
        original = naive_model.encoder.layers[1].self_attn

        naive_model.encoder.layers[1].self_attn = HandWritten(original, role, grid)
        before = torch.backends.mha.get_fastpath_enabled()
        torch.backends.mha.set_fastpath_enabled(False)  # the layer then calls self_attn
        try:
            with torch.no_grad():
                ref, naive = model(x), naive_model(x)
        finally:
            torch.backends.mha.set_fastpath_enabled(before)
        assert abs(sqnr(ref, naive) - t.sqnr_db(name, 4, "model", source="input")) < 0.01, name
    cov = t.coverage
    assert any("norm1: LayerNorm input" in s for s in cov.float_activations)
    assert any("softmax input" in s for s in cov.float_activations)
    assert any("residual addition" in s for s in cov.float_activations)


class HandWritten(nn.Module):
    """What TransformerEncoderLayer calls as self_attn: the hand-written attention."""

    batch_first = True

    def __init__(self, mha, role, grid):
        super().__init__()
        self.mha, self.role, self.grid = mha, role, grid

    def forward(self, q, k, v, **kwargs):
        return hand_attention(self.mha, q, self.role, self.grid), None


def _block_forward(role, grid):
    """SdpaBlock.forward written out, quantizing one operand of its attention call."""
    def forward(self, x):
        b, t, d = x.shape
        q, k, v = self.qkv(self.ln1(x)).split(d, dim=2)
        q, k, v = (z.view(b, t, self.heads, d // self.heads).transpose(1, 2) for z in (q, k, v))
        q, k, v = (quantize(z, grid) if r == role else z for z, r in zip((q, k, v), ("query", "key", "value"), strict=False))
        y = F.scaled_dot_product_attention(q, k, v, is_causal=True)
        x = x + self.proj(y.transpose(1, 2).reshape(b, t, d))
        return x + self.out(F.gelu(self.fc(self.ln2(x))))
    return forward


@pytest.mark.parametrize("estimate", ["exact", "gain"])
def test_decoder_sdpa_operands_against_a_hand_written_block(estimate):
    torch.manual_seed(2)
    model, ids = TinyDecoder().eval(), token_ids()
    t = scan(model, ids, bits=(4, 8), quantize="both", progress=False, estimate=estimate)
    assert [n for n in t.layers if ".sdpa." in n] == [
        f"blocks.{i}.sdpa.{r}" for i in (0, 1) for r in ("query", "key", "value")]
    assert t.partner("blocks.0.sdpa.value") is None  # probabilities stay float
    with torch.no_grad():
        ref = model(ids)
        for role in ("query", "key", "value"):
            name = f"blocks.1.sdpa.{role}"
            naive = copy.deepcopy(model)
            naive.blocks[1].forward = types.MethodType(_block_forward(role, t.input_grid(name, 4)),
                                                       naive.blocks[1])
            assert abs(sqnr(ref, naive(ids)) - t.sqnr_db(name, 4, "model")) < 0.01, role


def test_second_sdpa_call_gets_its_own_level():
    class TwoCalls(nn.Module):
        def forward(self, q):
            a = F.scaled_dot_product_attention(q, q, q)
            return F.scaled_dot_product_attention(a, q, q * 2)

    from qwidgets.model.usage import entries_named, find_usage

    u = find_usage(TwoCalls(), torch.randn(2, 3, 4))
    names = [e.name for e in u.entries]
    assert names == ["sdpa.query", "sdpa.key", "sdpa.value", "sdpa_2.query", "sdpa_2.key", "sdpa_2.value"]
    assert set(entries_named(TwoCalls(), names)) == set(names)
    assert entries_named(TwoCalls(), ["sdpa_1.query", "x.sdpa.query"]) == {}


def test_planned_activations_applied_and_evaluated(untouched, fastpath_on):
    torch.manual_seed(3)
    model, x = MHAClassifier().eval(), sequences()
    keep = untouched(model)
    t = scan(model, x, bits=(4, 8), input_bits=(4, 8), quantize="separate", progress=False)
    plan = plan_budget(t, mean_bits=mean_bits_for(t, 8), fixed={"attn.probs": 4, "attn.query": 8})
    assert plan.chosen_input_bits["attn.probs"] == 4 and plan.layers["attn.probs"].weight is None
    planned = apply_plan(model, plan)
    keep.check()
    # naive: every planned grid applied by hand (weights quantized in a deep copy, inputs and
    # activations quantized in a hand-written forward)
    naive = copy.deepcopy(model)
    with torch.no_grad():
        for name in ("inp", "head"):
            m = naive.get_submodule(name)
            m.weight.copy_(quantize(m.weight, plan.layers[name].weight))
        naive.attn.in_proj_weight.copy_(quantize(naive.attn.in_proj_weight, plan.layers["attn.in_proj"].weight))
        naive.attn.out_proj.weight.copy_(quantize(naive.attn.out_proj.weight,
                                                  plan.layers["attn.out_proj"].weight))
        grids = {r: plan.layers[f"attn.{r}"].input for r in ("query", "key", "value", "probs", "out_proj")}
        h = naive.inp(quantize(x, plan.layers["inp"].input))
        hq = quantize(h, plan.layers["attn.in_proj"].input)
        a = hand_attention_all(naive.attn, hq, grids)
        want = naive.head(quantize((h + a).mean(dim=1), plan.layers["head"].input))
        got = planned(x)
    torch.testing.assert_close(got, want, rtol=1e-5, atol=1e-6)
    assert torch.backends.mha.get_fastpath_enabled()
    report = evaluate_plan(model, x, plan)
    assert abs(report.measured_sqnr_db - sqnr(model(x).detach(), want)) < 0.01
    assert report.bops == plan.bops
    keep.check()
    again = Plan.from_json(plan.to_json())  # activations survive the plan file
    assert again.bops == plan.bops and again.entries["attn.probs"]["partner"] == "attn.value"
    torch.testing.assert_close(apply_plan(model, again)(x), got, rtol=0, atol=0)
    bad = json.loads(plan.to_json())
    bad["layers"]["attn.probs"]["weight_shape"] = [2, 2]
    with pytest.raises(ValueError, match="weight_shape must be \\[\\] for an activation"):
        Plan.from_json(json.dumps(bad))


def hand_attention_all(mha, x, grids):
    """hand_attention with every role quantized on its grid."""
    def tap(role, t):
        return quantize(t, grids["out_proj" if role == "context" else role])
    n, t, e = x.shape
    xt = x.transpose(0, 1)
    args = (xt, xt, xt, e, mha.num_heads, mha.in_proj_weight, mha.in_proj_bias, None, None, False, 0.0,
            mha.out_proj.weight, mha.out_proj.bias)
    out, _ = attention_forward(args, {"need_weights": False}, tap)
    return out.transpose(0, 1)


def test_bops_of_attention_products_counted_exactly():
    torch.manual_seed(4)
    model, x = MHAClassifier().eval(), sequences()
    t = scan(model, x, bits=(4, 8), quantize="both", progress=False)
    import itertools

    sq = t.sqnr_array("model")
    combos = []
    for pick in itertools.product(range(2), repeat=len(t.layers)):
        bits = {n: t.bits[k] for n, k in zip(t.layers, pick, strict=True)}
        # BOPs by hand: MACs x weight bits x input bits per layer; attention's two products
        # MACs x both operands' widths (common practice for BOPs)
        by_hand = sum(t.macs(n) * bits[n] * bits[n] for n in t.layers if t.kind(n) != "activation")
        by_hand += t.macs("attn.query") * bits["attn.query"] * bits["attn.key"]
        by_hand += t.macs("attn.probs") * bits["attn.probs"] * bits["attn.value"]
        assert t.make_plan(bits).bops == by_hand
        noise = sum(10 ** (-sq[i, k] / 10) for i, k in enumerate(pick))
        combos.append((by_hand, noise))
    for budget in sorted({c for c, _ in combos})[::37]:
        best = min(n for c, n in combos if c <= budget)
        p = plan_budget(t, bops=budget)
        assert p.bops <= budget
        assert abs(p.predicted_sqnr_db + 10 * math.log10(best)) < 1e-6


def test_metric_curve_with_activations():
    torch.manual_seed(5)
    model, x = MHAClassifier().eval(), sequences(n=16)
    y = model(x).argmax(dim=1).detach()
    t = scan(model, x, bits=(4, 8), quantize="both", progress=False)

    def accuracy(out, target):
        return float((out.argmax(dim=1) == target).float().mean())

    curve = metric_curve(model, x, t, metric=accuracy, target=y, cost="bops", points=3, n_boot=50)
    assert len(curve) == 3
    assert all(0.0 <= p.metric_planned <= 1.0 for p in curve)


@pytest.mark.parametrize("quantize_mode", ["both", "separate"])
def test_table_with_activations_saved_and_loaded(tmp_path, quantize_mode):
    from qwidgets import SensitivityTable

    torch.manual_seed(6)
    model, x = MHAClassifier().eval(), sequences()
    t = scan(model, x, bits=(4, 8), quantize=quantize_mode, progress=False)
    t.save(tmp_path / "t.json")
    u = SensitivityTable.load(tmp_path / "t.json")
    assert u.layers == t.layers and u.partner("attn.value") == "attn.probs"
    assert u.kind("attn.key") == "activation" and u.params("attn.key") == 0
    a, b = plan_budget(t, bops=3e5), plan_budget(u, bops=3e5)
    assert a.bits == b.bits and a.bops == b.bops


def test_weight_scan_leaves_activations_out():
    torch.manual_seed(7)
    model, x = MHAClassifier().eval(), sequences()
    t = scan(model, x, bits=(4,), quantize="weight", progress=False)
    assert t.layers == ["inp", "attn.in_proj", "attn.out_proj", "head"]
    p = plan_budget(t, mean_bits=mean_bits_for(t, 4))
    assert set(p.layers) == set(t.layers)


def test_refine_plan_learns_activation_grids():
    # refine_plan reaches the activations through the same taps (gradients through the
    # written-out attention): their grids move, and the whole plan's measured SQNR rises
    from qwidgets import refine_plan

    torch.manual_seed(8)
    model, x = MHAClassifier().eval(), sequences(n=16)
    t = scan(model, x, bits=(3, 8), input_bits=(4, 8), quantize="separate", progress=False)
    plan = plan_budget(t, mean_bits=mean_bits_for(t, 4), fixed={"attn.probs": 4, "attn.value": 4})
    refined = refine_plan(model, x, plan, steps=30, progress=False).plan
    for name in ("attn.probs", "attn.value"):
        assert refined.layers[name].input.bits == 4
        assert refined.layers[name].input.scale != plan.layers[name].input.scale
    assert evaluate_plan(model, x, refined).measured_sqnr_db > evaluate_plan(model, x, plan).measured_sqnr_db


def test_split_scan_of_activations_equals_the_serial_scan():
    # an executor's workers each scan a deep copy: the taps follow the copies
    from concurrent.futures import ThreadPoolExecutor

    torch.manual_seed(9)
    model, ids = TinyDecoder().eval(), token_ids()
    serial = scan(model, ids, bits=(4, 8), quantize="both", progress=False)
    with ThreadPoolExecutor(2) as pool:
        split = scan(model, ids, bits=(4, 8), quantize="both", progress=False, executor=pool)
    assert split.layers == serial.layers
    assert (split.sqnr_array("model") == serial.sqnr_array("model")).all()
