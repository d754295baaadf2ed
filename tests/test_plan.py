"""Plan JSON I/O and validation, apply_plan, export_codes, evaluate_plan.

Outside checks: export_codes decoded by integer arithmetic written in the test equals apply_plan's
weights exactly;
apply_plan's quantized model equals the probe's hook-based model_error pass (an independent
evaluation of the same settings); Python's own json module reads what to_json writes, and the
values it reads are the plan's grids.
"""

from __future__ import annotations

import json
import math
import os

import pytest
import torch
from torch import nn

from qwidgets.core.grid import UniformGrid
from qwidgets.core.ranges import fit_range
from qwidgets.core.rounding import quantize
from qwidgets.core.setting import LayerSetting
from qwidgets.model.forward import model_error
from qwidgets.model.layers import fit_weight
from qwidgets.planning.apply import apply_plan, export_codes
from qwidgets.planning.evaluate import PlanReport, evaluate_plan
from qwidgets.planning.plan import CAUTION, Plan, model_fingerprint


def _net(seed=0):
    torch.manual_seed(seed)
    return nn.Sequential(nn.Conv2d(3, 8, 3, padding=1), nn.BatchNorm2d(8), nn.ReLU(),
                         nn.Conv2d(8, 4, 3, groups=2), nn.Flatten(), nn.Linear(4 * 4 * 4, 5)).eval()


def _data():
    torch.manual_seed(5)
    return torch.randn(10, 3, 6, 6)


def _plan(net, x, bits=(4, 8, 12), unsigned_input=True):
    """A plan with per-channel weight grids and per-tensor input grids fitted to real inputs."""
    from qwidgets.model.capture import capture_inputs

    inputs = capture_inputs(net, x)
    names = ["0", "3", "5"]
    layers, b, shapes, macs = {}, {}, {}, {}
    for name, nb in zip(names, bits, strict=True):
        layer = net.get_submodule(name)
        ig = fit_range(inputs[name], nb, "minmax") if name != "0" or not unsigned_input else None
        layers[name] = LayerSetting(weight=fit_weight(layer, nb, "mse"), input=ig)
        b[name], shapes[name], macs[name] = nb, tuple(layer.weight.shape), 100 * nb
    return Plan(layers, b, fingerprint=model_fingerprint(net), weight_shapes=shapes, macs=macs,
                predicted_sqnr_db=30.5)


def _snapshot(model):
    return ({k: v.clone() for k, v in model.state_dict().items()},
            [(m.training, len(m._forward_hooks), len(m._forward_pre_hooks)) for m in model.modules()])


def _untouched(model, snap) -> bool:
    state, flags = snap
    same = all(torch.equal(v, state[k]) for k, v in model.state_dict().items())
    return same and flags == [(m.training, len(m._forward_hooks), len(m._forward_pre_hooks))
                              for m in model.modules()]


# ---------------------------------------------------------------------------- JSON
def test_json_read_by_the_json_module_holds_the_plan_values():
    # outside reader: Python's json module; the values it reads are compared with the grids
    net, x = _net(), _data()
    plan = _plan(net, x)
    data = json.loads(plan.to_json())
    assert data["format"] == "qwidgets plan" and data["version"] == 6
    # the figures under the names of the Plan attributes and budget keywords
    assert data["figures"] == {"model_kib": plan.model_kib, "planned_kib": plan.planned_kib,
                               "mean_bits": plan.mean_bits, "bops": plan.bops}
    assert list(data["layers"]) == ["0", "3", "5"]
    for name, setting in plan.layers.items():
        entry = data["layers"][name]
        assert entry["bits"] == plan.bits[name] and entry["macs"] == plan.macs[name]
        assert tuple(entry["weight_shape"]) == plan.weight_shapes[name]
        w = setting.weight
        assert entry["weight"]["axis"] == 0 and entry["weight"]["bits"] == w.bits
        # float32 values survive a trip through JSON's decimal text exactly (repr round trip)
        assert entry["weight"]["scale"] == w.scale_tensor().reshape(-1).tolist()
        assert entry["weight"]["offset"] == w.offset_tensor().reshape(-1).tolist()
        assert entry["weight"]["zero_point"] == [0] * len(entry["weight"]["scale"])
        if setting.input is None:
            assert entry["input"] is None
        else:
            assert entry["input"]["scale"] == float(setting.input.scale)
            assert entry["input"]["signed"] is setting.input.signed
    assert data["predicted_sqnr_db"] == 30.5


def test_json_round_trip_is_exact():
    # qwidgets against itself: what to_json writes, from_json reads back unchanged
    net, x = _net(), _data()
    plan = _plan(net, x)
    text = plan.to_json()
    back = Plan.from_json(text)
    assert back.bits == plan.bits and back.fingerprint == plan.fingerprint
    assert back.predicted_sqnr_db == 30.5 and back.weight_shapes == plan.weight_shapes
    for n in plan.layers:
        a, b = plan.layers[n], back.layers[n]
        assert torch.equal(a.weight.scale, b.weight.scale) and torch.equal(a.weight.offset, b.weight.offset)
        assert (a.input is None) == (b.input is None)
        if a.input is not None:
            assert a.input.scale == b.input.scale and a.input.signed == b.input.signed
    assert back.planned_kib == plan.planned_kib and back.bops == plan.bops
    assert back.to_json() == text


def test_costs_of_a_plan_counted_by_hand():
    net, x = _net(), _data()
    plan = _plan(net, x)
    # 216 weights x 4 bits, 144 x 8, 320 x 12, plus (8 + 4 + 5) channels x (32 + 32) bits
    bits = 216 * 4 + 144 * 8 + 320 * 12 + (8 + 4 + 5) * 64
    assert plan.planned_kib == bits / 8192
    assert plan.float_planned_kib == (216 + 144 + 320) * 32 / 8192
    assert plan.mean_bits == bits / 680  # stored bits per weight: codes, scales, zero points
    # layer "0" has no input grid: the assumed 8 bits count
    assert plan.bops == 400 * 4 * 8 + 800 * 8 * 8 + 1200 * 12 * 12
    assert plan.float_bops == (400 + 800 + 1200) * 32 * 32
    rows = plan.to_rows()
    assert [r["bits"] for r in rows] == [4, 8, 12] and rows[0]["input_bits"] is None
    assert rows[0]["storage_bits"] == 216 * 4 + 8 * 64 and rows[0]["float_kib"] == 216 * 32 / 8192
    assert sum(r["kib"] for r in rows) == plan.planned_kib and rows[2]["float_bops"] == 1200 * 32 * 32


def test_a_version_1_plan_still_reads():
    # version 1 (before "figures"): the same plan, read field by field as before
    plan = _plan(_net(), _data())
    data = json.loads(plan.to_json())
    data["version"] = 1
    del data["figures"]
    data.pop("state_digests", None)
    back = Plan.from_json(json.dumps(data))
    assert back.bits == plan.bits and json.loads(back.to_json()) == _without_digests(plan)  # as version 4
    data["figures"] = json.loads(plan.to_json())["figures"]  # version 1 has no figures field
    with pytest.raises(ValueError, match=r"unknown field\(s\) \['figures'\]"):
        Plan.from_json(json.dumps(data))


def test_a_version_2_plan_still_reads():
    # version 2 (before activation entries): the same plan without "partner" fields
    plan = _plan(_net(), _data())
    data = json.loads(plan.to_json())
    data["version"] = 2
    # versions 2 and 3 stated the mean bits of the codes alone (version 4: stored bits)
    params = {n: math.prod(s) for n, s in plan.weight_shapes.items()}
    data["figures"]["mean_bits"] = sum(params[n] * plan.bits[n] for n in params) / sum(params.values())
    data.pop("state_digests", None)
    back = Plan.from_json(json.dumps(data))
    assert back.bits == plan.bits and json.loads(back.to_json()) == _without_digests(plan)  # as version 5
    data["layers"]["3"]["partner"] = None  # version 3's field
    with pytest.raises(ValueError, match=r"unknown field\(s\) \['partner'\]"):
        Plan.from_json(json.dumps(data))


def test_a_version_4_plan_still_reads():
    # version 4 (before state_digests and pinned): read without them, checking planned weights only
    plan = _plan(_net(), _data())
    data = json.loads(plan.to_json())
    data["version"] = 4
    data.pop("state_digests", None)
    back = Plan.from_json(json.dumps(data))
    assert back.state_digests is None and json.loads(back.to_json()) == _without_digests(plan)
    data["state_digests"] = {"0.weight": "0123456789abcdef"}  # version 4's field
    with pytest.raises(ValueError, match=r"unknown field\(s\) \['state_digests'\]"):
        Plan.from_json(json.dumps(data))


def _without_digests(plan) -> dict:
    """The plan's JSON data without version 4's state_digests."""
    d = json.loads(plan.to_json())
    d.pop("state_digests", None)
    return d


def _broken(text, fn):
    data = json.loads(text)
    fn(data)
    return json.dumps(data)


def _bad_cases():
    return [
        ("truncated", lambda t: t[: len(t) // 2], "not valid JSON"),
        ("not an object", lambda t: "[1, 2]", "the top level must be a JSON object"),
        ("missing field", lambda t: _broken(t, lambda d: d.pop("fingerprint")), r"missing field\(s\) \['fingerprint'\]"),
        ("extra field", lambda t: _broken(t, lambda d: d.update(note="x")), r"unknown field\(s\) \['note'\]"),
        ("wrong version", lambda t: _broken(t, lambda d: d.update(version=7)), "version an integer \\(7\\) is not supported"),
        ("version 2 without figures", lambda t: _broken(t, lambda d: d.pop("figures")), r"missing field\(s\) \['figures'\]"),
        ("figures edited", lambda t: _broken(t, lambda d: d["figures"].update(mean_bits=2.0)),
         r"figures.mean_bits is 2.0 but the plan's layers give"),
        ("figures a string", lambda t: _broken(t, lambda d: d["figures"].update(bops="9")),
         r"figures.bops must be a number"),
        ("figures unknown field", lambda t: _broken(t, lambda d: d["figures"].update(kib=1)),
         r"figures has unknown field\(s\) \['kib'\]"),
        ("wrong format", lambda t: _broken(t, lambda d: d.update(format="other")), "format must be"),
        ("bad fingerprint", lambda t: _broken(t, lambda d: d.update(fingerprint="abc")), "fingerprint must be 64"),
        ("bits out of range", lambda t: _broken(t, lambda d: d["layers"]["3"]["weight"].update(bits=17)),
         r"layers\['3'\].weight.bits must be in 1..16, got 17"),
        ("bits a float", lambda t: _broken(t, lambda d: d["layers"]["3"].update(bits=8.0)),
         r"layers\['3'\].bits must be an integer"),
        ("bits a bool", lambda t: _broken(t, lambda d: d["layers"]["3"].update(bits=True)),
         r"layers\['3'\].bits must be an integer, got a boolean"),
        ("bits mismatch", lambda t: _broken(t, lambda d: d["layers"]["3"].update(bits=6)),
         r"layers\['3'\].bits is 6 but its weight grid has 8 bits"),
        ("scale a string", lambda t: _broken(t, lambda d: d["layers"]["5"]["input"].update(scale="0.1")),
         r"layers\['5'\].input.scale must be a number, got a string"),
        ("NaN scale", lambda t: t.replace(json.dumps(json.loads(t)["layers"]["5"]["input"]["scale"]), "NaN", 1),
         r"layers\['5'\].input.scale must be a finite number, got NaN"),
        ("Infinity offset", lambda t: _broken(t, lambda d: d["layers"]["3"]["weight"]["offset"].__setitem__(1, "INF")).replace('"INF"', "Infinity"),
         r"layers\['3'\].weight.offset\[1\] must be a finite number, got Infinity"),
        ("negative scale", lambda t: _broken(t, lambda d: d["layers"]["3"]["weight"]["scale"].__setitem__(2, -0.5)),
         r"layers\['3'\].weight.scale\[2\] must be > 0, got -0.5"),
        ("per-channel lengths differ", lambda t: _broken(t, lambda d: d["layers"]["3"]["weight"]["offset"].pop()),
         r"layers\['3'\].weight per-channel lists differ in length"),
        ("channels do not match the weight", lambda t: _broken(t, lambda d: [d["layers"]["3"]["weight"][k].pop() for k in ("scale", "offset", "zero_point")]),
         r"layers\['3'\].weight.scale has 3 values but the weight has 4 channels"),
        ("zero point inconsistent", lambda t: _broken(t, lambda d: d["layers"]["3"]["weight"]["zero_point"].__setitem__(0, 3)),
         r"layers\['3'\].weight.zero_point\[0\] = 3 does not match"),
        ("axis out of range", lambda t: _broken(t, lambda d: d["layers"]["3"]["weight"].update(axis=4)),
         r"layers\['3'\].weight.axis 4 is out of range"),
        ("signed not bool", lambda t: _broken(t, lambda d: d["layers"]["3"]["weight"].update(signed=1)),
         r"layers\['3'\].weight.signed must be true or false"),
        ("no grids", lambda t: _broken(t, lambda d: d["layers"]["3"].update(weight=None, input=None)),
         r"layers\['3'\] has neither a weight nor an input grid"),
        ("empty layers", lambda t: _broken(t, lambda d: d.update(layers={})), "layers must be a non-empty object"),
        ("layer not an object", lambda t: _broken(t, lambda d: d["layers"].update({"3": [1]})),
         r"layers\['3'\] must be a JSON object"),
        ("shape not a list", lambda t: _broken(t, lambda d: d["layers"]["3"].update(weight_shape=4)),
         r"layers\['3'\].weight_shape must be a list"),
        ("negative macs", lambda t: _broken(t, lambda d: d["layers"]["3"].update(macs=-1)),
         r"layers\['3'\].macs must be >= 0"),
    ]


@pytest.mark.parametrize("label, damage, msg", _bad_cases(), ids=[c[0] for c in _bad_cases()])
def test_malformed_plans_give_clear_errors(label, damage, msg):
    text = _plan(_net(), _data()).to_json()
    with pytest.raises(ValueError, match=msg):
        Plan.from_json(damage(text))


def test_from_json_type_checks():
    with pytest.raises(TypeError, match="text must be JSON text"):
        Plan.from_json({"format": "qwidgets plan"})


def test_save_and_load(tmp_path):
    plan = _plan(_net(), _data())
    path = tmp_path / "plan.json"
    plan.save(path)
    assert Plan.load(path).bits == plan.bits
    assert [p.name for p in tmp_path.iterdir()] == ["plan.json"]  # no temporary file left
    # the file is for a deployment pipeline: the usual permissions (0666 less the umask), like
    # open(path, "w") would give, not the private mode of the temporary file it was written to
    mask = os.umask(0)
    os.umask(mask)
    assert path.stat().st_mode & 0o777 == 0o666 & ~mask


def test_unwritable_paths_give_clear_errors_and_change_nothing(tmp_path):
    plan = _plan(_net(), _data())
    with pytest.raises(FileNotFoundError, match="folder .* does not exist"):
        plan.save(tmp_path / "no" / "such" / "plan.json")
    with pytest.raises(IsADirectoryError, match="it is a folder"):
        plan.save(tmp_path)
    with pytest.raises(ValueError, match="path must be a non-empty file path"):
        plan.save("")
    with pytest.raises(TypeError, match="path must be a file path"):
        plan.save(3)
    # sysfs refuses new files even for root (Linux): the kernel's EACCES stays a PermissionError
    if os.path.isdir("/sys/kernel"):
        with pytest.raises(PermissionError, match="cannot write the plan to '/sys/kernel/plan.json'"):
            plan.save("/sys/kernel/plan.json")


def test_a_failed_write_keeps_the_old_file_and_leaves_no_temporary(tmp_path):
    # A write the kernel cuts short, which root cannot bypass either: a file-size limit
    # (RLIMIT_FSIZE; with SIGXFSZ ignored, write(2) fails with EFBIG, POSIX setrlimit(2)).
    resource = pytest.importorskip("resource")
    import errno
    import signal

    plan = _plan(_net(), _data())
    (tmp_path / "plan.json").write_text("old")
    soft, hard = resource.getrlimit(resource.RLIMIT_FSIZE)
    previous = signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    resource.setrlimit(resource.RLIMIT_FSIZE, (16, hard))
    try:
        with pytest.raises(OSError, match="cannot write the plan") as info:
            plan.save(tmp_path / "plan.json")
    finally:
        resource.setrlimit(resource.RLIMIT_FSIZE, (soft, hard))
        signal.signal(signal.SIGXFSZ, previous)
    assert info.value.errno == errno.EFBIG and not isinstance(info.value, PermissionError)
    assert (tmp_path / "plan.json").read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["plan.json"]


def test_save_never_touches_the_process_umask(tmp_path, monkeypatch):
    # os.umask is process-wide: setting it, even for a moment, races other threads' file creation
    def refuse(*_):
        raise AssertionError("os.umask called")

    monkeypatch.setattr(os, "umask", refuse)
    _plan(_net(), _data()).save(tmp_path / "plan.json")
    assert (tmp_path / "plan.json").exists()


def test_load_errors(tmp_path):
    # a missing file stays a FileNotFoundError (Python's class for ENOENT), with a clear message
    with pytest.raises(FileNotFoundError, match="cannot read the plan"):
        Plan.load(tmp_path / "missing.json")
    with pytest.raises(IsADirectoryError, match="cannot read the plan"):
        Plan.load(tmp_path)
    (tmp_path / "bin.json").write_bytes(b"\xff\xfe\x00")
    with pytest.raises(ValueError, match="not a UTF-8 text file"):
        Plan.load(tmp_path / "bin.json")


# ---------------------------------------------------------------------------- apply / export
def test_apply_plan_copies_and_matches_hook_evaluation():
    # reference: probe.model_error, which quantizes by hooks on the original model
    net, x = _net(), _data()
    net.train()  # the user's flags must survive too
    snap = _snapshot(net)
    plan = _plan(net, x)
    q = apply_plan(net, plan)
    assert _untouched(net, snap) and q is not net
    for name, s in plan.layers.items():
        layer = net.get_submodule(name)
        assert torch.equal(q.get_submodule(name).weight, quantize(layer.weight.detach(), s.weight))
    q.eval()
    with torch.no_grad():
        out = q(x)
    ref = model_error(net, x, plan.layers)
    from qwidgets.core.metrics import error_stats
    from qwidgets.model.forward import forward_float

    assert error_stats(forward_float(net, x), out).sqnr_db == pytest.approx(ref.output.sqnr_db, abs=1e-9)
    assert _untouched(net, snap)
    assert q.qwidgets_applied == ("0", "3", "5") and q.qwidgets_skipped == ()


def _decode_by_hand(e) -> torch.Tensor:
    """Affine dequantization written out (Jacob et al. 2018: r = S (q - Z)): float64
    (codes - zero_point) * scale, per channel along ``axis``, cast to the weight dtype."""
    codes = e["codes"].to(torch.float64)
    scale = e["scale"].to(torch.float64)
    zero = e["zero_point"].to(torch.float64)
    if e["axis"] is not None and scale.numel() > 1:
        shape = [1] * codes.dim()
        shape[e["axis"]] = -1
        scale, zero = scale.reshape(shape), zero.reshape(shape)
    return ((codes - zero) * scale).to(torch.float32)


def test_export_codes_decoded_by_integer_arithmetic_equal_apply_plan_weights():
    net, x = _net(), _data()
    plan = _plan(net, x, bits=(4, 8, 12))
    codes = export_codes(net, plan)
    q = apply_plan(net, plan)
    dtypes = {"0": torch.int8, "3": torch.int8, "5": torch.int16}
    for name, e in codes.items():
        assert e["codes"].dtype == dtypes[name]
        assert e["zero_point"].dtype == torch.int32 and e["zero_point"].tolist() == [0] * e["scale"].numel()
        lo, hi = (-(2 ** (e["bits"] - 1)), 2 ** (e["bits"] - 1) - 1)
        assert int(e["codes"].min()) >= lo and int(e["codes"].max()) <= hi
        assert torch.equal(_decode_by_hand(e), q.get_submodule(name).weight.detach()), name
    assert codes["0"]["input"] is None and codes["5"]["input"]["bits"] == 12


def test_export_codes_with_an_offset_near_a_zero_point_decode_to_apply_plan_weights():
    # an offset within the zero-point tolerance of -Z*S (0.3 + 2e-5 on a step of 0.1): the
    # exported Z and the weights apply_plan measured must agree bit for bit
    torch.manual_seed(0)
    lin = nn.Linear(4, 3)
    g = UniformGrid(8, 0.1, offset=0.3 + 2e-5)
    p = Plan({"": LayerSetting(weight=g)}, {"": 8}, fingerprint=model_fingerprint(lin),
             weight_shapes={"": (3, 4)}, macs={"": 12})
    e = export_codes(lin, p)[""]
    if e["zero_point"] is None:  # no integer zero point claimed: nothing to decode wrongly
        return
    assert torch.equal(_decode_by_hand(e), apply_plan(lin, p).weight.detach())


def test_export_codes_unsigned_grids_use_unsigned_bytes():
    torch.manual_seed(0)
    lin = nn.Linear(4, 3)
    for bits, dt in ((8, torch.uint8), (12, torch.int16), (16, torch.int32)):
        g = fit_range(lin.weight.detach(), bits, "minmax", signed=False, symmetric=False)
        p = Plan({"": LayerSetting(weight=g)}, {"": bits}, fingerprint=model_fingerprint(lin),
                 weight_shapes={"": (3, 4)}, macs={"": 12})
        e = export_codes(lin, p)[""]
        assert e["codes"].dtype == dt
        assert int(e["codes"].min()) >= 0 and int(e["codes"].max()) <= 2 ** bits - 1
        assert torch.equal(_decode_by_hand(e), apply_plan(lin, p).weight.detach()), bits


def test_plan_for_another_model_is_refused_with_names():
    net, x = _net(), _data()
    plan = _plan(net, x)
    other = nn.Sequential(nn.Conv2d(3, 8, 3, padding=1), nn.BatchNorm2d(8), nn.ReLU(),
                          nn.Conv2d(8, 6, 3, groups=2), nn.Flatten(), nn.Linear(6 * 16, 5))
    snap = _snapshot(other)
    with pytest.raises(ValueError, match=r"another model .*'3' \(weight shape \(6, 4, 3, 3\) in the model, "
                                         r"\(4, 4, 3, 3\) in the plan\), '5'"):
        apply_plan(other, plan)
    with pytest.raises(ValueError, match="another model"):
        export_codes(other, plan)
    with pytest.warns(UserWarning, match="skipped 2 planned layer"):
        q = apply_plan(other, plan, strict=False)
    assert q.qwidgets_applied == ("0",) and len(q.qwidgets_skipped) == 2
    assert _untouched(other, snap)
    # same layers, one extra parameter elsewhere: the fingerprint differs, nothing to name
    extra = _net()
    extra.register_parameter("gain", nn.Parameter(torch.ones(1)))
    with pytest.raises(ValueError, match="every planned layer matches by name and shape"):
        apply_plan(extra, plan)
    rep = evaluate_plan(other, torch.randn(2, 3, 6, 6), plan, strict=False)
    assert len(rep.skipped) == 2
    with pytest.raises(ValueError, match="no planned layer matches"):
        apply_plan(nn.Sequential(nn.Linear(2, 2)), plan, strict=False)


def test_evaluate_plan_report():
    net, x = _net(), _data()
    target = torch.arange(10) % 5
    snap = _snapshot(net)
    plan = _plan(net, x, bits=(8, 8, 8))

    def agree(out, t):
        return float((out.argmax(1) == t).float().mean())

    rep = evaluate_plan(net, x, plan, metric=agree, target=target)
    assert isinstance(rep, PlanReport) and _untouched(net, snap)
    assert rep.predicted_sqnr_db == 30.5 and math.isfinite(rep.measured_sqnr_db)
    assert rep.metric_float == agree(net(x), target)
    assert rep.planned_kib == plan.planned_kib and rep.bops == plan.bops
    assert CAUTION in str(rep) and "vehicles, medical devices" in CAUTION
    assert rep.to_dict()["output"]["sqnr_db"] == rep.measured_sqnr_db
    with pytest.raises(TypeError, match="metric must be a callable"):
        evaluate_plan(net, x, plan, metric=3)


def test_bad_arguments():
    net, x = _net(), _data()
    plan = _plan(net, x)
    with pytest.raises(TypeError, match="model must be a torch.nn.Module"):
        apply_plan("net", plan)
    with pytest.raises(TypeError, match="plan must be a Plan"):
        apply_plan(net, {"0": 4})
    with pytest.raises(TypeError, match="strict must be True or False"):
        apply_plan(net, plan, strict="no")
    with pytest.raises(ValueError, match="at least one layer"):
        Plan({}, {}, fingerprint="0" * 64, weight_shapes={}, macs={})
    with pytest.raises(TypeError, match=r"layers\['a'\] must be a LayerSetting"):
        Plan({"a": 4}, {"a": 4}, fingerprint="0" * 64, weight_shapes={"a": (1, 1)}, macs={"a": 1})
    with pytest.raises(ValueError, match=r"bits\['a'\] must be in 1..16, got 0"):
        Plan({"a": LayerSetting(weight=UniformGrid(4, 0.1))}, {"a": 0}, fingerprint="0" * 64,
             weight_shapes={"a": (1, 1)}, macs={"a": 1})
    with pytest.raises(ValueError, match="bits must name the same layers"):
        Plan({"a": LayerSetting(weight=UniformGrid(4, 0.1))}, {"b": 4}, fingerprint="0" * 64,
             weight_shapes={"a": (1, 1)}, macs={"a": 1})
