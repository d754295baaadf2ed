"""Which values a block grid's shown block holds, and which granularities the explorer offers.

A block grid (``UniformGrid(..., axis=a, block_size=g)``, the ONNX opset 21 layout: scales of
the tensor's full rank, axis ``a`` divided by ``g``) has, per output channel, one scale for
each block of ``g`` consecutive values along the input axis (and each position of the other
axes, e.g. a convolution's kernel taps). The explorer shows one channel and, within it, one
block: ``block`` counts that channel's scales in row-major order. Indexing only; the grids
come from the core.
"""

from __future__ import annotations

import torch

from ..core.grid import UniformGrid

__all__ = ["ShownPart", "BLOCK_SIZES", "block_options", "channel_axis", "blocks_per_channel", "block_flat_index",
           "block_values", "block_label", "granularity_label"]

BLOCK_SIZES = (8, 16, 32, 64, 128, 256)  # offered where the input axis is longer (common practice: 32-128)


def block_options(values: torch.Tensor, per_channel_ok: bool) -> tuple:
    """The block sizes offered for a tensor: those shorter than its input axis (axis 1)."""
    if not per_channel_ok or values.dim() < 2:
        return ()
    return tuple(g for g in BLOCK_SIZES if g < values.shape[1])


def channel_axis(grid: UniformGrid) -> int | None:
    """The per-channel axis: the grid's axis, or for a block grid the other of axes 0 / 1."""
    if grid.axis is None:
        return None
    return (1 if grid.axis == 0 else 0) if grid.blocked else grid.axis


def blocks_per_channel(grid: UniformGrid) -> int:
    """How many scales one channel of a block grid has (1 for other grids)."""
    if not grid.blocked:
        return 1
    s = grid.scale_tensor()
    return s.numel() // s.shape[channel_axis(grid)]


def block_flat_index(grid: UniformGrid, channel: int, block: int) -> int:
    """The index, in the flat scale tensor, of ``channel``'s ``block``-th scale."""
    s = grid.scale_tensor()
    ids = torch.arange(s.numel()).reshape(s.shape).movedim(channel_axis(grid), 0)[channel]
    return int(ids.reshape(-1)[block])


def block_values(values: torch.Tensor, grid: UniformGrid, channel: int, block: int) -> torch.Tensor:
    """The values that ``channel``'s ``block``-th scale quantizes, flat."""
    g, axis = grid.block_size, grid.axis
    if values.dim() == 2 and channel_axis(grid) == 0 and axis == 1:  # a Linear weight: a slice
        return values[channel, block * g:(block + 1) * g]
    s = grid.scale_tensor()
    pos = list(torch.unravel_index(torch.tensor(block_flat_index(grid, channel, block)), s.shape))
    index = [int(p) for p in pos]
    sl = [slice(i, i + 1) for i in index]
    sl[axis] = slice(index[axis] * g, (index[axis] + 1) * g)
    return values[tuple(sl)].reshape(-1)


def block_label(grid: UniformGrid, channel: int, block: int, n_inputs: int) -> str:
    """``"block 3 of 8 (inputs 96-127)"``: the block shown, with its place along the input
    axis (of ``n_inputs`` values; a last block may be short)."""
    s = grid.scale_tensor()
    pos = [int(p) for p in torch.unravel_index(torch.tensor(block_flat_index(grid, channel, block)), s.shape)]
    g, b = grid.block_size, pos[grid.axis]
    return f"block {block} of {blocks_per_channel(grid)} (inputs {b * g}-{min((b + 1) * g, n_inputs) - 1})"


def granularity_label(option) -> str:
    """"per tensor", "per channel", "blocks of 32" (or "per token") for a granularity option."""
    return f"per {option}" if isinstance(option, str) else f"blocks of {option}"


class ShownPart:
    """:class:`~.explorer_state.ExplorerState`'s views of the part shown: the channel (and
    block) of the current grid, its values and their range (``self.grid``, ``self.values``,
    ``self.source``, ``self.channel``, ``self.block`` and ``self._ranges`` are the state's)."""

    def n_channels_of(self, grid: UniformGrid, source: str) -> int:
        return 1 if grid.axis is None else int(self.values[source].shape[channel_axis(grid)])

    def n_channels(self) -> int:
        return self.n_channels_of(self.grid, self.source)

    def shown_grid(self) -> UniformGrid:
        """The grid of the channel shown (the grid itself when it is per-tensor)."""
        g = self.grid
        if g.axis is None:
            return g
        if g.blocked:  # the block shown, of the channel shown
            at = block_flat_index(g, self.channel, self.block)
            s, o = g.scale_tensor(), g.offset_tensor().expand_as(g.scale_tensor())
            return UniformGrid(g.bits, float(s.reshape(-1)[at]), float(o.reshape(-1)[at]) + 0.0, signed=g.signed)
        return UniformGrid(g.bits, float(g.scale_tensor()[self.channel]),
                           float(g.offset_tensor()[self.channel]) + 0.0, signed=g.signed)

    def shown_values(self) -> torch.Tensor:
        v = self.values[self.source]
        if self.grid.blocked:
            return block_values(v, self.grid, self.channel, self.block)
        if self.grid.axis is not None:
            return v.movedim(self.grid.axis, 0)[self.channel].reshape(-1)
        return v.reshape(-1)

    def shown_range(self) -> tuple:
        """(lowest, highest) of :meth:`shown_values` (kept: the values never change)."""
        g = self.grid
        key = (self.source, None if g.axis is None else (self.channel, g.granularity, self.block if g.blocked else 0))
        if key not in self._ranges:
            v = self.shown_values()
            self._ranges[key] = (float(v.min()), float(v.max()))
        return self._ranges[key]

    def negative_share(self, source: str) -> float:
        """The share of ``source``'s values below zero (kept: the values never change)."""
        if source not in self._ranges:
            self._ranges[source] = float((self.values[source] < 0).double().mean())
        return self._ranges[source]

    def fitted_step(self) -> float:
        """The fitted step of the channel shown (the centre of the step control's window)."""
        g = self.fitted_now()
        s = g.scale_tensor()
        if g.blocked:
            return float(s.reshape(-1)[block_flat_index(g, self.channel, self.block)])
        return float(s[self.channel] if g.axis is not None else s.reshape(-1)[0])
