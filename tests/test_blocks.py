"""Block grids (one scale / offset per block of g values along the blocked axis).

Outside checks: every per-block result is compared with a loop over the blocks written here
(each block quantized or fitted on its own with a per-tensor grid), and integer codes with
their block scales and zero points are run through ``DequantizeLinear`` with ``block_size`` in
the ONNX reference evaluator (ONNX opset 21 blocked quantization, GUIDE.md).
"""

from __future__ import annotations

import pickle

import numpy as np
import onnx
import pytest
import torch
from onnx import TensorProto, helper
from onnx.reference import ReferenceEvaluator

from qwidgets import (
    DeviceRules,
    UniformGrid,
    bin_probabilities,
    error_stats,
    fit_range,
    from_codes,
    grid_usage,
    quantize,
    relaxed_quantize,
    to_codes,
)
from qwidgets.core.device_rules import is_power_of_two, power_of_two_fit

# (shape, blocked axis, g): a Linear weight with a short last block, a conv weight [O, I, kh, kw]
# blocked along its input axis, a weight stored [in, out] blocked along axis 0, an exact fit
CASES = [((5, 11), 1, 4), ((3, 10, 2, 2), 1, 4), ((9, 4), 0, 3), ((4, 16), 1, 8)]


def _blocks(shape, axis, g):
    """(index of the block in the scale tensor, index of its values in x), by a plain loop."""
    n = shape[axis]
    scale_shape = list(shape)
    scale_shape[axis] = -(-n // g)
    for idx in np.ndindex(*scale_shape):
        sl = list(idx)
        sl[axis] = slice(idx[axis] * g, min(n, (idx[axis] + 1) * g))
        yield idx, tuple(sl)


def _random_grid(shape, axis, g, bits=4, asym=True, seed=0):
    gen = torch.Generator().manual_seed(seed)
    sshape = list(shape)
    sshape[axis] = -(-shape[axis] // g)
    scale = torch.rand(sshape, generator=gen) * 0.3 + 0.05
    z = torch.randint(-3, 4, sshape, generator=gen).float() if asym else torch.zeros(sshape)
    return UniformGrid(bits, scale, -z * scale, axis=axis, block_size=g)


def _block_grid(grid, idx):
    return UniformGrid(grid.bits, float(grid.scale[idx]), float(grid.offset_tensor()[idx]),
                       signed=grid.signed)


# ---------------------------------------------------------------------------- layout
def test_layout_is_checked_with_clear_errors():
    with pytest.raises(ValueError, match="needs axis"):
        UniformGrid(4, torch.ones(2, 3), block_size=4)
    with pytest.raises(ValueError, match="full rank"):
        UniformGrid(4, 0.1, axis=1, block_size=4)
    with pytest.raises(ValueError, match="offset has shape"):
        UniformGrid(4, torch.ones(2, 3), torch.zeros(3), axis=1, block_size=4)
    with pytest.raises(ValueError, match="block_size must be"):
        UniformGrid(4, torch.ones(2, 3), axis=1, block_size=0)
    with pytest.raises(TypeError, match="block_size must be"):
        UniformGrid(4, torch.ones(2, 3), axis=1, block_size=2.0)
    g = UniformGrid(4, torch.ones(2, 3), axis=1, block_size=4)
    # ONNX layout: the blocked axis of length 9 in blocks of 4 needs ceil(9 / 4) = 3 scales
    quantize(torch.zeros(2, 9), g)
    with pytest.raises(ValueError, match=r"needs \(2, 2\)"):
        quantize(torch.zeros(2, 8), g)
    with pytest.raises(ValueError, match="needs axis"):
        fit_range(torch.zeros(2, 8), 4, block_size=4)


def test_grid_fields_survive_replace_pickle_and_repr():
    g = _random_grid((5, 11), 1, 4)
    assert g.blocked and not g.per_channel and g.granularity == 4 and g.n_channels == 15
    h = pickle.loads(pickle.dumps(g))
    assert h.block_size == 4 and torch.equal(h.scale, g.scale) and torch.equal(h.zero_point, g.zero_point)
    assert g.replace(bits=3).block_size == 4
    assert "block_size=4" in repr(g)
    assert g.levels.shape == (15, 16) and g.clip_range[0].shape == (5, 3)
    assert UniformGrid(4, torch.ones(3), axis=0).granularity == "channel"
    assert UniformGrid(4, 0.1).granularity == "tensor"


# ---------------------------------------------------------------------------- hard quantization
@pytest.mark.parametrize("shape,axis,g", CASES)
@pytest.mark.parametrize("asym", [False, True])
def test_quantize_and_codes_match_a_loop_over_blocks(shape, axis, g, asym):
    x = torch.randn(shape) * 0.8
    grid = _random_grid(shape, axis, g, asym=asym)
    q, codes = quantize(x, grid), to_codes(x, grid)
    want_q, want_c = torch.empty_like(x), torch.empty(shape, dtype=torch.int64)
    for idx, sl in _blocks(shape, axis, g):
        bg = _block_grid(grid, idx)
        want_q[sl], want_c[sl] = quantize(x[sl], bg), to_codes(x[sl], bg)
    assert torch.equal(q, want_q) and torch.equal(codes, want_c)  # the same float32 arithmetic
    assert torch.equal(from_codes(codes, grid), q)
    assert error_stats(x, q) == error_stats(x, want_q)


def test_quantize_keeps_the_gradient_of_each_block_scale():
    x = torch.randn(4, 10)
    base = _random_grid((4, 10), 1, 4, asym=False)
    s = base.scale.clone().requires_grad_(True)
    grid = UniformGrid(4, s, axis=1, block_size=4)
    # straight-through of code_values: d q / d s = k per value, summed over the block
    quantize(x, grid).sum().backward()
    codes = to_codes(x, base).float()
    want = torch.stack([codes[:, 0:4].sum(1), codes[:, 4:8].sum(1), codes[:, 8:10].sum(1)], 1)
    assert torch.equal(s.grad, want)


@pytest.mark.parametrize("shape,axis,g", CASES[:2])
def test_grid_usage_matches_a_loop_over_blocks(shape, axis, g):
    x = torch.randn(shape) * 2.0  # wide enough that some values clip
    grid = _random_grid(shape, axis, g)
    u = grid_usage(x, grid)
    lo = hi = used = n_bins = 0
    for idx, sl in _blocks(shape, axis, g):
        b = grid_usage(x[sl], _block_grid(grid, idx))
        n = x[sl].numel()
        lo, hi = lo + round(b.clipped_low * n), hi + round(b.clipped_high * n)
        used, n_bins = used + b.bins_used, n_bins + b.n_bins
    assert (round(u.clipped_low * x.numel()), round(u.clipped_high * x.numel())) == (lo, hi)
    assert (u.bins_used, u.n_bins) == (used, n_bins) and lo + hi > 0


# ---------------------------------------------------------------------------- relaxed
def test_relaxed_quantizer_per_block_matches_a_loop_and_learns_each_scale():
    x = torch.randn(3, 10)
    base = _random_grid((3, 10), 1, 4)
    probs, codes = bin_probabilities(x, base, noise=0.05)
    for idx, sl in _blocks((3, 10), 1, 4):
        p, k = bin_probabilities(x[sl], _block_grid(base, idx), noise=0.05)
        # the same float32 arithmetic per value: float32 rounding only (exp, softplus)
        torch.testing.assert_close(probs[sl], p, rtol=1e-6, atol=1e-7)
        assert torch.equal(codes, k)
    s = base.scale.clone().requires_grad_(True)
    grid = UniformGrid(4, s, base.offset_tensor().clone(), axis=1, block_size=4)
    relaxed_quantize(x, grid, 0.05, 0.5, generator=torch.Generator().manual_seed(0)).square().sum().backward()
    assert s.grad.shape == (3, 3) and bool((s.grad != 0).all())


# ---------------------------------------------------------------------------- fitting
@pytest.mark.parametrize("shape,axis,g", CASES)
@pytest.mark.parametrize("method", ["minmax", "percentile", "mse"])
@pytest.mark.parametrize("symmetric", [True, False])
def test_fit_range_per_block_matches_fitting_each_block_alone(shape, axis, g, method, symmetric):
    x = torch.randn(shape)
    x[(0,) * len(shape)] = 6.0  # one outlier: its block alone gets a wide grid
    grid = fit_range(x, 3, method, axis=axis, block_size=g, symmetric=symmetric, percentile=90.0)
    assert grid.block_size == g and grid.scale.shape == _random_grid(shape, axis, g).scale.shape
    assert grid.has_zero_point()
    # stored at 16 bits (the default): every scale is a float16 value
    assert torch.equal(grid.scale.half().float(), grid.scale)
    got_s, got_z, want_s, want_z = [], [], [], []
    for idx, sl in _blocks(shape, axis, g):
        alone = fit_range(x[sl], 3, method, symmetric=symmetric, percentile=90.0, signed=True)
        want_s.append(float(torch.tensor(alone.scale).half()))  # the block's scale as float16
        want_z.append(alone.zero_point)
        got_s.append(float(grid.scale[idx]))
        got_z.append(int(grid.zero_point[idx]))
    got_s, want_s = torch.tensor(got_s), torch.tensor(want_s)
    if method == "mse":  # batched vs one-row searches: float32 rounding may move a float16 step
        torch.testing.assert_close(got_s, want_s, rtol=2**-10, atol=0)
        assert float((got_s == want_s).float().mean()) >= 0.9
    else:
        assert torch.equal(got_s, want_s)
    assert got_z == want_z


def test_fit_range_block_scales_at_32_bits_and_power_of_two_rules():
    x = torch.randn(6, 20)
    exact = fit_range(x, 4, "minmax", axis=1, block_size=8, rules=DeviceRules(scale_bits=32))
    for idx, sl in _blocks((6, 20), 1, 8):
        assert float(exact.scale[idx]) == float(torch.tensor(fit_range(x[sl], 4, "minmax", signed=True).scale))
    with pytest.raises(ValueError, match="scale_bits must be one of"):
        DeviceRules(scale_bits=8)
    rules = DeviceRules(pow2_scales=True, symmetric_weights=True)
    g = fit_range(x, 4, "mse", axis=1, block_size=8, rules=rules)
    assert is_power_of_two(g.scale) and rules.obeys(g, "weight")
    for idx, sl in _blocks((6, 20), 1, 8):  # the least-error power of two, block by block
        alone = power_of_two_fit(x[sl], _block_grid(fit_range(x, 4, "mse", axis=1, block_size=8), idx), "mse")
        assert float(g.scale[idx]) == alone.scale
    with pytest.raises(ValueError, match="per_channel_weights=False"):
        fit_range(x, 4, axis=1, block_size=8, rules=DeviceRules(per_channel_weights=False))


# ---------------------------------------------------------------------------- ONNX
def _dequantize_onnx(codes: torch.Tensor, grid: UniformGrid, elem_type) -> np.ndarray:
    """``DequantizeLinear(codes, scale, zero_point, axis, block_size)`` in the reference evaluator."""
    node = helper.make_node("DequantizeLinear", ["q", "s", "z"], ["y"], axis=grid.axis,
                            block_size=grid.block_size)
    z = grid.zero_point.numpy()
    inits = [helper.make_tensor("q", elem_type, codes.shape, codes.reshape(-1).tolist()),
             helper.make_tensor("z", elem_type, z.shape, z.reshape(-1).tolist()),
             helper.make_tensor("s", TensorProto.FLOAT, grid.scale.shape, grid.scale.reshape(-1).tolist())]
    graph = helper.make_graph([node], "dq", [], [helper.make_tensor_value_info("y", TensorProto.FLOAT, list(codes.shape))],
                              initializer=inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 21)])
    onnx.checker.check_model(model)
    return ReferenceEvaluator(model).run(None, {})[0]


@pytest.mark.parametrize("shape,axis,g", CASES)
@pytest.mark.parametrize("bits,elem", [(4, TensorProto.INT4), (8, TensorProto.INT8)])
def test_codes_dequantize_exactly_in_the_onnx_reference_evaluator(shape, axis, g, bits, elem):
    x = torch.randn(shape)
    grid = fit_range(x, bits, "mse", axis=axis, block_size=g, symmetric=False)
    codes = to_codes(x, grid)
    got = _dequantize_onnx(codes, grid, elem)
    # (q - z) * s in float32 on both sides: bit for bit
    np.testing.assert_array_equal(got, quantize(x, grid).numpy())
