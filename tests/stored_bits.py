"""A mean-bits budget in code bits: mean_bits counts stored bits per weight (codes plus each
grid's scales and zero points), so a test that means "about b bits per weight for the codes"
adds the table's scale storage, counted here by the cost rule of per-channel / per-tensor grids
(a float32 scale and an int32 zero point per channel, README)."""

from __future__ import annotations


def mean_bits_for(table, code_bits: float) -> float:
    """The ``mean_bits`` budget that leaves ``code_bits`` per weight for the codes of
    ``table``'s default (first-granularity) grids."""
    params = sum(table.params(n) for n in table.layers)
    channels = sum(table.weight_channels(n) for n in table.layers)
    return code_bits + 64 * channels / params
