"""Entries of every model family, checked against a naive loop written here.

The naive loop (the outside reference): deep copy the model, overwrite the weight with its
quantized value (``torch.ao``-free, plain ``copy_``), run the full forward, and compute the SQNR
of every floating-point output value in float64 by hand. Models are written in this file with
random weights (no pretrained weights).
"""

from __future__ import annotations

import copy
import math
from dataclasses import dataclass

import pytest
import torch
from torch import nn

from qwidgets import (
    apply_plan,
    evaluate_plan,
    export_codes,
    from_codes,
    plan_budget,
    quantize,
    scan,
)
from qwidgets.model.entries import find_entries
from tests.stored_bits import mean_bits_for
from tests.test_probe import assert_untouched, snapshot

BITS = (3, 6)


def _flat(out) -> torch.Tensor:
    if isinstance(out, torch.Tensor):
        return out.detach().reshape(-1).double() if out.is_floating_point() else torch.zeros(0, dtype=torch.float64)
    if isinstance(out, dict):
        return torch.cat([_flat(v) for v in out.values()])
    if isinstance(out, (tuple, list)):
        return torch.cat([_flat(v) for v in out])
    return torch.cat([_flat(getattr(out, k)) for k in out.__dataclass_fields__])


def _call(model, data):
    if isinstance(data, dict):
        return model(**data)
    if isinstance(data, tuple):
        return model(*data)
    return model(data)


def naive_sqnr(model, data, replacements: dict) -> float:
    """Deep copy, overwrite each named parameter with its quantized value, full forward, SQNR."""
    ref_model, q_model = copy.deepcopy(model).eval(), copy.deepcopy(model).eval()
    with torch.no_grad():
        for pname, grid in replacements.items():
            p = q_model.get_parameter(pname)
            p.copy_(quantize(p, grid))
        ref, out = _flat(_call(ref_model, data)), _flat(_call(q_model, data))
    noise = float(((out - ref) ** 2).sum())
    return math.inf if noise == 0 else 10 * math.log10(float((ref * ref).sum()) / noise)


def check_against_naive(model, data, expect_names, *, tol=1e-3):
    before = snapshot(model)
    t = scan(model, data, bits=BITS, progress=False)
    assert_untouched(model, before)
    assert t.layers == expect_names
    entries = {e.name: e for e in find_entries(model)}
    for name in t.layers:
        for b in BITS:
            grid = t.weight_grid(name, b)
            want = naive_sqnr(model, data, {entries[name].param: grid})
            assert t.sqnr_db(name, b) == pytest.approx(want, abs=tol), (name, b)
            if not t.has_input(name):  # weight-only: the layer scope is the weight's own SQNR
                w = entries[name].parameter(model).detach()
                err, w = quantize(w, grid).double() - w.double(), w.double()
                own = 10 * math.log10(float((w * w).sum()) / float((err * err).sum()))
                assert t.sqnr_db(name, b, "layer") == pytest.approx(own, abs=1e-6)
    # a whole plan, applied and evaluated, against the naive loop with every weight overwritten
    plan = plan_budget(t, mean_bits=mean_bits_for(t, 4.5))
    rep = evaluate_plan(model, data, plan)
    replacements = {entries[n].param: plan.layers[n].weight for n in plan.layers}
    assert rep.measured_sqnr_db == pytest.approx(naive_sqnr(model, data, replacements), abs=tol)
    q = apply_plan(model, plan)
    codes = export_codes(model, plan)
    for n, e in entries.items():
        if n in plan.layers:  # the exported codes decode to exactly the applied weights
            c = codes[n]
            g = plan.layers[n].weight
            assert torch.equal(from_codes(c["codes"], g), e.parameter(q).detach())
    assert_untouched(model, before)
    return t, plan


# ---------------------------------------------------------------------------- families
class Encoder(nn.Module):
    def __init__(self):
        super().__init__()
        self.layer = nn.TransformerEncoderLayer(16, 2, 32, batch_first=True, dropout=0.1)
        self.head = nn.Linear(16, 3)

    def forward(self, x):
        return self.head(self.layer(x).mean(dim=1))


def test_transformer_encoder_layer_entries_match_the_naive_loop():
    torch.manual_seed(0)
    net = Encoder()
    x = torch.randn(6, 5, 16)
    t, _ = check_against_naive(net, x, ["layer.self_attn.in_proj", "layer.self_attn.out_proj",
                                        "layer.linear1", "layer.linear2", "head"])
    # out_proj's input is the attention's context, reached by taps on the written-out attention
    assert t.kind("layer.self_attn.in_proj") == "attention" and t.has_input("layer.self_attn.out_proj")
    assert t.has_input("head")


class BareAttention(nn.Module):
    def __init__(self):
        super().__init__()
        self.att = nn.MultiheadAttention(8, 2, kdim=6, vdim=6)  # separate q / k / v projections

    def forward(self, q, kv):
        return self.att(q, kv, kv, need_weights=False)[0]


def test_bare_attention_with_separate_projections():
    torch.manual_seed(1)
    net = BareAttention()
    data = (torch.randn(4, 3, 8), torch.randn(5, 3, 6))
    check_against_naive(net, data, ["att.q_proj", "att.k_proj", "att.v_proj", "att.out_proj"])


class TextRNN(nn.Module):
    def __init__(self, cell):
        super().__init__()
        self.emb = nn.Embedding(40, 8)
        self.rnn = cell(8, 6, num_layers=2, batch_first=True, bidirectional=True)
        self.out = nn.Linear(12, 4)

    def forward(self, tokens):
        h, _ = self.rnn(self.emb(tokens))
        return self.out(h.mean(dim=1))  # the last step alone would ignore the reverse hh weights


@pytest.mark.parametrize("cell", [nn.LSTM, nn.GRU, nn.RNN])
def test_bidirectional_recurrent_text_classifier(cell):
    torch.manual_seed(2)
    net = TextRNN(cell)
    tokens = torch.randint(0, 40, (5, 9))
    rnn = [f"rnn.weight_{k}_l{n}{r}" for n in (0, 1) for r in ("", "_reverse") for k in ("ih", "hh")]
    t, _ = check_against_naive(net, tokens, ["emb"] + rnn + ["out"])
    assert t.weight_grid("emb", 3).axis == 0 and t.weight_channels("emb") == 40  # one grid per row
    assert not t.has_input("rnn.weight_hh_l0_reverse")


class TiedLM(nn.Module):
    def __init__(self):
        super().__init__()
        self.emb = nn.Embedding(30, 12)
        self.mix = nn.Linear(12, 12)
        self.head = nn.Linear(12, 30, bias=False)
        self.head.weight = self.emb.weight

    def forward(self, tokens):
        return self.head(torch.tanh(self.mix(self.emb(tokens))))


def test_tied_embedding_and_output_quantized_everywhere():
    torch.manual_seed(3)
    net = TiedLM()
    tokens = torch.randint(0, 30, (6, 7))
    t, plan = check_against_naive(net, tokens, ["emb", "mix"])
    assert t.shared_with("emb") == ["head"]
    # storage counted once: the tied tensor's 360 values appear once in the total
    assert t.coverage.total == 360 + 144 + 12
    q = apply_plan(net, plan)
    assert q.head.weight is q.emb.weight
    assert torch.equal(q.head.weight, quantize(net.emb.weight.detach(), plan.layers["emb"].weight))
    assert list(export_codes(net, plan)) == ["emb", "mix"]


class Decoder(nn.Module):
    def __init__(self):
        super().__init__()
        self.d1 = nn.ConvTranspose1d(3, 4, 3, stride=2)
        self.d2 = nn.ConvTranspose2d(4, 6, 3, stride=2, groups=2, output_padding=1)
        self.d3 = nn.ConvTranspose3d(2, 3, 2)

    def forward(self, x):
        a = torch.relu(self.d1(x))  # (N, 4, L)
        b = torch.relu(self.d2(a.unsqueeze(-1).expand(-1, -1, -1, 3)))  # (N, 6, H, W)
        return self.d3(b.reshape(b.shape[0], 2, 3, b.shape[2], b.shape[3]))


def test_transposed_convolution_decoder_per_output_channel_on_axis_1():
    torch.manual_seed(4)
    net = Decoder()
    x = torch.randn(2, 3, 5)
    t, _ = check_against_naive(net, x, ["d1", "d2", "d3"])
    for name, channels in (("d1", 4), ("d2", 3), ("d3", 3)):
        g = t.weight_grid(name, 6)
        assert g.axis == 1 and g.scale.numel() == channels
    # layer scope against torch's own module on the captured input
    from qwidgets import capture_inputs, layer_error

    seen = capture_inputs(net, x)
    e = layer_error(net.d1, seen["d1"], weight_grid=t.weight_grid("d1", 3))
    assert e.sqnr_db == pytest.approx(t.sqnr_db("d1", 3, "layer"), abs=1e-6)


def test_grouped_and_3d_convolutions():
    torch.manual_seed(5)
    net = nn.Sequential(nn.Conv3d(2, 4, 3, padding=1), nn.ReLU(), nn.Conv3d(4, 4, 3, groups=2),
                        nn.Flatten(2), nn.Conv1d(4, 6, 1, groups=2))
    check_against_naive(net, torch.randn(2, 2, 5, 5, 5), ["0", "2", "4"])


@dataclass
class Out:
    logits: torch.Tensor
    extra: dict


class Structured(nn.Module):
    def __init__(self):
        super().__init__()
        self.a = nn.Linear(4, 5)
        self.b = nn.Linear(3, 5)

    def forward(self, x, *, side):
        h = self.a(x) + self.b(side[0])
        return Out(h, {"pair": (torch.tanh(h), side[1].long())})


def test_dict_tuple_dataclass_inputs_and_outputs():
    torch.manual_seed(6)
    net = Structured()
    data = {"x": torch.randn(7, 4), "side": (torch.randn(7, 3), torch.zeros(7))}
    check_against_naive(net, data, ["a", "b"])


def test_find_entries_registration_order_and_names():
    net = TextRNN(nn.LSTM)
    names = [e.name for e in find_entries(net)]
    assert names[0] == "emb" and names[-1] == "out" and "rnn.weight_hh_l1_reverse" in names
    assert all(e.axis == 0 for e in find_entries(net))


def test_attention_inputs_quantized_as_the_naive_loop_does():
    # naive loop: deep copy, overwrite the packed projection, quantize query / key / value by hand
    torch.manual_seed(7)

    class SelfAttention(nn.Module):
        def __init__(self):
            super().__init__()
            self.att = nn.MultiheadAttention(8, 2)
            self.head = nn.Linear(8, 3)

        def forward(self, x):
            return self.head(self.att(x, x, x, need_weights=False)[0])

    net = SelfAttention()
    x = torch.randn(5, 4, 8)
    before = snapshot(net)
    t = scan(net, x, bits=BITS, quantize="both", progress=False)
    assert_untouched(net, before)
    # out_proj's input is the attention's context (reached by taps on the written-out attention)
    assert t.has_input("att.in_proj") and t.has_input("att.out_proj")
    for b in BITS:
        wg, ig = t.weight_grid("att.in_proj", b), t.input_grid("att.in_proj", b)
        ref_model, q_model = copy.deepcopy(net).eval(), copy.deepcopy(net).eval()
        with torch.no_grad():
            q_model.att.in_proj_weight.copy_(quantize(q_model.att.in_proj_weight, wg))
            xq = quantize(x, ig)
            ref = ref_model(x).double()
            out = q_model.head(q_model.att(xq, xq, xq, need_weights=False)[0]).double()
        want = 10 * math.log10(float((ref * ref).sum()) / float(((out - ref) ** 2).sum()))
        assert t.sqnr_db("att.in_proj", b) == pytest.approx(want, abs=1e-3)
    plan = t.make_plan({"att.in_proj": 3, "head": 6})  # the attention's own activations float
    q = apply_plan(net, plan)
    with torch.no_grad():
        g = plan.layers["att.in_proj"].input
        xq = quantize(x, g)
        naive = copy.deepcopy(q)
        naive.att._forward_pre_hooks.clear()
        assert torch.equal(q(x), naive.head(naive.att(xq, xq, xq, need_weights=False)[0]))
