"""export_onnx against outside checks.

Outside checks: onnx.checker.check_model (full check); the onnx package's reference evaluator
(onnx.reference.ReferenceEvaluator) and ONNX Runtime run the exported file and must give
apply_plan's outputs (relative RMS error < 1e-4); ONNX operator semantics (opset 21:
QuantizeLinear / DequantizeLinear with int4 / uint4 / int8 / uint8 / int16 / uint16 and a
per-axis scale and zero point, round half to even, saturate; GUIDE.md). ONNX Runtime runs with
graph optimizations off: with them on it fuses quantize / dequantize pairs into integer kernels
whose own rounding is the device-side arithmetic the README says to validate on the device.
"""

from __future__ import annotations

import math

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import torch
from onnx import numpy_helper
from onnx.reference import ReferenceEvaluator
from torch import nn

from qwidgets import (
    DeviceRules,
    UniformGrid,
    apply_plan,
    export_codes,
    export_onnx,
    fit_range,
    fold_batchnorm,
)
from qwidgets.core.setting import LayerSetting
from qwidgets.model.capture import capture_inputs
from qwidgets.model.layers import fit_weight
from qwidgets.planning.plan import Plan, model_fingerprint

_TYPES = {onnx.TensorProto.INT4: "int4", onnx.TensorProto.UINT4: "uint4", onnx.TensorProto.INT8: "int8",
          onnx.TensorProto.UINT8: "uint8", onnx.TensorProto.INT16: "int16", onnx.TensorProto.UINT16: "uint16"}


def _plan(net, x, wbits, ibits, rules=None, symmetric_inputs=False):
    """Per-channel weight grids and per-tensor asymmetric input grids fitted here."""
    inputs = capture_inputs(net, x)
    layers, bits, shapes, macs = {}, {}, {}, {}
    for (name, wb), ib in zip(wbits.items(), ibits, strict=True):
        layer = net.get_submodule(name)
        wg = fit_weight(layer, wb, "mse", rules=rules) if rules else fit_weight(layer, wb, "mse")
        ig = None
        if ib is not None:
            kw = {"rules": rules, "role": "input"} if rules else {}
            ig = fit_range(inputs[name], ib, "minmax", symmetric=symmetric_inputs, **kw)
        layers[name] = LayerSetting(weight=wg, input=ig)
        bits[name], shapes[name], macs[name] = wb, tuple(layer.weight.shape), 1
    return Plan(layers, bits, fingerprint=model_fingerprint(net), weight_shapes=shapes, macs=macs)


def _rel_rms(a, want):
    return math.sqrt(float(np.mean((a - want) ** 2)) / float(np.mean(want**2)))


def _ort(path):
    so = ort.SessionOptions()
    so.graph_optimization_level = ort.GraphOptimizationLevel.ORT_DISABLE_ALL
    return ort.InferenceSession(str(path), so, providers=["CPUExecutionProvider"])


def _check(net, plan, x, path, ort_ok=True):
    """Checker, reference evaluator and ONNX Runtime against apply_plan on held-out inputs."""
    before = {k: v.clone() for k, v in net.state_dict().items()}
    proto = export_onnx(net, plan, path, x[:2])
    assert all(torch.equal(v, before[k]) for k, v in net.state_dict().items())
    onnx.checker.check_model(onnx.load(str(path)), full_check=True)
    held_out = x[2:]
    with torch.no_grad():
        want = apply_plan(net, plan)(held_out).numpy()
    feed = {"input_0": held_out.numpy()}
    got = ReferenceEvaluator(str(path)).run(None, feed)[0]
    assert _rel_rms(got, want) < 1e-4
    if ort_ok:
        assert _rel_rms(_ort(path).run(None, feed)[0], want) < 1e-4
    return proto


def _inits(proto):
    return {t.name: t for t in proto.graph.initializer}


def _node_inputs(proto, op):
    return [n for n in proto.graph.node if n.op_type == op]


MODELS = {
    "conv2d+linear": (lambda: nn.Sequential(nn.Conv2d(3, 8, 3, padding=1), nn.ReLU(), nn.Conv2d(8, 4, 3, groups=2),
                                            nn.Flatten(), nn.Linear(4 * 4 * 4, 5)),
                      (20, 3, 6, 6), ["0", "2", "4"]),
    "conv1d": (lambda: nn.Sequential(nn.Conv1d(2, 6, 3), nn.Tanh(), nn.Conv1d(6, 3, 1)), (20, 2, 12), ["0", "2"]),
    "linear-3d": (lambda: nn.Sequential(nn.Linear(6, 9), nn.GELU(), nn.Linear(9, 4)), (20, 5, 6), ["0", "2"]),
}


@pytest.mark.parametrize("model", list(MODELS))
@pytest.mark.parametrize("wbits, ibits", [((4, 8, 4), (8, 8, 8)), ((3, 5, 8), (None, 6, 4)),
                                          ((12, 16, 2), (16, 12, None)), ((8, 8, 8), (None, None, None))])
def test_export_matches_apply_plan_in_reference_evaluator_and_onnx_runtime(model, wbits, ibits, tmp_path):
    torch.manual_seed(0)
    make, shape, names = MODELS[model]
    net = make().eval()
    x = torch.randn(shape)
    plan = _plan(net, x, dict(zip(names, wbits, strict=False)), ibits[: len(names)])
    proto = _check(net, plan, x, tmp_path / "m.onnx")
    inits = _inits(proto)
    codes = export_codes(net, plan)
    for dq in _node_inputs(proto, "DequantizeLinear"):
        if dq.output[0].endswith(".weight"):
            name = dq.output[0][: -len(".weight")]
            e, g = codes[name], plan.layers[name].weight
            q = inits[dq.input[0]]
            width = 4 if g.bits <= 4 else 8 if g.bits <= 8 else 16
            assert _TYPES[q.data_type] == f"int{width}"  # signed weight grids
            arr = numpy_helper.to_array(q).astype(np.int64)
            assert np.array_equal(arr, e["codes"].numpy().astype(np.int64))  # the grid's narrower range
            assert arr.min() >= g.qmin and arr.max() <= g.qmax
            assert np.array_equal(numpy_helper.to_array(inits[dq.input[1]]), e["scale"].numpy())
            assert {a.name: a.i for a in dq.attribute} == {"axis": 0}
    n_in = sum(b is not None for b in ibits[: len(names)])
    assert len(_node_inputs(proto, "QuantizeLinear")) == n_in
    assert proto.ir_version == 10 and [o.version for o in proto.opset_import if o.domain in ("", "ai.onnx")] == [21]


def test_narrow_input_grid_is_clipped_to_its_own_range(tmp_path):
    # a 3-bit unsigned input grid stored in uint4: QuantizeLinear alone would saturate at 15, not 7
    torch.manual_seed(1)
    net = nn.Sequential(nn.Linear(4, 3)).eval()
    g = UniformGrid(3, 0.25, signed=False)  # levels 0 .. 1.75
    plan = Plan({"0": LayerSetting(weight=UniformGrid(8, 0.01, axis=None), input=g)}, {"0": 8},
                fingerprint=model_fingerprint(net), weight_shapes={"0": (3, 4)}, macs={"0": 12})
    x = torch.rand(10, 4) * 6 - 1  # far past both ends
    proto = _check(net, plan, x, tmp_path / "n.onnx")
    assert len(_node_inputs(proto, "Clip")) == 1
    q = _node_inputs(proto, "QuantizeLinear")[0]
    assert _TYPES[_inits(proto)[q.input[2]].data_type] == "uint4"


def test_device_rules_are_visible_in_the_exported_scales_and_zero_points(tmp_path):
    torch.manual_seed(2)
    net = nn.Sequential(nn.Conv2d(3, 6, 3), nn.BatchNorm2d(6), nn.ReLU(), nn.Flatten(), nn.Linear(6 * 16, 4)).eval()
    with torch.no_grad():
        net[1].running_var.uniform_(0.5, 2.0)
        net[1].running_mean.normal_()
    folded = fold_batchnorm(net)
    x = torch.randn(12, 3, 6, 6)
    rules = DeviceRules(pow2_scales=True, symmetric_weights=True, weight_bits=(4, 8), input_bits=(8,))
    plan = _plan(folded, x, {"0": 4, "4": 8}, (8, 8), rules=rules)
    proto = _check(folded, plan, x, tmp_path / "r.onnx")
    inits = _inits(proto)
    for node in _node_inputs(proto, "DequantizeLinear") + _node_inputs(proto, "QuantizeLinear"):
        scale = numpy_helper.to_array(inits[node.input[1]]).astype(np.float64).reshape(-1)
        assert all(math.frexp(float(v))[0] == 0.5 for v in scale)  # exact powers of two
        if node.output[0].endswith(".weight"):
            assert not numpy_helper.to_array(inits[node.input[2]]).any()  # symmetric: Z = 0


def test_grids_without_integer_zero_point_are_refused(tmp_path):
    net = nn.Sequential(nn.Linear(3, 2)).eval()
    bad = UniformGrid(8, 0.1, offset=0.3 + 2e-5, signed=False)
    plan = Plan({"0": LayerSetting(weight=bad)}, {"0": 8}, fingerprint=model_fingerprint(net),
                weight_shapes={"0": (2, 3)}, macs={"0": 6})
    with pytest.raises(ValueError, match=r"layer '0' weight: .*no integer zero point.*snapped"):
        export_onnx(net, plan, tmp_path / "b.onnx", torch.zeros(1, 3))
    assert not (tmp_path / "b.onnx").exists()
    far = UniformGrid(4, 0.1, offset=2.0)  # Z = -20 does not fit int4
    plan = Plan({"0": LayerSetting(weight=far)}, {"0": 4}, fingerprint=model_fingerprint(net),
                weight_shapes={"0": (2, 3)}, macs={"0": 6})
    with pytest.raises(ValueError, match=r"zero point -20 does not fit int4"):
        export_onnx(net, plan, tmp_path / "b.onnx", torch.zeros(1, 3))
    with pytest.raises(ValueError, match="opset must be in 21"):
        export_onnx(net, plan, tmp_path / "b.onnx", torch.zeros(1, 3), opset=13)
    with pytest.raises(TypeError, match="example_inputs must be a tensor"):
        export_onnx(net, plan, tmp_path / "b.onnx", [1, 2])


class _Block(nn.Module):
    def __init__(self):
        super().__init__()
        self.a, self.b = nn.Conv2d(4, 4, 3, padding=1), nn.Conv2d(4, 4, 3, padding=1)

    def forward(self, x):
        return torch.relu(x + self.b(torch.relu(self.a(x))))


def test_residual_block_exports(tmp_path):
    torch.manual_seed(3)
    net = _Block().eval()
    x = torch.randn(10, 4, 5, 5)
    plan = _plan(net, x, {"a": 4, "b": 8}, (8, 4))
    _check(net, plan, x, tmp_path / "res.onnx")


def test_other_entries_export_embedding_and_transposed_convolution(tmp_path):
    from qwidgets.model.entries import find_entries

    torch.manual_seed(4)

    class Tokens(nn.Module):
        def __init__(self):
            super().__init__()
            self.emb, self.up = nn.Embedding(11, 6), nn.ConvTranspose1d(6, 3, 3, stride=2)

        def forward(self, idx):
            return self.up(self.emb(idx).transpose(1, 2))

    net = Tokens().eval()
    x = torch.randint(0, 11, (12, 5))
    entries = {e.name: e for e in find_entries(net)}
    assert set(entries) == {"emb", "up"}
    layers = {n: LayerSetting(weight=fit_range(e.parameter(net).detach(), 4, "mse", axis=e.axis))
              for n, e in entries.items()}
    plan = Plan(layers, {n: 4 for n in layers}, fingerprint=model_fingerprint(net),
                weight_shapes={n: e.shape for n, e in entries.items()}, macs={n: 1 for n in layers})
    proto = export_onnx(net, plan, tmp_path / "t.onnx", x[:2])
    onnx.checker.check_model(proto, full_check=True)
    with torch.no_grad():
        want = apply_plan(net, plan)(x[2:]).numpy()
    feed = {"input_0": x[2:].numpy()}
    assert _rel_rms(ReferenceEvaluator(str(tmp_path / "t.onnx")).run(None, feed)[0], want) < 1e-4
    assert _rel_rms(_ort(tmp_path / "t.onnx").run(None, feed)[0], want) < 1e-4
    axes = sorted(a.i for n in _node_inputs(proto, "DequantizeLinear") for a in n.attribute)
    assert axes == sorted(e.axis for e in entries.values())  # per-channel axis of each entry
