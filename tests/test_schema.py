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


def _grid(k, kind, j, **fields):
    def change(d):
        d["layers"][k][f"{kind}_grids"][j].update(fields)
    return change


def _swap(k, kind, i, j):
    def change(d):
        g = d["layers"][k][f"{kind}_grids"]
        g[i], g[j] = g[j], g[i]
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
    ("wrong version", _set("version", 7), "format / version must be"),
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
    # each grid has the width of its column (the fixture's bits are (2, 4, 8))
    ("weight grid of another width", _grid(0, "weight", 2, bits=4),
     r"layers\[0\].weight_grids\[2\].bits must be 8 \(its column, bits\[2\]\), got 4"),
    ("input grid of another width", _grid(1, "input", 1, bits=2),
     r"layers\[1\].input_grids\[1\].bits must be 4 \(its column, bits\[1\]\), got 2"),
    ("weight grids swapped", _swap(0, "weight", 0, 1),
     r"layers\[0\].weight_grids\[0\].bits must be 2 \(its column, bits\[0\]\), got 4"),
    # the per-channel axis (the fixture is per-channel, axis 0; weight_shape [5, 6])
    ("axis out of range", _layer(0, "axis", 2), r"layers\[0\].axis 2 is out of range for weight_shape \[5, 6\]"),
    ("negative axis", _layer(0, "axis", -1), r"layers\[0\].axis -1 is out of range"),
    ("axis string", _layer(0, "axis", "0"), r"layers\[0\].axis must be an integer, got a string"),
    ("axis bool", _layer(0, "axis", False), r"layers\[0\].axis must be an integer, got a boolean"),
    ("grid axis other than the entry's", _layer(0, "axis", 1),
     r"layers\[0\].weight_grids\[0\].axis must be 1 \(the entry's per-channel axis\), got an integer \(0\)"),
    ("one grid on another axis", _grid(1, "weight", 1, axis=1),
     r"layers\[1\].weight_grids\[1\].axis must be 0 \(the entry's per-channel axis\), got an integer \(1\)"),
    ("per-tensor grid in a per-channel table", _grid(0, "weight", 0, axis=None),
     r"layers\[0\].weight_grids\[0\].axis must be 0 \(the entry's per-channel axis\), got null"),
    ("per-channel grids in a per-tensor table", _set("per_channel", False),
     r"layers\[0\].weight_grids\[0\].axis must be null \(per_channel is false\), got an integer \(0\)"),
    # the other optional entry fields, typed as the plan reader types its own
    ("model_pass not a string", _layer(0, "model_pass", 1), r"layers\[0\].model_pass must be a string"),
    ("kind null", _layer(1, "kind", None), r"layers\[1\].kind must be a string, got null"),
    ("stored_bits float", _layer(0, "stored_bits", 960.0), r"layers\[0\].stored_bits must be an integer"),
    ("stored_bits string", _layer(0, "stored_bits", "960"), r"layers\[0\].stored_bits must be an integer"),
    ("stored_bits negative", _layer(0, "stored_bits", -1), r"layers\[0\].stored_bits must be >= 0"),
    ("digest upper case", _layer(0, "digest", "FC90"), r"layers\[0\].digest must be lowercase hex digits or null"),
    ("digest number", _layer(0, "digest", 12), r"layers\[0\].digest must be lowercase hex digits or null"),
    ("shared_with string", _layer(0, "shared_with", "1"), r"layers\[0\].shared_with must be a list of strings"),
    ("shared_with of numbers", _layer(0, "shared_with", [2]), r"layers\[0\].shared_with must be a list of strings"),
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


def _load(data, tmp_path):
    path = tmp_path / "t.json"
    path.write_text(json.dumps(data))
    return SensitivityTable.load(path)


@pytest.fixture(scope="module")
def separate(tmp_path_factory):
    torch.manual_seed(1)
    net = nn.Sequential(nn.Linear(6, 5), nn.ReLU(), nn.Linear(5, 3)).eval()
    table = scan(net, torch.randn(16, 6), bits=(2, 4, 8), input_bits=(6, 8), quantize="separate",
                 progress=False)
    return table.to_dict()


def test_a_separate_tables_input_grids_have_the_input_widths(separate, tmp_path):
    data = json.loads(json.dumps(separate))
    assert data["input_bits"] == [6, 8]  # read with the json module, not qwidgets
    assert [g["bits"] for g in data["layers"][0]["input_grids"]] == [6, 8]
    assert _load(data, tmp_path).to_dict() == data  # as written, it loads
    data["layers"][0]["input_grids"][1]["bits"] = 4  # the width of a weight column, not 8
    with pytest.raises(ValueError, match=r"layers\[0\].input_grids\[1\].bits must be 8 "
                                         r"\(its column, input_bits\[1\]\), got 4"):
        _load(data, tmp_path)


def test_a_per_tensor_table_round_trips_and_refuses_a_per_channel_grid(tmp_path):
    torch.manual_seed(2)
    net = nn.Sequential(nn.Linear(6, 5), nn.ReLU(), nn.Linear(5, 3)).eval()
    table = scan(net, torch.randn(16, 6), bits=(3, 5), per_channel=False, progress=False)
    data = json.loads(json.dumps(table.to_dict()))
    assert data["per_channel"] is False
    assert all(g["axis"] is None for e in data["layers"] for g in e["weight_grids"])
    assert _load(data, tmp_path).to_dict() == data
    data["per_channel"] = True  # the grids stay whole-tensor: the file contradicts itself
    with pytest.raises(ValueError, match=r"layers\[0\].weight_grids\[0\].axis must be 0 "
                                         r"\(the entry's per-channel axis\), got null"):
        _load(data, tmp_path)


def test_a_transposed_convolutions_grids_are_on_axis_1_and_load(tmp_path):
    # ConvTranspose2d's weight is (in, out, kh, kw): its output channels are axis 1
    torch.manual_seed(3)
    net = nn.Sequential(nn.ConvTranspose2d(2, 3, 3), nn.ReLU(), nn.Conv2d(3, 2, 3)).eval()
    table = scan(net, torch.randn(4, 2, 6, 6), bits=(4, 8), progress=False)
    data = json.loads(json.dumps(table.to_dict()))
    first = data["layers"][0]
    assert first["axis"] == 1 and first["weight_shape"][1] == 3
    assert all(g["axis"] == 1 and len(g["scale"]) == 3 for g in first["weight_grids"])
    assert _load(data, tmp_path).to_dict() == data
    first["axis"] = 0  # the grids hold 3 scales along axis 1; the entry would say axis 0
    with pytest.raises(ValueError, match=r"layers\[0\].weight_grids\[0\].axis must be 0"):
        _load(data, tmp_path)


def test_a_version_2_table_still_reads(saved, tmp_path):
    # version 2 (before activation entries): no "partner" fields
    table, text = saved
    data = json.loads(text)
    assert data["version"] == 6
    data["version"] = 2
    del data["state_digests"]  # version 5's field
    loaded = _load(data, tmp_path)
    assert loaded.to_dict() == {**data, "version": 6}  # written back as version 6
    data["layers"][0]["partner"] = None  # version 3's field
    with pytest.raises(ValueError, match="and optionally"):
        _load(data, tmp_path)


def test_a_version_1_table_still_reads(saved, tmp_path):
    # version 1: no input_bits, no input rows, none of the optional entry fields
    table, text = saved
    data = json.loads(text)
    data["version"] = 1
    del data["input_bits"], data["coverage"], data["estimate"], data["state_digests"]
    for e in data["layers"]:
        for key in ("input_layer_sqnr_db", "input_model_sqnr_db", "model_pass", "kind", "axis",
                    "has_input", "shared_with", "stored_bits", "digest"):
            del e[key]
    loaded = _load(data, tmp_path)
    assert loaded.layers == table.layers and loaded.bits == table.bits
    assert loaded.per_channel and all(loaded.weight_axis(n) == 0 for n in loaded.layers)
    for n in table.layers:
        for b in table.bits:
            assert loaded.sqnr_db(n, b) == table.sqnr_db(n, b)
            assert loaded.weight_grid(n, b).bits == b and loaded.input_grid(n, b).bits == b
            assert torch.equal(loaded.weight_grid(n, b).scale_tensor(), table.weight_grid(n, b).scale_tensor())
    assert loaded.kind("0") == "layer" and loaded.has_input("0") and loaded.weight_digest("0") is None
    data["layers"][0]["input_grids"][2]["bits"] = 2  # the width check holds for version 1 too
    with pytest.raises(ValueError, match=r"layers\[0\].input_grids\[2\].bits must be 8"):
        _load(data, tmp_path)
