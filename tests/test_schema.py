"""The table loader is as strict as the plan loader: planning/table_schema.py (tables) and
planning/schema.py (plans) check their fields with the same checks (planning/fields.py).

Each case damages one field of a table written by ``SensitivityTable.save`` and checks that
``SensitivityTable.load`` refuses it with a ValueError naming the field. The JSON is edited
with the standard library's json module (an outside reader), not with qwidgets.
"""

from __future__ import annotations

import json

import pytest
import torch
from torch import nn

from qwidgets import SensitivityTable, scan


@pytest.fixture(scope="module")
def saved(tmp_path_factory):
    torch.manual_seed(0)
    net = nn.Sequential(nn.Linear(6, 5), nn.ReLU(), nn.Linear(5, 3)).eval()
    table = scan(net, torch.randn(16, 6), bits=(2, 4, 8), quantize="both", progress=False)
    path = tmp_path_factory.mktemp("table") / "t.json"
    table.save(path)
    return table, path.read_text()


def _set(key, value):
    def change(d):
        d[key] = value
    return change


def _layer(k, key, value):
    def change(d):
        d["layers"][k][key] = value
    return change


def _drop(key, layer=None):
    def change(d):
        del (d if layer is None else d["layers"][layer])[key]
    return change


def _dup_name(d):
    d["layers"][1]["name"] = d["layers"][0]["name"]


CASES = [
    ("per_channel string", _set("per_channel", "false"), "per_channel must be true or false"),
    ("per_channel int", _set("per_channel", 0), "per_channel must be true or false"),
    ("duplicate layer name", _dup_name, r"layers\[1\].name '0' appears twice"),
    ("string macs", _layer(0, "macs", "48"), r"layers\[0\].macs must be an integer"),
    ("float macs", _layer(0, "macs", 48.0), r"layers\[0\].macs must be an integer"),
    ("negative macs", _layer(0, "macs", -1), r"layers\[0\].macs must be >= 0"),
    ("unsorted bits", _set("bits", [4, 2, 8]), "bits must ascend strictly"),
    ("duplicate bits", _set("bits", [2, 4, 4]), "bits must ascend strictly"),
    ("bits out of range", _set("bits", [2, 4, 17]), r"bits\[2\] must be in 1..16"),
    ("bool bits", _set("bits", [True, 4, 8]), r"bits\[0\] must be an integer"),
    ("unknown method", _set("method", "kmeans"), "method must be one of"),
    ("unknown quantize", _set("quantize", "weights"), "quantize must be one of"),
    ("extra top field", _set("comment", "hi"), r"expected an object with fields"),
    ("missing top field", _drop("n_samples"), r"expected an object with fields"),
    ("extra layer field", _layer(0, "colour", "red"), r"layers\[0\] must be an object with fields"),
    ("missing layer field", _drop("macs", 0), r"layers\[0\] must be an object with fields"),
    ("has_input string", _layer(0, "has_input", "true"), r"layers\[0\].has_input must be true or false"),
    ("bool version", _set("version", True), "format / version must be|expected an object with fields"),
    ("wrong version", _set("version", 3), "format / version must be"),
    ("float n_samples", _set("n_samples", 16.0), "n_samples must be an integer"),
    ("bad fingerprint", _set("fingerprint", "abc"), "fingerprint must be 64 lowercase hex"),
    ("empty layers", _set("layers", []), "layers must be a non-empty list"),
    ("unsorted input bits", _set("input_bits", [8, 4]), "input_bits must ascend strictly"),
    ("name not a string", _layer(0, "name", 3), r"layers\[0\].name must be a non-empty string"),
    ("shape of strings", _layer(0, "weight_shape", ["5", "6"]), r"weight_shape\[0\] must be an integer"),
    ("sqnr short", _layer(0, "layer_sqnr_db", [1.0, 2.0]), r"layer_sqnr_db must hold 3 values"),
    ("sqnr string", _layer(0, "model_sqnr_db", [1.0, "x", 2.0]), r"model_sqnr_db must be a number"),
    ("sqnr for one layer only", _layer(0, "layer_sqnr_db", None), "must be given for every layer or for none"),
    ("grid per_channel string", lambda d: d["layers"][0]["input_grids"][0].update(signed="true"),
     r"input_grids\[0\].signed must be true or false"),
]


@pytest.mark.parametrize("label, damage, message", CASES, ids=[c[0] for c in CASES])
def test_the_table_loader_refuses_each_damaged_field(saved, tmp_path, label, damage, message):
    _, text = saved
    data = json.loads(text)
    damage(data)
    path = tmp_path / "t.json"
    path.write_text(json.dumps(data))
    with pytest.raises(ValueError, match="invalid sensitivity table: .*(" + message + ")"):
        SensitivityTable.load(path)


def test_non_finite_literals_are_refused_by_name(saved, tmp_path):
    # Python's json writes NaN for float("nan"); strict JSON has no such literal
    _, text = saved
    data = json.loads(text)
    data["layers"][0]["layer_sqnr_db"][0] = float("nan")
    path = tmp_path / "t.json"
    path.write_text(json.dumps(data))
    with pytest.raises(ValueError, match=r"layer_sqnr_db must be a finite number, got NaN"):
        SensitivityTable.load(path)


def test_the_undamaged_table_loads_with_every_value(saved, tmp_path):
    table, text = saved
    path = tmp_path / "t.json"
    path.write_text(text)
    loaded = SensitivityTable.load(path)
    assert loaded.to_dict() == json.loads(text)  # compared through the json module's reading
    assert loaded.layers == table.layers and loaded.bits == table.bits


def test_both_loaders_check_grids_with_the_same_words(saved, tmp_path):
    # one schema: a plan's grid and a table's grid with the same damage get the same message
    table, text = saved
    plan = table.make_plan({name: 4 for name in table.layers})
    plan_data = json.loads(plan.to_json())
    first = next(iter(plan_data["layers"]))
    plan_data["layers"][first]["weight"]["signed"] = "yes"
    from qwidgets import Plan

    with pytest.raises(ValueError) as plan_error:
        Plan.from_json(json.dumps(plan_data))
    data = json.loads(text)
    data["layers"][0]["weight_grids"][1]["signed"] = "yes"
    path = tmp_path / "t.json"
    path.write_text(json.dumps(data))
    with pytest.raises(ValueError) as table_error:
        SensitivityTable.load(path)
    tail = ".signed must be true or false, got a string ('yes')"
    assert str(plan_error.value).endswith(tail) and str(table_error.value).endswith(tail)
