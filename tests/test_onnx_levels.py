"""Exported attention models with weights and activations planned, run in the ONNX reference
evaluator and ONNX Runtime without optimizations, against apply_plan.

Outside checks: onnx.reference.ReferenceEvaluator and onnxruntime (ORT_DISABLE_ALL) run the
files; ONNX operator semantics (QuantizeLinear rounds half to even, then adds its zero point;
GUIDE.md); numpy's rint (half to even) for which tied values a nudge moves.

Float32 results of two kernels for the same operation (torch's LayerNorm, softmax, GELU and
matrix products against the runtime's) differ in the last bits, so an activation value within
that rounding of a boundary of its grid may land one level away in the file; the check feeds the
file apply_plan's levels to tell such values from errors. Tolerances: 1e-5 relative (check_onnx's
MATCH_RTOL) on float32 outputs of a few thousand values, far above float32 rounding (1e-7).
"""

from __future__ import annotations

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import torch
from attention_models import EncoderClassifier, TinyDecoder, TinyViT, sequences, token_ids
from onnx import helper, numpy_helper
from onnx.reference import ReferenceEvaluator
from stored_bits import mean_bits_for
from torch import nn

from qwidgets import (
    LayerSetting,
    Plan,
    UniformGrid,
    apply_plan,
    check_onnx,
    export_onnx,
    plan_budget,
    scan,
)
from qwidgets.planning.onnx_levels import POINTS_KEY
from qwidgets.planning.plan import model_fingerprint

RTOL = 1e-5


def _images(n=64, seed=3):
    return torch.randn(n, 1, 8, 8, generator=torch.Generator().manual_seed(seed))


KINDS = {
    "encoder": (EncoderClassifier, lambda: sequences(64, 5, 6, seed=3)),
    "vit": (TinyViT, _images),
    "decoder": (TinyDecoder, lambda: token_ids(64, 8, 20, seed=3)),
}


def _rel(got, want) -> float:
    got, want = np.asarray(got, np.float64), want.detach().numpy().astype(np.float64)
    return float(np.linalg.norm(got - want) / np.linalg.norm(want))


def _plain(path):
    so = ort.SessionOptions()
    so.graph_optimization_level = ort.GraphOptimizationLevel.ORT_DISABLE_ALL
    return ort.InferenceSession(str(path), so, providers=["CPUExecutionProvider"])


@pytest.mark.parametrize("kind", KINDS)
def test_file_matches_apply_plan_in_both_runtimes(kind, tmp_path):
    torch.manual_seed(0)
    make, data = KINDS[kind]
    net, x = make().eval(), data()
    table = scan(net, x, bits=(4, 8), quantize="separate", input_bits=(8,), progress=False)
    plan = plan_budget(table, mean_bits=mean_bits_for(table, 6))
    acts = [n for n, s in plan.layers.items() if s.input is not None and table.kind(n) == "activation"]
    assert acts  # attention's own activations are planned, besides the layers' inputs
    path = tmp_path / f"{kind}.onnx"
    export_onnx(net, plan, path, x[:2])
    check = check_onnx(path, net, plan, x)
    assert check.matches, str(check)
    assert check.optimized_error is None, check.optimized_error  # the default session loads it too
    with torch.no_grad():
        want = apply_plan(net, plan)(x)
    feed = {"input_0": x.numpy()}
    runs = (("reference", ReferenceEvaluator(str(path)).run(None, feed)[0], check.reference_levels,
             check.reference_diff),
            ("runtime", _plain(path).run(None, feed)[0], check.runtime_levels, check.runtime_diff))
    for name, got, levels, reported in runs:
        rel = _rel(got, want)
        assert rel == pytest.approx(reported, rel=1e-6, abs=1e-12), name  # what the file computes
        assert levels.forced_diff < RTOL and levels.value_diff < RTOL and levels.misquantized == 0, name
        assert levels.n_values > 0
        if levels.flips == 0:  # every activation value on apply_plan's level: the outputs match
            assert rel < RTOL, (name, str(check))
        else:  # only values within float rounding of a boundary may land one level away
            assert levels.flip_gap < 1e-3 and levels.flip_rel < RTOL, (name, str(check))


def _linear_plan(lin):
    return Plan({"": LayerSetting(weight=UniformGrid(4, 0.05), input=UniformGrid(8, 0.25))}, {"": 4}, fingerprint=model_fingerprint(lin),
                weight_shapes={"": tuple(lin.weight.shape)}, macs={"": lin.weight.numel()})


def _ties(n=64, seed=0):
    """Inputs on the 0.25 grid's rounding boundaries (odd multiples of 0.125) and off them."""
    g = torch.Generator().manual_seed(seed)
    odd = 2 * torch.randint(-40, 40, (n, 4), generator=g) + 1
    x = odd.float() * 0.125
    x[::2] += torch.rand(n // 2, 4, generator=g) * 0.1  # every other row off the boundaries
    return x


def test_values_on_a_boundary_that_a_runtime_rounds_the_other_way_are_counted(tmp_path):
    """A file whose kernel before the quantizer rounds one float32 step up (a Mul by 1 + 2^-23
    stands for a runtime's other kernel): the values exactly on a boundary that torch rounds
    to even toward zero land one level further out; nothing else differs."""
    torch.manual_seed(0)
    lin, x = nn.Linear(4, 3), _ties()
    plan = _linear_plan(lin)
    path = tmp_path / "lin.onnx"
    proto = export_onnx(lin, plan, path, x[:1])
    for node in proto.graph.node:
        if node.input and node.input[0] == "input_0":
            node.input[0] = "input_0_nudged"
    nudge = numpy_helper.from_array(np.float32(1 + 2 ** -23), "nudge")
    proto.graph.initializer.append(nudge)
    proto.graph.node.insert(0, helper.make_node("Mul", ["input_0", "nudge"], ["input_0_nudged"]))
    item = next(p for p in proto.metadata_props if p.key == POINTS_KEY)
    item.value = item.value.replace('"input_0"', '"input_0_nudged"')
    onnx.save(proto, path)

    check = check_onnx(path, lin, plan, x)
    u = np.abs(x.numpy().astype(np.float64) / 0.25)
    on_tie = (u - np.floor(u)) == 0.5
    expected = int((on_tie & (np.floor(u) % 2 == 0)).sum())  # numpy's rint keeps these toward zero
    assert expected > 0
    for levels in (check.reference_levels, check.runtime_levels):
        assert levels.flips == expected and levels.misquantized == 0
        assert levels.flip_gap < 1e-5 and levels.forced_diff < RTOL
    assert not check.exact and check.matches, str(check)
    text = str(check)
    assert "matches, level for level" in text and f"{expected} of {x.numel()} on the neighbouring level" in text

    del proto.metadata_props[:]  # a file without its points: the flips cannot be told from errors
    onnx.save(proto, path)
    bare = check_onnx(path, lin, plan, x)
    assert bare.reference_levels is None and not bare.matches
    assert "records no activation points" in str(bare)


@pytest.mark.parametrize("part", ["input", "weight"])
def test_a_file_on_other_grids_does_not_match(part, tmp_path):
    torch.manual_seed(0)
    lin, x = nn.Linear(4, 3), torch.randn(64, 4) * 3
    plan = _linear_plan(lin)
    path = tmp_path / "lin.onnx"
    proto = export_onnx(lin, plan, path, x[:1])
    if part == "input":
        name = next(n.input[1] for n in proto.graph.node if n.op_type == "QuantizeLinear")
    else:
        name = next(n.input[1] for n in proto.graph.node
                    if n.op_type == "DequantizeLinear" and n.output[0] == "weight")
    init = next(i for i in proto.graph.initializer if i.name == name)
    init.CopyFrom(numpy_helper.from_array(numpy_helper.to_array(init) * np.float32(1.01), name))
    onnx.save(proto, path)
    check = check_onnx(path, lin, plan, x)
    assert not check.matches and "does NOT match" in str(check)
    levels = check.reference_levels
    if part == "input":
        assert levels.misquantized > 0
    else:
        assert levels.forced_diff > RTOL and levels.misquantized == 0


def test_a_file_traced_with_a_fixed_batch_size_is_explained(tmp_path):
    """A forward that reads len(x) fixes the example's batch size in the trace; the runtimes
    then refuse other batch sizes, and check_onnx says why and what to write instead."""

    class FixedBatch(TinyViT):
        def forward(self, img):
            p = self.patch(img).flatten(2).transpose(1, 2)
            x = torch.cat([self.cls.expand(len(img), -1, -1), p], dim=1) + self.pos
            return self.head(self.norm(self.encoder(x))[:, 0])

    torch.manual_seed(0)
    net, x = FixedBatch().eval(), _images(8)
    table = scan(net, x, bits=(8,), progress=False)
    plan = plan_budget(table, mean_bits=mean_bits_for(table, 8))
    path = tmp_path / "fixed.onnx"
    export_onnx(net, plan, path, x[:2])
    assert check_onnx(path, net, plan, x[:2]).matches  # its own batch size runs
    with pytest.raises(ValueError, match=r"batch of 8 samples.*len\(x\).*x\.shape\[0\]"):
        check_onnx(path, net, plan, x)
