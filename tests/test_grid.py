"""UniformGrid: integer range, levels, zero point, copies, immutability and argument checks."""

from __future__ import annotations

import math

import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

from qwidgets.core.grid import UniformGrid


# ------------------------------------------------------------------ integer range (affine
# integer quantization, r = S(q - Z): Jacob et al. 2018; ranges as in the contract)
@pytest.mark.parametrize(
    "bits,signed,qmin,qmax",
    [(1, True, -1, 0), (2, True, -2, 1), (4, True, -8, 7), (8, True, -128, 127), (8, False, 0, 255),
     (1, False, 0, 1), (16, True, -32768, 32767), (16, False, 0, 65535)],
)
def test_integer_range(bits, signed, qmin, qmax):
    g = UniformGrid(bits, 0.5, signed=signed)
    assert (g.qmin, g.qmax, g.n_levels) == (qmin, qmax, qmax - qmin + 1)
    lv = g.levels
    assert lv.shape == (g.n_levels,)
    assert lv[0].item() == 0.5 * qmin and lv[-1].item() == 0.5 * qmax
    assert bool((lv.diff() > 0).all())
    assert g.clip_range == (0.5 * qmin, 0.5 * qmax)


def test_levels_with_offset_worked_example():
    g = UniformGrid(2, 0.25, offset=0.1, signed=False)  # 0.1, 0.35, 0.6, 0.85
    assert g.levels.tolist() == pytest.approx([0.1, 0.35, 0.6, 0.85])
    lo, hi = g.clip_range
    assert (lo, hi) == pytest.approx((0.1, 0.85))


def test_per_channel_levels_have_one_row_per_channel():
    s = torch.tensor([0.1, 0.2, 0.5])
    o = torch.tensor([0.0, -0.2, 1.0])
    g = UniformGrid(3, s, offset=o, axis=0)
    lv = g.levels
    assert lv.shape == (3, 8)
    for c in range(3):
        assert torch.allclose(lv[c], s[c] * torch.arange(-4, 4) + o[c])
    lo, hi = g.clip_range
    assert torch.allclose(lo, s * -4 + o) and torch.allclose(hi, s * 3 + o)
    # per-channel scale with one shared offset
    g2 = UniformGrid(3, s, offset=0.5, axis=1)
    assert g2.levels.shape == (3, 8) and g2.n_channels == 3
    assert torch.allclose(g2.levels[:, 4], torch.full((3,), 0.5))


# ------------------------------------------------------------------ zero point
def test_zero_point_of_an_affine_grid():
    g = UniformGrid(8, 0.02, offset=-13 * 0.02, signed=False)
    assert g.zero_point == 13 and isinstance(g.zero_point, int)
    assert UniformGrid(8, 0.02).zero_point == 0
    assert UniformGrid(4, 0.3, offset=0.3 * 5).zero_point == -5


def test_zero_point_per_channel():
    s = torch.tensor([0.1, 0.25])
    g = UniformGrid(8, s, offset=-torch.tensor([3.0, -7.0]) * s, axis=0)
    zp = g.zero_point
    assert zp.dtype == torch.int64 and zp.tolist() == [3, -7]


def test_zero_point_error_names_the_problem_and_the_fix():
    g = UniformGrid(8, 0.1, offset=0.025)
    with pytest.raises(ValueError, match=r"not an integer multiple of scale.*snapped"):
        _ = g.zero_point
    assert not g.has_zero_point()
    pc = UniformGrid(8, torch.tensor([0.1, 0.1]), offset=torch.tensor([0.0, 0.03]), axis=0)
    with pytest.raises(ValueError, match="integer multiple"):
        _ = pc.zero_point


def test_snapped_rounds_the_offset_to_the_nearest_multiple():
    g = UniformGrid(8, 0.1, offset=0.26).snapped()
    assert g.offset == pytest.approx(0.3) and g.zero_point == -3
    assert isinstance(g.offset, float)
    assert g.bits == 8 and g.scale == 0.1 and g.signed is True and g.axis is None
    pc = UniformGrid(4, torch.tensor([0.1, 0.2]), offset=torch.tensor([0.04, -0.33]), axis=0).snapped()
    assert torch.allclose(pc.offset, torch.tensor([0.0, -0.4]))
    assert pc.zero_point.tolist() == [0, 2]
    # a grid that already has a zero point is unchanged
    same = UniformGrid(6, 0.5, offset=-1.5).snapped()
    assert same.offset == -1.5 and same.zero_point == 3


@settings(max_examples=100, deadline=None)
@given(st.floats(1e-3, 100.0), st.floats(-1e3, 1e3))
def test_snapped_always_has_a_zero_point_and_moves_less_than_half_a_step(scale, offset):
    g = UniformGrid(8, scale, offset=offset)
    s = g.snapped()
    assert isinstance(s.zero_point, int)
    assert abs(s.offset - offset) <= scale / 2 * (1 + 1e-9)


# ------------------------------------------------------------------ copies and immutability
def test_replace_makes_a_validated_copy():
    g = UniformGrid(4, 0.1)
    h = g.replace(bits=6, signed=False)
    assert (h.bits, h.signed, h.scale, g.bits, g.signed) == (6, False, 0.1, 4, True)
    with pytest.raises(ValueError, match="scale must be > 0"):
        g.replace(scale=-1.0)
    with pytest.raises(TypeError, match="unknown UniformGrid field"):
        g.replace(zero_point=3)


def test_grid_is_immutable():
    g = UniformGrid(4, 0.1)
    with pytest.raises(AttributeError, match="immutable"):
        g.bits = 5
    with pytest.raises(AttributeError):
        g.new_field = 1


def test_scale_and_offset_tensors_keep_their_autograd_history():
    s = torch.tensor(0.1, requires_grad=True)
    o = torch.tensor([0.0, 0.1], requires_grad=True)
    g = UniformGrid(4, s, offset=o, axis=0)
    assert g.scale is s and g.offset is o  # held, not copied
    assert not g.levels.requires_grad  # a display value
    d = g.detached()
    assert not d.scale.requires_grad and not d.offset.requires_grad


def test_repr_mentions_the_fields():
    r = repr(UniformGrid(4, torch.tensor([0.1, 0.3]), axis=0, signed=False))
    assert "bits=4" in r and "signed=False" in r and "axis=0" in r and "2 values" in r


def test_constructor_never_modifies_its_tensors():
    s, o = torch.tensor([0.1, 0.2]), torch.tensor([0.3, -0.1])
    keep = (s.clone(), o.clone())
    g = UniformGrid(4, s, offset=o, axis=0)
    _ = g.levels, g.clip_range, g.snapped(), g.detached(), g.has_zero_point()
    assert torch.equal(s, keep[0]) and torch.equal(o, keep[1])


# ------------------------------------------------------------------ bad input
@pytest.mark.parametrize("bits", [4.0, "8", None, True, False, 2.5])
def test_bits_must_be_an_int(bits):
    with pytest.raises(TypeError, match="bits must be an int in 1..16"):
        UniformGrid(bits, 0.1)


@pytest.mark.parametrize("bits", [0, -1, 17, 32])
def test_bits_must_be_in_1_to_16(bits):
    with pytest.raises(ValueError, match=rf"bits must be in 1..16, got {bits}"):
        UniformGrid(bits, 0.1)


def test_numpy_integer_bits_are_accepted():
    import numpy as np

    assert UniformGrid(np.int64(5), 0.1).bits == 5


@pytest.mark.parametrize(
    "scale,exc,match",
    [
        (0.0, ValueError, "scale must be > 0, got 0"),
        (-0.1, ValueError, "scale must be > 0, got -0.1"),
        (math.inf, ValueError, "scale must be finite"),
        (math.nan, ValueError, "scale must be finite"),
        (torch.tensor([0.1, -0.2]), ValueError, "scale must be > 0"),
        (torch.tensor([0.1, math.nan]), ValueError, "scale must be finite"),
        (torch.tensor([1, 2]), TypeError, "scale must be a float tensor"),
        ("0.1", TypeError, "scale must be a float"),
        (True, TypeError, "scale must be a float"),
    ],
)
def test_bad_scale(scale, exc, match):
    with pytest.raises(exc, match=match):
        UniformGrid(4, scale, axis=0 if isinstance(scale, torch.Tensor) else None)


@pytest.mark.parametrize(
    "offset,exc,match",
    [(math.inf, ValueError, "offset must be finite"), (torch.tensor(math.nan), ValueError, "offset must be finite"),
     ("1", TypeError, "offset must be a float")],
)
def test_bad_offset(offset, exc, match):
    with pytest.raises(exc, match=match):
        UniformGrid(4, 0.1, offset=offset)


def test_channel_count_errors():
    with pytest.raises(ValueError, match="scale has 3 values but axis is None"):
        UniformGrid(4, torch.tensor([0.1, 0.2, 0.3]))
    with pytest.raises(ValueError, match="scale has 3 channels but offset has 2"):
        UniformGrid(4, torch.tensor([0.1, 0.2, 0.3]), offset=torch.tensor([0.0, 1.0]), axis=0)
    with pytest.raises(ValueError, match="per-channel scale must be 1-D"):
        UniformGrid(4, torch.ones(2, 2), axis=0)
    with pytest.raises(TypeError, match="axis must be None or an int"):
        UniformGrid(4, 0.1, axis=1.0)
    with pytest.raises(TypeError, match="axis must be None or an int"):
        UniformGrid(4, 0.1, axis=True)
    with pytest.raises(TypeError, match="signed must be a bool"):
        UniformGrid(4, 0.1, signed=1)


def test_grid_copies_and_pickles():
    import copy
    import pickle

    g = UniformGrid(4, torch.tensor([0.1, 0.2]), torch.tensor([0.0, 0.2]), signed=False, axis=1)
    assert copy.deepcopy(g) is g and copy.copy(g) is g  # immutable: the copy is the grid
    back = pickle.loads(pickle.dumps(g))
    assert (back.bits, back.signed, back.axis) == (4, False, 1)
    assert torch.equal(back.scale, g.scale) and torch.equal(back.offset, g.offset)
