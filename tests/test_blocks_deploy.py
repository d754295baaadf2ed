"""A plan that mixes per-channel and block grids, applied, evaluated, refined and deployed.

Outside checks: the exported codes decoded by hand in float64 (``(codes - zero_point) *
scale`` with both repeated over each block, written here with numpy) against apply_plan's
weights; the ONNX file in the ONNX reference evaluator and in ONNX Runtime with graph
optimizations off (GUIDE.md: with them on, Runtime fuses quantize / dequantize pairs) against
apply_plan's model; blocked DequantizeLinear nodes checked in the graph itself.
"""

from __future__ import annotations

import math

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import torch
from onnx.reference import ReferenceEvaluator
from torch import nn

from qwidgets import (
    apply_plan,
    evaluate_plan,
    export_codes,
    export_onnx,
    plan_budget,
    refine_plan,
    scan,
)


@pytest.fixture(scope="module")
def planned():
    torch.manual_seed(3)
    net = nn.Sequential(nn.Conv2d(3, 8, 3, padding=1), nn.ReLU(), nn.Flatten(), nn.Linear(8 * 4 * 4, 16),
                        nn.ReLU(), nn.Linear(16, 5)).eval()
    with torch.no_grad():
        net[3].weight[:, 7] *= 12.0  # an outlying input column: blocks pay off there
    x = torch.randn(40, 3, 4, 4)
    t = scan(net, x, bits=(3, 4, 8), progress=False, granularity=("channel", 16))
    kib = 0.2 * 32 * sum(t.params(n) for n in t.layers) / 8192
    plan = plan_budget(t, planned_kib=kib, fixed={"0": {"bits": 4, "granularity": "channel"}})
    return net, x, plan, t


def _decode(entry):
    """(codes - zero_point) * scale with both repeated over each block, float64 (numpy)."""
    codes = entry["codes"].numpy().astype(np.float64)
    z = entry["zero_point"].numpy().astype(np.float64)
    s = entry["scale"].numpy().astype(np.float64)
    if entry["block_size"] is not None:
        g, axis = entry["block_size"], entry["axis"]
        n = codes.shape[axis]
        z = np.repeat(z, g, axis=axis).take(range(n), axis=axis)
        s = np.repeat(s, g, axis=axis).take(range(n), axis=axis)
    elif entry["axis"] is not None:
        shape = [1] * codes.ndim
        shape[entry["axis"]] = -1
        z, s = z.reshape(shape), s.reshape(shape)
    return (codes - z) * s


def test_the_plan_mixes_channel_and_block_grids(planned):
    _, _, plan, _ = planned
    assert plan.granularity["0"] == "channel" and 16 in plan.granularity.values()


def test_export_codes_decode_exactly_to_apply_plan_weights(planned):
    net, _, plan, _ = planned
    q = apply_plan(net, plan)
    out = export_codes(net, plan)
    for name, entry in out.items():
        want = q.get_submodule(name).weight.detach().numpy()
        # integer arithmetic then one rounding to float32: bit for bit
        np.testing.assert_array_equal(_decode(entry).astype(np.float32), want)
        if plan.granularity[name] == 16:
            assert entry["block_size"] == 16 and entry["scale"].shape == (entry["codes"].shape[0], math.ceil(
                entry["codes"].shape[1] / 16))


def _ort(path):
    so = ort.SessionOptions()
    so.graph_optimization_level = ort.GraphOptimizationLevel.ORT_DISABLE_ALL
    return ort.InferenceSession(str(path), so, providers=["CPUExecutionProvider"])


def test_onnx_file_runs_blocked_dequantize_and_matches_apply_plan(planned, tmp_path):
    net, x, plan, _ = planned
    path = tmp_path / "m.onnx"
    proto = export_onnx(net, plan, path, x[:2])
    onnx.checker.check_model(onnx.load(str(path)), full_check=True)
    blocked = [n for n in proto.graph.node if n.op_type == "DequantizeLinear"
               and any(a.name == "block_size" for a in n.attribute)]
    assert len(blocked) == sum(1 for g in plan.granularity.values() if g == 16)
    with torch.no_grad():
        want = apply_plan(net, plan)(x).numpy()
    feed = {"input_0": x.numpy()}
    for got in (ReferenceEvaluator(str(path)).run(None, feed)[0], _ort(path).run(None, feed)[0]):
        # the same weights; float32 convolutions and matmuls summed in another order
        np.testing.assert_allclose(got, want, rtol=1e-5, atol=1e-5 * float(np.abs(want).max()))


def test_evaluate_and_refine_work_per_block(planned):
    net, x, plan, t = planned
    rep = evaluate_plan(net, x, plan)
    with torch.no_grad():
        ref, q = net(x).double(), apply_plan(net, plan)(x).double()
    sqnr = 10 * math.log10(float(ref.square().sum()) / float((q - ref).square().sum()))
    assert rep.measured_sqnr_db == pytest.approx(sqnr, abs=1e-6)
    start = t.make_plan({n: 3 for n in t.layers}, granularity={"3": 16})
    r = refine_plan(net, x, start, steps=30, progress=False)
    assert r.sqnr_db > r.start_sqnr_db and r.plan.granularity == start.granularity
    new, old = r.plan.layers["3"].weight, start.layers["3"].weight
    assert new.block_size == 16 and new.scale.shape == old.scale.shape
    # each block's scale is learned on its own (not one factor for the whole tensor)
    ratio = (new.scale / old.scale).reshape(-1)
    assert float(ratio.max() - ratio.min()) > 0
