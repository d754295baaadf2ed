"""Costs of a bit allocation and the exact allocator under a size / mean-bits / BOPs budget.

Costs (all exact integers, so budgets compare without rounding):

- weight storage of a layer, in bits: ``params * bits`` for the integer codes plus, per grid
  channel, one float32 scale and one int32 zero point (``64`` bits; a per-tensor grid has one
  channel). A block grid stores the codes plus, per block, one scale at ``scale_bits`` (16 by
  default: half-precision scales) and, where it is asymmetric, a zero point at the code width:
  ``code bits + scale bits / g (+ zero-point bits / g)`` per weight (common practice). Float
  weights cost ``32 * params``. Biases are not counted (they are the same for every choice).
  KiB = bits / 8192. ``planned_kib``: the planned entries; ``model_kib``: those plus every
  other floating-point weight of the model at its stored width.
- mean weight bits: stored bits per planned weight, ``sum(storage) / sum(params)`` (codes,
  scales and zero points: the usual "bits per weight").
- BOPs of a layer: ``MACs * weight bits * input bits`` per sample (common practice in
  mixed-precision work); float operands count 32 bits.
"""

from __future__ import annotations

import math

import torch

# each cost is the budget keyword of plan_budget and the Plan attribute of that name
COSTS = ("model_kib", "planned_kib", "mean_bits", "bops")


SCALE_BITS = 32  # one float32 scale per grid channel


ZERO_POINT_BITS = 32  # one int32 zero point per grid channel


FLOAT_BITS = 32  # an unquantized weight or activation


def weight_storage_bits(n_params: int, bits: int | None, n_channels: int = 1) -> int:
    """Bits to store a weight tensor: codes plus a float32 scale and int32 zero point per channel.

    ``bits=None`` means the weights stay float32 (no scales stored).

    >>> weight_storage_bits(1000, 4, n_channels=10)  # 4000 code bits + 10 * 64
    4640
    >>> weight_storage_bits(1000, None)
    32000
    """
    if bits is None:
        return FLOAT_BITS * int(n_params)
    return int(n_params) * int(bits) + int(n_channels) * (SCALE_BITS + ZERO_POINT_BITS)


def block_storage_bits(n_params: int, bits: int, n_blocks: int, scale_bits: int = 16,
                       asymmetric: bool = False) -> int:
    """Bits to store a block grid's weights: codes, one scale per block at ``scale_bits`` and,
    when ``asymmetric``, one zero point per block at the code width (common practice).

    >>> block_storage_bits(4096, 4, n_blocks=32)  # 4 + 16 / 128 bits per weight
    16896
    >>> block_storage_bits(4096, 4, n_blocks=32, asymmetric=True)  # 4 + (16 + 4) / 128
    17024
    """
    return int(n_params) * int(bits) + int(n_blocks) * (int(scale_bits) + (int(bits) if asymmetric else 0))


def grid_storage_bits(grid, shape, scale_bits: int = 16) -> int:
    """Bits to store a weight of ``shape`` on ``grid`` (None: float32), by the rules above."""
    n = math.prod(shape)
    if grid is None:
        return FLOAT_BITS * n
    if grid.blocked:
        return block_storage_bits(n, grid.bits, grid.scale.numel(), scale_bits, is_asymmetric(grid))
    return weight_storage_bits(n, grid.bits, 1 if grid.axis is None else shape[grid.axis])


def is_asymmetric(grid) -> bool:
    """Whether the grid needs zero points stored (any zero point not 0, or none integer)."""
    if not grid.has_zero_point():
        return True
    return bool((torch.as_tensor(grid.zero_point) != 0).any())


def layer_bops(macs: int, weight_bits: int | None, input_bits: int | None) -> int:
    """Bit operations of a layer: ``MACs * weight bits * input bits`` (None counts as float32).

    >>> layer_bops(100, 4, 8), layer_bops(100, None, None)
    (3200, 102400)
    """
    wb = FLOAT_BITS if weight_bits is None else int(weight_bits)
    ib = FLOAT_BITS if input_bits is None else int(input_bits)
    return int(macs) * wb * ib
