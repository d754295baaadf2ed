"""A plan records a digest of every persistent floating-point entry of the model's state_dict,
and applying, evaluating or exporting it refuses a model whose entries differ, naming them.

Outside checks: the entries named against the entries that differ by ``torch.equal`` in a
naive loop over the two state_dicts written here; the number of tensors hashed against the
number of distinct floating-point tensors counted here.
"""

from __future__ import annotations

import copy
import json
import re

import pytest
import torch
from torch import nn

from qwidgets import (
    Plan,
    SensitivityTable,
    apply_plan,
    evaluate_plan,
    export_codes,
    export_onnx,
    plan_budget,
    scan,
)


class _Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv, self.bn = nn.Conv2d(3, 6, 3), nn.BatchNorm2d(6)
        self.fc = nn.Linear(6 * 16, 4)
        self.register_buffer("scratch", torch.zeros(3), persistent=False)  # not in state_dict

    def forward(self, x):
        return self.fc(torch.relu(self.bn(self.conv(x))).flatten(1))


def _scanned():
    torch.manual_seed(0)
    net = _Net()
    with torch.no_grad():
        net.bn.running_mean.uniform_(-0.5, 0.5)
        net.bn.running_var.uniform_(0.5, 2.0)
    net.eval()
    x = torch.randn(32, 3, 6, 6)
    table = scan(net, x, bits=(4, 8), quantize="both", progress=False)
    return net, x, table


def _differing(a: nn.Module, b: nn.Module) -> set:
    """Naive: the floating-point state_dict entries whose values differ."""
    sa, sb = a.state_dict(), b.state_dict()
    return {k for k, v in sa.items() if v.is_floating_point() and not torch.equal(v, sb[k])}


def test_a_changed_checkpoint_is_refused_naming_what_differs(tmp_path):
    net, x, table = _scanned()
    plan = plan_budget(table, mean_bits=40)
    other = copy.deepcopy(net)
    with torch.no_grad():  # BatchNorm statistics and a bias: none of them a planned weight
        other.bn.running_var /= 25
        other.fc.bias[1] += 3
    assert _differing(net, other) == {"bn.running_var", "fc.bias"}
    calls = {"apply_plan": lambda **k: apply_plan(other, plan, **k),
             "evaluate_plan": lambda **k: evaluate_plan(other, x, plan, **k),
             "export_codes": lambda **k: export_codes(other, plan, **k),
             "export_onnx": lambda **k: export_onnx(other, plan, tmp_path / "m.onnx", x[:1], **k)}
    for name, call in calls.items():
        with pytest.raises(ValueError, match="differ from those the plan was made for") as err:
            call()
        named = set(re.findall(r"'([\w.]+)' \(other values\)", str(err.value)))
        assert named == _differing(net, other), name
        call(allow_other_weights=True)
    apply_plan(net, plan)  # the checkpoint it was made for
    # an integer counter (num_batches_tracked) and a non-persistent buffer are not compared
    counted = copy.deepcopy(net)
    counted.bn.num_batches_tracked += 7
    counted.scratch += 1
    apply_plan(counted, plan)


def test_state_digests_survive_both_json_files(tmp_path):
    net, _, table = _scanned()
    table.save(tmp_path / "t.json")
    loaded = SensitivityTable.load(tmp_path / "t.json")
    assert loaded.state_digests == table.state_digests
    plan = plan_budget(loaded, mean_bits=40)
    assert Plan.from_json(plan.to_json()).state_digests == plan.state_digests == table.state_digests
    floats = {k for k, v in net.state_dict().items() if v.is_floating_point()}
    assert set(plan.state_digests) == floats  # every persistent float entry, nothing else
    # a version 4 table file (before the field) still loads, without digests
    d = json.loads((tmp_path / "t.json").read_text())
    assert d["version"] == 6
    d["version"] = 4
    del d["state_digests"]
    (tmp_path / "v2.json").write_text(json.dumps(d))
    old = SensitivityTable.load(tmp_path / "v2.json")
    assert old.state_digests is None and plan_budget(old, mean_bits=40).state_digests is None


def test_a_plan_file_without_state_digests_still_loads_and_checks_its_weights():
    net, _, table = _scanned()
    plan = plan_budget(table, mean_bits=40)
    d = json.loads(plan.to_json())
    del d["state_digests"]  # as written before the field existed (version 4)
    d["version"] = 4
    old = Plan.from_json(json.dumps(d))
    assert old.state_digests is None
    other = copy.deepcopy(net)
    with torch.no_grad():
        other.bn.running_var /= 25
    apply_plan(other, old)  # an old plan knows its planned weights only
    with torch.no_grad():
        other.fc.weight.mul_(1.01)
    with pytest.raises(ValueError, match="'fc' differ from those the plan was made for"):
        apply_plan(other, old)


def test_each_tensor_is_hashed_once_per_call(monkeypatch):
    import qwidgets.model.state_digest as sd

    class Tied(nn.Module):
        def __init__(self):
            super().__init__()
            self.emb = nn.Embedding(10, 8)
            self.out = nn.Linear(8, 10, bias=False)
            self.out.weight = self.emb.weight  # one tensor, two state_dict names
            self.norm = nn.LayerNorm(8)

        def forward(self, t):
            return self.out(self.norm(self.emb(t)))

    torch.manual_seed(0)
    net, tokens = Tied(), torch.randint(0, 10, (4, 5))
    hashed = []
    import qwidgets.core.grid_cache as gc
    import qwidgets.planning.apply as ap
    import qwidgets.planning.scanning as sc

    real_sha, real_blake = sc.weight_digest, gc.tensor_digest
    for module, name, real in ((sd, "tensor_digest", real_blake), (gc, "tensor_digest", real_blake),
                               (ap, "tensor_digest", real_blake), (sc, "weight_digest", real_sha),
                               (ap, "weight_digest", real_sha)):  # every route to a digest
        monkeypatch.setattr(module, name, lambda t, real=real: hashed.append(t) or real(t))
    gc.GRID_CACHE.clear()  # fits from earlier tests would hide the cache's own hashing
    table = scan(net, tokens, bits=(4, 8), progress=False)
    state = net.state_dict()
    distinct = {v.untyped_storage().data_ptr() for v in state.values() if v.is_floating_point()}
    assert len(state) == 4 and len(distinct) == 3  # naive count: emb/out shared, norm weight and bias
    assert len(hashed) == len(distinct)
    hashed.clear()
    apply_plan(net, plan_budget(table, mean_bits=40))
    assert len(hashed) == len(distinct)
