"""quantize / to_codes / from_codes against outside references, classic results, properties, bad input."""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

from qwidgets.core.grid import UniformGrid
from qwidgets.core.metrics import error_stats
from qwidgets.core.rounding import from_codes, quantize, to_codes

F32_EPS = float(torch.finfo(torch.float32).eps)


def f32(v: float) -> float:
    """The float32 number nearest ``v``, as a Python float (so both sides use the same scale)."""
    return float(torch.tensor(v, dtype=torch.float32))


def signed_range(bits: int, signed: bool) -> tuple[int, int]:
    return (-(2 ** (bits - 1)), 2 ** (bits - 1) - 1) if signed else (0, 2**bits - 1)


def make_input(scale: float, zp: int, qmin: int, qmax: int, n: int = 20000, seed: int = 0):
    """float32 values spread over the grid and beyond it, plus exact .5 ties and the clip ends."""
    gen = torch.Generator().manual_seed(seed)
    lo, hi = (qmin - zp) * scale, (qmax - zp) * scale
    width = hi - lo + scale
    spread = lo - 0.25 * width + 1.5 * width * torch.rand(n, generator=gen)
    k = torch.arange(qmin - 2, qmax + 2, dtype=torch.float64)
    ties = ((k + 0.5 - zp) * scale).float()  # x/scale lands on (or next to) a .5 tie
    ends = torch.tensor([lo, hi, lo - scale / 2, hi + scale / 2, -1e6, 1e6], dtype=torch.float32)
    return torch.cat([spread.float(), ties, ends])


def near_tie(x: torch.Tensor, scale, zp) -> torch.Tensor:
    """Elements whose x/scale (+Z) lies within float32 rounding of a .5 tie.

    The references compute x * (1/scale) + Z or x / scale in float32, we compute
    (x - offset) / scale: on these elements the rounded quotient may fall on either side.
    """
    xs = x.double() / torch.as_tensor(scale, dtype=torch.float64)
    z = torch.as_tensor(zp, dtype=torch.float64)
    t = xs + z
    dist = (t - torch.floor(t) - 0.5).abs()
    # float32 rounding of the intermediates (x/scale, the offset Z*scale) sets the band
    return dist <= 8 * F32_EPS * (xs.abs() + z.abs() + 1.0)


def compare_with_ties(ours, ref, ties, step):
    """All differences lie on ties and are one grid step; return (n_ties, n_differences)."""
    diff = ours != ref
    off_tie = diff & ~ties
    assert not bool(off_tie.any()), (
        f"{int(off_tie.sum())} elements differ away from .5 ties: "
        f"{ours[off_tie][:5].tolist()} vs {ref[off_tie][:5].tolist()}"
    )
    step = torch.as_tensor(step, dtype=torch.float64).expand(ours.shape)
    gap = (ours[diff].double() - ref[diff].double()).abs()
    mag = torch.maximum(ours[diff].abs(), ref[diff].abs()).double()
    assert bool(((gap - step[diff]).abs() <= 4 * F32_EPS * mag + 1e-12).all())  # one step apart
    return int(ties.sum()), int(diff.sum())


# ------------------------------------------------------------------ outside reference: torch's own ops
@pytest.mark.parametrize("signed", [True, False])
@pytest.mark.parametrize("bits", range(2, 9))
def test_per_tensor_equals_torch_fake_quantize(bits, signed):
    """Reference: torch.fake_quantize_per_tensor_affine (grid offset = -Z * scale)."""
    qmin, qmax = signed_range(bits, signed)
    for scale, zp in ((f32(0.0371), 0), (f32(0.113), qmin + (qmax - qmin) // 3), (f32(2.5), qmax)):
        x = make_input(scale, zp, qmin, qmax, seed=bits)
        grid = UniformGrid(bits, scale, offset=-zp * scale, signed=signed)
        ours = quantize(x, grid)
        ref = torch.fake_quantize_per_tensor_affine(x, scale, zp, qmin, qmax)
        n_ties, n_diff = compare_with_ties(ours, ref, near_tie(x, scale, zp), scale)
        assert n_ties > 0  # the input holds ties, so the exclusion is exercised
        assert n_diff <= n_ties


@pytest.mark.parametrize("signed", [True, False])
@pytest.mark.parametrize("bits", range(2, 9))
def test_per_channel_equals_torch_fake_quantize(bits, signed):
    """Reference: torch.fake_quantize_per_channel_affine, channels on axis 1 of a 3-D tensor."""
    qmin, qmax = signed_range(bits, signed)
    gen = torch.Generator().manual_seed(100 + bits)
    c = 6
    scale = (0.01 + torch.rand(c, generator=gen)).float()
    zp = torch.randint(qmin, qmax + 1, (c,), generator=gen, dtype=torch.int32)
    lo = ((qmin - zp) * scale).reshape(1, c, 1)
    hi = ((qmax - zp) * scale).reshape(1, c, 1)
    u = torch.rand(40, c, 50, generator=gen) * 1.6 - 0.3
    x = (lo + u * (hi - lo)).float()
    x[0, :, :10] = ((torch.arange(10).reshape(1, 10) + qmin + 0.5 - zp.reshape(c, 1)) * scale.reshape(c, 1))
    grid = UniformGrid(bits, scale, offset=-zp.float() * scale, signed=signed, axis=1)
    ours = quantize(x, grid)
    ref = torch.fake_quantize_per_channel_affine(x, scale, zp, 1, qmin, qmax)
    ties = near_tie(x, scale.reshape(1, c, 1), zp.reshape(1, c, 1))
    n_ties, n_diff = compare_with_ties(ours, ref, ties, scale.reshape(1, c, 1).expand_as(x))
    assert n_ties > 0 and n_diff <= n_ties
    # the last axis as the channel axis, and a negative axis, give the same result
    xt = x.movedim(1, -1)
    assert torch.equal(quantize(xt, grid.replace(axis=-1)), ours.movedim(1, -1))


# ------------------------------------------------------------------ outside reference: ONNX standard
def onnx_qdq(zp_type, scale, zp, x: np.ndarray, axis: int | None = None) -> np.ndarray:
    """QuantizeLinear -> DequantizeLinear (opset 21) through onnx's reference evaluator."""
    import onnx
    from onnx import TensorProto, helper
    from onnx.reference import ReferenceEvaluator

    sc = np.atleast_1d(np.asarray(scale, dtype=np.float32))
    dims = [] if axis is None else [len(sc)]
    inits = [
        helper.make_tensor("s", TensorProto.FLOAT, dims, sc.tolist()),
        helper.make_tensor("z", zp_type, dims, np.atleast_1d(zp).astype(int).tolist()),
    ]
    kw = {} if axis is None else {"axis": axis}
    nodes = [
        helper.make_node("QuantizeLinear", ["x", "s", "z"], ["q"], **kw),
        helper.make_node("DequantizeLinear", ["q", "s", "z"], ["y"], **kw),
    ]
    graph = helper.make_graph(
        nodes, "qdq",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, list(x.shape))],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, list(x.shape))],
        initializer=inits,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 21)])
    onnx.checker.check_model(model)
    return ReferenceEvaluator(model).run(None, {"x": x})[0]


ONNX_TYPES = [  # (onnx type name, bits, signed)
    ("INT8", 8, True), ("UINT8", 8, False), ("INT4", 4, True), ("UINT4", 4, False),
]


@pytest.mark.parametrize("type_name,bits,signed", ONNX_TYPES)
def test_equals_onnx_quantize_dequantize_linear(type_name, bits, signed):
    """Reference: ONNX QuantizeLinear/DequantizeLinear, opset 21, onnx.reference evaluator."""
    from onnx import TensorProto

    zp_type = getattr(TensorProto, type_name)
    qmin, qmax = signed_range(bits, signed)
    for scale, zp in ((f32(0.05), 0), (f32(0.31), qmin + 3)):
        x = make_input(scale, zp, qmin, qmax, n=5000, seed=bits)
        ref = torch.from_numpy(onnx_qdq(zp_type, scale, zp, x.numpy()))
        ours = quantize(x, UniformGrid(bits, scale, offset=-zp * scale, signed=signed))
        n_ties, n_diff = compare_with_ties(ours, ref, near_tie(x, scale, zp), scale)
        assert n_ties > 0 and n_diff <= n_ties


@pytest.mark.parametrize("type_name,bits,signed", ONNX_TYPES)
def test_per_axis_equals_onnx(type_name, bits, signed):
    """Reference: ONNX per-axis QuantizeLinear/DequantizeLinear (axis=0), opset 21."""
    from onnx import TensorProto

    qmin, qmax = signed_range(bits, signed)
    gen = torch.Generator().manual_seed(bits)
    scale = (0.02 + torch.rand(4, generator=gen)).float()
    zp = torch.tensor([0, qmin, qmax, (qmin + qmax) // 2])
    x = (torch.randn(4, 300, generator=gen) * scale.reshape(4, 1) * 2 ** (bits - 1)).float()
    ref = torch.from_numpy(onnx_qdq(getattr(TensorProto, type_name), scale.numpy(), zp.numpy(), x.numpy(), axis=0))
    grid = UniformGrid(bits, scale, offset=-zp.float() * scale, signed=signed, axis=0)
    ours = quantize(x, grid)
    ties = near_tie(x, scale.reshape(4, 1), zp.reshape(4, 1))
    compare_with_ties(ours, ref, ties, scale.reshape(4, 1).expand_as(x))


# ------------------------------------------------------------------ classic results
def test_bennett_noise_variance_is_step_squared_over_12():
    """Bennett (1948), Bell System Technical Journal: fine grid, smooth input inside the range,
    noise variance -> step**2 / 12 (within 2%)."""
    gen = torch.Generator().manual_seed(0)
    grid = UniformGrid(10, 0.01)  # clip range [-5.12, 5.11]
    x = torch.randn(1_000_000, generator=gen, dtype=torch.float64)  # Gaussian, sigma = 100 steps
    err = quantize(x, grid) - x
    assert abs(float(err.var()) / (0.01**2 / 12) - 1) < 0.02
    assert abs(float(err.mean())) < 0.01 * 0.01  # no bias
    # a smooth deterministic input (a slow ramp with a sine on top) gives the same
    t = torch.linspace(0, 1, 500_001, dtype=torch.float64)
    y = 3.0 * t - 1.5 + 0.7 * torch.sin(17.3 * t)
    assert abs(float((quantize(y, grid) - y).var()) / (0.01**2 / 12) - 1) < 0.02


@pytest.mark.parametrize("bits", range(4, 13))
def test_full_scale_sine_sqnr_6_02_b_plus_1_76(bits):
    """Textbook formula for ideal converters: full-scale sine SQNR = 6.02 b + 1.76 dB (0.1 dB).

    Convention (stated because a mid-tread signed grid is asymmetric): the grid's unclipped
    input interval is [(qmin - 1/2) step, (qmax + 1/2) step], 2**b steps wide; that is the
    converter's full-scale range FSR, so a full-scale sine has amplitude FSR / 2 and power
    (FSR/2)**2 / 2. The formula divides that by the noise of an ideal quantizer, step**2 / 12,
    which holds when the input's position within a step is spread evenly (Bennett). We drive
    the grid with a sine that fills its clip range (amplitude (qmax - qmin)/2 steps, centred
    on it) and shift it by DC levels spread evenly over one step: the input then covers
    exactly the FSR, nothing clips, and the measured noise is that of this quantizer.
    """
    step = 2.0 ** (1 - bits)
    grid = UniformGrid(bits, step)
    lo, hi = grid.clip_range
    centre, amp = (lo + hi) / 2, (hi - lo) / 2
    phase = 2 * math.pi * (torch.arange(4096, dtype=torch.float64) + 0.5) / 4096
    shifts = (torch.arange(64, dtype=torch.float64) + 0.5) / 64 - 0.5
    x = centre + shifts.reshape(-1, 1) * step + amp * torch.sin(phase)
    q = quantize(x, grid)
    assert float(x.min()) >= lo - step / 2 and float(x.max()) <= hi + step / 2  # never clipped
    noise = float(((q - x) ** 2).mean())
    fsr = (grid.qmax - grid.qmin + 1) * step
    sqnr = 10 * math.log10((fsr / 2) ** 2 / 2 / noise)
    assert abs(sqnr - (6.02 * bits + 1.76)) <= 0.1
    # error_stats gives the same SQNR for the sine it measured (its own power)
    stats = error_stats(x - centre, q - centre)
    assert stats.sqnr_db == pytest.approx(10 * math.log10(float(((x - centre) ** 2).mean()) / noise), abs=1e-9)


@pytest.mark.parametrize("bits", range(5, 13))
def test_single_sine_filling_the_clip_range_approaches_the_formula(bits):
    """Textbook formula again, for one pure sine whose peaks sit on the outermost grid values
    (no DC spreading). Its noise deviates from step**2/12 at few levels (arcsine density is not
    smooth at the scale of a step: 0.17 dB at b = 4), within 0.1 dB from b = 5 on."""
    step = 1.0
    grid = UniformGrid(bits, step)
    lo, hi = grid.clip_range
    amp = (hi - lo) / 2
    x = (lo + hi) / 2 + amp * torch.sin(2 * math.pi * (torch.arange(1 << 18, dtype=torch.float64) + 0.5) / (1 << 18))
    noise = float(((quantize(x, grid) - x) ** 2).mean())
    assert abs(10 * math.log10(amp**2 / 2 / noise) - (6.02 * bits + 1.76)) <= 0.1


# ------------------------------------------------------------------ codes
def test_codes_round_trip_and_dtype():
    grid = UniformGrid(5, 0.2, offset=0.1, signed=False)
    x = torch.linspace(-1, 8, 1001)
    k = to_codes(x, grid)
    assert k.dtype == torch.int64
    assert int(k.min()) == 0 and int(k.max()) == 31
    assert torch.equal(from_codes(k, grid), quantize(x, grid))
    big = torch.randn(300_000) * 3  # the chunked path
    assert torch.equal(to_codes(big, grid)[:1000], to_codes(big[:1000], grid))
    assert from_codes(k, grid, dtype=torch.float64).dtype == torch.float64


def test_from_codes_bad_input():
    grid = UniformGrid(3, 1.0)
    with pytest.raises(TypeError, match="codes"):
        from_codes(torch.tensor([1.0]), grid)
    with pytest.raises(TypeError, match="codes"):
        from_codes([1, 2], grid)
    with pytest.raises(ValueError, match=r"codes must lie in \[-4, 3\]"):
        from_codes(torch.tensor([0, 4]), grid)


# ------------------------------------------------------------------ properties (hypothesis)
@st.composite
def grids(draw, max_bits=16):
    bits = draw(st.integers(1, max_bits))
    signed = draw(st.booleans())
    scale = draw(st.floats(1e-3, 10.0))
    qmin, qmax = signed_range(bits, signed)
    if draw(st.booleans()):
        offset = -draw(st.integers(qmin, qmax)) * scale  # an integer zero point
    else:
        offset = draw(st.floats(-5 * scale, 5 * scale))  # off the lattice
    return UniformGrid(bits, scale, offset=offset, signed=signed)


def values_for(grid: UniformGrid, draw) -> torch.Tensor:
    lo, hi = grid.clip_range
    span = hi - lo + grid.scale
    vals = draw(st.lists(st.floats(lo - span, hi + span), min_size=1, max_size=64))
    return torch.tensor(vals, dtype=torch.float32)


@settings(max_examples=150, deadline=None)
@given(st.data())
def test_quantize_properties(data):
    """common practice: outputs on the grid, idempotent, monotone, error <= step/2, saturation."""
    grid = data.draw(grids())
    x = values_for(grid, data.draw)
    q = quantize(x, grid)
    levels = grid.levels
    k = to_codes(x, grid)
    assert q.dtype == torch.float32
    assert torch.equal(q, levels[k - grid.qmin])  # bitwise members of grid.levels
    assert torch.equal(quantize(q, grid), q)  # idempotent
    order = torch.argsort(x)
    assert bool((q[order].diff() >= 0).all())  # monotone
    lo, hi = grid.clip_range
    lo32, hi32 = float(levels[0]), float(levels[-1])
    inside = (x >= lo) & (x <= hi)
    slack = 4 * F32_EPS * max(abs(lo), abs(hi), grid.scale)
    assert bool(((x - q).abs()[inside] <= grid.scale / 2 + slack).all())
    assert bool((q[x < lo - grid.scale] == lo32).all())  # saturation at the ends
    assert bool((q[x > hi + grid.scale] == hi32).all())


@settings(max_examples=60, deadline=None)
@given(st.data())
def test_per_channel_matches_per_tensor_on_each_channel(data):
    bits = data.draw(st.integers(1, 8))
    scales = data.draw(st.lists(st.floats(1e-2, 3.0), min_size=1, max_size=5))
    c = len(scales)
    offs = [data.draw(st.floats(-2.0, 2.0)) for _ in range(c)]
    x = torch.tensor(data.draw(st.lists(st.floats(-50, 50), min_size=3 * c, max_size=3 * c))).reshape(3, c)
    grid = UniformGrid(bits, torch.tensor(scales), offset=torch.tensor(offs), axis=1)
    q = quantize(x, grid)
    for j in range(c):
        gj = UniformGrid(bits, float(torch.tensor(scales[j])), offset=float(torch.tensor(offs[j])))
        assert torch.equal(q[:, j], quantize(x[:, j].contiguous(), gj))
        assert torch.equal(q[:, j], grid.levels[j][to_codes(x, grid)[:, j] - grid.qmin])


def test_large_per_channel_and_strided_inputs_use_the_same_arithmetic():
    """The chunked path (large tensors) agrees with the small path, also on non-contiguous input."""
    gen = torch.Generator().manual_seed(3)
    x = torch.randn(512, 700, generator=gen)
    grid = UniformGrid(6, 0.07, offset=0.01)
    ref = torch.cat([quantize(row, grid).unsqueeze(0) for row in x])
    assert torch.equal(quantize(x, grid), ref)
    assert torch.equal(quantize(x.t(), grid), ref.t())  # strided view
    assert torch.equal(quantize(x[:, ::2], grid), ref[:, ::2])
    pc = UniformGrid(6, 0.07, offset=torch.linspace(-0.1, 0.1, 700), axis=1)  # per-channel offset only
    small = torch.cat([quantize(x[i : i + 1], pc) for i in range(0, 512)])
    assert torch.equal(quantize(x, pc), small)
    pc0 = UniformGrid(6, torch.linspace(0.01, 0.1, 700), axis=0)
    assert torch.equal(quantize(x.t(), pc0), quantize(x.t().contiguous(), pc0))


def test_gradients_are_finite_and_flow_to_scale_and_offset():
    x = torch.randn(100, requires_grad=True)
    s = torch.tensor(0.1, requires_grad=True)
    o = torch.tensor(-0.2, requires_grad=True)
    q = quantize(x, UniformGrid(4, s, offset=o))
    q.sum().backward()
    for t in (x, s, o):
        assert t.grad is not None and bool(torch.isfinite(t.grad).all())
    # value equals the no-grad path
    assert torch.equal(q.detach(), quantize(x.detach(), UniformGrid(4, 0.1, offset=-0.2)))
    # d q / d offset = 1 for every element; d q / d scale = k
    assert float(o.grad) == 100.0
    k = to_codes(x.detach(), UniformGrid(4, 0.1, offset=-0.2)).float()
    assert float(s.grad) == pytest.approx(float(k.sum()))


# ------------------------------------------------------------------ bad input / dtypes
@pytest.mark.parametrize("fn", [quantize, to_codes])
def test_non_finite_input_is_refused_with_a_count(fn):
    x = torch.tensor([0.0, float("nan"), float("inf"), -float("inf"), float("nan"), 1.0])
    with pytest.raises(ValueError, match=r"x holds 2 NaN and 2 inf value\(s\) out of 6"):
        fn(x, UniformGrid(4, 0.1))


def test_large_finite_values_are_not_mistaken_for_inf():
    x = torch.full((10,), 3e38)  # the sum overflows, the values are finite
    grid = UniformGrid(4, 0.1)
    assert torch.equal(quantize(x, grid), grid.levels[-1].expand(10))


def test_integer_input_is_cast_to_float32():
    """Documented behaviour (qwidgets.core.checks.as_input): integer tensors are cast to float32."""
    x = torch.tensor([-7, 0, 3, 100], dtype=torch.int32)
    q = quantize(x, UniformGrid(4, 2.0))
    assert q.dtype == torch.float32
    assert q.tolist() == [-8.0, 0.0, 4.0, 14.0]
    assert to_codes(x, UniformGrid(4, 2.0)).tolist() == [-4, 0, 2, 7]


@pytest.mark.parametrize("dtype", [torch.float16, torch.bfloat16])
def test_low_precision_is_computed_in_float32_and_returned_in_its_dtype(dtype):
    x = torch.linspace(-3, 3, 257).to(dtype)
    grid = UniformGrid(6, 0.1)
    q = quantize(x, grid)
    assert q.dtype == dtype
    assert torch.equal(q, quantize(x.float(), grid).to(dtype))


def test_float64_stays_float64():
    x = torch.linspace(-1, 1, 11, dtype=torch.float64)
    assert quantize(x, UniformGrid(3, 0.25)).dtype == torch.float64


@pytest.mark.parametrize(
    "bad,match",
    [
        ("not a tensor", "x must be a torch.Tensor"),
        (torch.tensor([True, False]), "x must hold real numbers"),
        (torch.tensor([1 + 2j]), "x must hold real numbers"),
    ],
)
def test_bad_x_type(bad, match):
    with pytest.raises(TypeError, match=match):
        quantize(bad, UniformGrid(4, 0.1))


def test_bad_grid_argument():
    with pytest.raises(TypeError, match="grid must be a UniformGrid"):
        quantize(torch.zeros(3), 0.1)


def test_axis_errors_name_the_axis():
    grid = UniformGrid(4, torch.tensor([0.1, 0.2, 0.3]), axis=2)
    with pytest.raises(ValueError, match=r"axis=2 is out of range for a tensor with 2 dimension"):
        quantize(torch.zeros(3, 3), grid)
    with pytest.raises(ValueError, match=r"3 per-channel values but x.shape\[0\] = 4"):
        quantize(torch.zeros(4, 3), grid.replace(axis=0))
    with pytest.raises(ValueError, match="scalar"):
        quantize(torch.tensor(1.0), grid.replace(axis=0))
    with pytest.raises(ValueError, match="out of range"):
        to_codes(torch.zeros(3), grid.replace(axis=-2))


def test_inputs_are_never_modified():
    x = torch.randn(200_000)  # chunked path
    s = torch.tensor([0.1, 0.2])
    o = torch.tensor([0.0, 0.05])
    keep = [t.clone() for t in (x, s, o)]
    quantize(x, UniformGrid(4, 0.1))
    to_codes(x, UniformGrid(4, 0.1))
    quantize(x.reshape(-1, 2), UniformGrid(4, s, offset=o, axis=1))
    codes = torch.tensor([1, -2])
    from_codes(codes, UniformGrid(4, s, offset=o, axis=0))
    for a, b in zip((x, s, o), keep, strict=True):
        assert torch.equal(a, b)
    assert codes.tolist() == [1, -2]
