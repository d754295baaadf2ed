"""Coverage, whole-model budgets, weight digests (right checkpoint) and strictness."""

from __future__ import annotations

import copy
import json

import pytest
import torch
from torch import nn

from qwidgets import (
    Plan,
    SensitivityTable,
    apply_plan,
    evaluate_plan,
    export_codes,
    plan_budget,
    scan,
)
from qwidgets.planning.costs import weight_storage_bits
from tests.stored_bits import mean_bits_for


class TextLSTM(nn.Module):
    def __init__(self):
        super().__init__()
        self.emb = nn.Embedding(50, 8)
        self.rnn = nn.LSTM(8, 8, batch_first=True)
        self.norm = nn.LayerNorm(8)
        self.out = nn.Linear(8, 3)

    def forward(self, tokens):
        h, _ = self.rnn(self.emb(tokens))
        return self.out(self.norm(h).mean(1))


@pytest.fixture(scope="module")
def scanned():
    torch.manual_seed(0)
    net = TextLSTM()
    tokens = torch.randint(0, 50, (6, 5))
    return net, tokens, scan(net, tokens, bits=(4, 8), progress=False)


def test_coverage_counts_every_floating_point_parameter(scanned):
    net, _, t = scanned
    # counted by hand from the module definitions (nn.LSTM: 4 gates)
    scanned_values = 50 * 8 + 32 * 8 + 32 * 8 + 3 * 8
    total = scanned_values + 32 + 32 + 8 + 8 + 3
    assert (t.coverage.scanned, t.coverage.total) == (scanned_values, total)
    assert t.coverage.total == sum(p.numel() for p in net.parameters())
    skipped = dict(t.coverage.skipped)
    assert set(skipped) == {"rnn.bias_ih_l0", "rnn.bias_hh_l0", "norm.weight", "norm.bias", "out.bias"}
    assert "LayerNorm" in skipped["norm.weight"] and "bias" in skipped["out.bias"]
    assert "936 of 1,019 weight values scanned" in repr(t)
    assert "weight only" in t._repr_html_()


def test_table_and_plan_files_keep_entries(scanned, tmp_path):
    net, _, t = scanned
    t.save(tmp_path / "t.json")
    u = SensitivityTable.load(tmp_path / "t.json")
    assert u.coverage == t.coverage and u.has_input("out") and not u.has_input("rnn.weight_hh_l0")
    assert u.weight_channels("emb") == 50
    plan = plan_budget(u, mean_bits=mean_bits_for(u, 6))
    text = plan.to_json()
    layers = json.loads(text)["layers"]
    assert layers["emb"]["has_input"] is False and layers["out"]["has_input"] is True
    back = Plan.from_json(text)
    assert back.model_kib == pytest.approx(plan.model_kib) and back.weight_digest("emb") == plan.weight_digest("emb")


def test_whole_model_budget_counts_unplanned_weights(scanned):
    _, _, t = scanned
    other_bits = 32 * (32 + 32 + 8 + 8 + 3)  # biases and LayerNorm in float32
    assert t.unplanned_bits() == other_bits
    plan = plan_budget(t, model_kib=2.0)
    by_hand = sum(weight_storage_bits(t.params(n), plan.bits[n], t.weight_channels(n)) for n in plan.layers)
    assert plan.planned_kib == pytest.approx(by_hand / 8192)
    assert plan.model_kib == pytest.approx((by_hand + other_bits) / 8192)
    assert plan.model_kib <= 2.0
    planned_only = plan_budget(t, planned_kib=2.0)
    assert planned_only.planned_kib <= 2.0 < planned_only.model_kib
    with pytest.raises(ValueError, match="other weights take 0.3242 KiB"):
        plan_budget(t, model_kib=0.3)
    with pytest.raises(ValueError, match="kib_scope must be 'model' or 'planned'"):
        plan_budget(t, weight_kib=2.0, kib_scope="all")


def test_other_checkpoint_is_refused_unless_allowed(scanned):
    net, tokens, t = scanned
    plan = plan_budget(t, mean_bits=mean_bits_for(t, 6))
    other = copy.deepcopy(net)
    with torch.no_grad():
        other.rnn.weight_hh_l0.mul_(1.01)
    for call in (lambda **k: apply_plan(other, plan, **k), lambda **k: export_codes(other, plan, **k),
                 lambda **k: evaluate_plan(other, tokens, plan, **k)):
        with pytest.raises(ValueError, match=r"differ from those the plan was made for: 'rnn.weight_hh_l0' \(other values\)"):
            call()
        call(allow_other_weights=True)
    apply_plan(net, plan)  # the right checkpoint


def test_strict_raises_on_a_missing_entry(scanned):
    net, _, t = scanned
    plan = plan_budget(t, mean_bits=mean_bits_for(t, 6))
    d = json.loads(plan.to_json())
    d["layers"]["renamed"] = d["layers"].pop("out")
    edited = Plan.from_json(json.dumps(d))
    with pytest.raises(ValueError, match="'renamed' \\(not in the model\\)"):
        apply_plan(net, edited, strict=True)
    with pytest.warns(UserWarning, match="skipped 1 planned layer"):
        q = apply_plan(net, edited, strict=False)
    assert "renamed" not in q.qwidgets_applied


def test_parametrized_weights_are_listed_as_skipped_not_scanned():
    from torch.nn.utils import parametrizations

    torch.manual_seed(1)
    net = nn.Sequential(nn.Linear(4, 8), nn.ReLU(), parametrizations.weight_norm(nn.Linear(8, 3)))
    t = scan(net, torch.randn(16, 4), bits=(4,), progress=False)
    assert t.layers == ["0"]
    skipped = dict(t.coverage.skipped)
    assert "parametrized weight" in skipped["2.parametrizations.weight.original1"]
    assert t.coverage.total == sum(p.numel() for p in net.parameters())
