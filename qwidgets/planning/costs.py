"""Costs of a bit allocation and the exact allocator under a size / mean-bits / BOPs budget.

Costs (all exact integers, so budgets compare without rounding):

- weight storage of a layer, in bits: ``params * bits`` for the integer codes plus, per grid
  channel, one float32 scale and one int32 zero point (``64`` bits; a per-tensor grid has one
  channel). Float weights cost ``32 * params``. Biases are not counted (they are the same for
  every choice). KiB = bits / 8192. ``planned_kib``: the planned entries; ``model_kib``: those
  plus every other floating-point weight of the model at its stored width.
- mean weight bits: ``sum(params * bits) / sum(params)`` over the planned layers (codes only).
- BOPs of a layer: ``MACs * weight bits * input bits`` per sample (common practice in
  mixed-precision work); float operands count 32 bits.
"""

from __future__ import annotations

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


def layer_bops(macs: int, weight_bits: int | None, input_bits: int | None) -> int:
    """Bit operations of a layer: ``MACs * weight bits * input bits`` (None counts as float32).

    >>> layer_bops(100, 4, 8), layer_bops(100, None, None)
    (3200, 102400)
    """
    wb = FLOAT_BITS if weight_bits is None else int(weight_bits)
    ib = FLOAT_BITS if input_bits is None else int(input_bits)
    return int(macs) * wb * ib
