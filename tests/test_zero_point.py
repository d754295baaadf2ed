"""The one zero-point rule and exact integer decoding of export_codes.

Outside checks: decoding is written here with plain integer arithmetic (affine quantization
r = S(q - Z), Jacob et al. 2018, as in GUIDE.md), not with the package's own decoder; the
reference is apply_plan's weights. torch.fake_quantize_per_tensor_affine (torch's own op)
checks the values of a grid that has an integer zero point.
"""

from __future__ import annotations

import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st
from torch import nn

from qwidgets.core.grid import ZP_TOLERANCE, UniformGrid, integer_zero_point
from qwidgets.core.rounding import quantize
from qwidgets.core.setting import LayerSetting
from qwidgets.planning.apply import apply_plan, export_codes
from qwidgets.planning.fields import grid_from_dict, grid_to_dict
from qwidgets.planning.plan import Plan, model_fingerprint


def _plan_for(layer, weight, inp=None):
    shape = tuple(layer.weight.shape)
    return Plan({"": LayerSetting(weight=weight, input=inp)}, {"": weight.bits},
                fingerprint=model_fingerprint(layer), weight_shapes={"": shape}, macs={"": 1})


def _decode(e, dtype):
    """Plain arithmetic written here: float64 (codes - Z) * S, or codes * S + offset without Z."""
    codes = e["codes"].to(torch.int64)
    shape = [1] * codes.dim()
    if e["axis"] is not None:
        shape[e["axis"]] = -1
    scale = e["scale"].reshape(shape if e["scale"].dim() else [])
    if e["zero_point"] is None:
        offset = e["offset"].reshape(shape if e["offset"].dim() else [])
        return codes.to(dtype) * scale.to(dtype) + offset.to(dtype)
    z = e["zero_point"].to(torch.int64).reshape(shape if e["zero_point"].dim() else [])
    return ((codes - z).to(torch.float64) * scale.to(torch.float64)).to(dtype)


def test_offset_just_off_an_integer_multiple_has_no_zero_point_and_decodes_exactly():
    # The case: offset 0.3 + 2e-5 on a step of 0.1 (was accepted as Z = -3 within 1e-4).
    torch.manual_seed(0)
    lin = nn.Linear(16, 8)
    g = UniformGrid(8, 0.1, offset=0.3 + 2e-5, signed=False)
    assert not g.has_zero_point()
    e = export_codes(lin, _plan_for(lin, g))[""]
    assert e["zero_point"] is None
    want = apply_plan(lin, _plan_for(lin, g)).weight.detach()
    assert torch.equal(_decode(e, torch.float32), want)
    # what firmware would run with the rounded zero point: a different model
    wrong = dict(e, zero_point=torch.tensor(-3, dtype=torch.int32))
    assert not torch.equal(_decode(wrong, torch.float32), want)


@pytest.mark.parametrize("offset", [0.3, -0.7, 0.0, 12.5])
def test_integer_multiples_decode_bit_for_bit_by_integer_arithmetic(offset):
    torch.manual_seed(1)
    lin = nn.Linear(32, 6)
    g = UniformGrid(8, 0.1 if offset != 12.5 else 0.5, offset=offset, signed=False)
    assert g.has_zero_point()
    e = export_codes(lin, _plan_for(lin, g))[""]
    want = apply_plan(lin, _plan_for(lin, g)).weight.detach()
    assert e["zero_point"].dtype == torch.int32
    assert torch.equal(_decode(e, torch.float32), want)


@settings(max_examples=60, deadline=None)
@given(bits=st.integers(2, 16), signed=st.booleans(), per_channel=st.booleans(),
       scale=st.floats(1e-4, 10.0), z=st.integers(-300, 300), nudge=st.sampled_from([0.0, 1e-9, 1e-6, 1e-3]),
       seed=st.integers(0, 2**16))
def test_export_decodes_to_apply_plan_weights_bit_for_bit(bits, signed, per_channel, scale, z, nudge, seed):
    gen = torch.Generator().manual_seed(seed)
    conv = nn.Conv1d(3, 4, 3)
    with torch.no_grad():
        conv.weight.copy_(torch.randn(conv.weight.shape, generator=gen) * scale * 2 ** (bits / 2))
    s = scale * (1 + torch.rand(4, generator=gen, dtype=torch.float64)).float() if per_channel else scale
    off = (-z * s) * (1 + nudge)
    g = UniformGrid(bits, s, off, signed=signed, axis=0 if per_channel else None)
    e = export_codes(conv, _plan_for(conv, g))[""]
    want = apply_plan(conv, _plan_for(conv, g)).weight.detach()
    assert torch.equal(_decode(e, torch.float32), want)
    assert (e["zero_point"] is None) == (not g.has_zero_point())


@settings(max_examples=200, deadline=None)
@given(scale=st.floats(1e-6, 1e3), z=st.integers(-40000, 40000), rel=st.floats(-1e-3, 1e-3))
def test_one_tolerance_decides(scale, z, rel):
    # the rule written here: |-offset/scale - Z| <= 4 float32 epsilons * max(1, |Z|)
    offset = -(z + rel * max(1, abs(z))) * scale
    ratio = -offset / scale
    expect = abs(ratio - round(ratio)) <= 4 * 2.0**-23 * max(1.0, abs(round(ratio)))
    g = UniformGrid(8, scale, offset)
    assert g.has_zero_point() == expect == (integer_zero_point(scale, offset) is not None)
    if expect:
        zr = round(ratio)
        assert g.zero_point == zr and g.offset == -zr * scale + 0.0  # the offset is derived from Z
        assert g.replace(bits=4).zero_point == zr  # copies keep the decision
    assert ZP_TOLERANCE == 4 * torch.finfo(torch.float32).eps


@settings(max_examples=60, deadline=None)
@given(scale=st.floats(1e-3, 1.0), z=st.integers(0, 255), nudge=st.sampled_from([0.0, 1e-7, 1e-5, 1e-3]))
def test_plan_file_round_trip_keeps_the_decision(scale, z, nudge):
    g = UniformGrid(8, scale, -z * scale * (1 + nudge), signed=False)
    d = grid_to_dict(g)
    back = grid_from_dict(d, "w", None)
    assert back.has_zero_point() == g.has_zero_point()
    assert d["zero_point"] == (g.zero_point if g.has_zero_point() else None)
    pc = UniformGrid(8, torch.full((3,), scale), torch.full((3,), -z * scale * (1 + nudge)), signed=False, axis=0)
    pd = grid_to_dict(pc)
    pb = grid_from_dict(pd, "w", 3)
    assert pb.has_zero_point() == pc.has_zero_point()


def test_values_of_a_grid_with_zero_point_match_torch_fake_quant():
    # torch.fake_quantize_per_tensor_affine computes (clamp(round(x/S + Z)) - Z) * S in float32
    x = torch.linspace(-3, 5, 1001)
    g = UniformGrid(8, 0.0312, offset=-17 * 0.0312, signed=False)
    ref = torch.fake_quantize_per_tensor_affine(x, 0.0312, 17, 0, 255)
    assert g.zero_point == 17
    assert torch.equal(quantize(x, g), ref)
