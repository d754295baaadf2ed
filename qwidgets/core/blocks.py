"""Block layout of a grid: one scale (and offset) per block of ``g`` consecutive values.

The layout is that of ONNX opset 21 blocked quantization (QuantizeLinear / DequantizeLinear
with ``block_size``): ``axis`` is the blocked axis, and scale and offset have the tensor's full
rank with that axis divided by ``g``, rounded up, so a last short block is allowed. Value
``i`` along the axis belongs to block ``i // g``. Everything here is a reshape or a broadcast:
no Python loop over blocks.
"""

from __future__ import annotations

import math

import torch

from .checks import check_int

__all__ = ["check_block_size", "check_block_params", "check_block_fit", "n_blocks", "expand_blocks", "block_shape", "BlockRows",
           "block_sums", "round_scales", "SCALE_BITS"]

SCALE_BITS = (16, 32)  # how a block scale is stored: float16 (common practice) or float32


def check_block_params(scale, offset, axis, g) -> None:
    """A block grid's scale and offset: full-rank tensors of one shape (a float offset too)."""
    if axis is None:
        raise ValueError(f"block_size={g} needs axis, the blocked axis (1 for a Linear or Conv "
                         "weight, 0 for a weight stored [in, out])")
    if not isinstance(scale, torch.Tensor) or scale.dim() == 0:
        raise ValueError("a block grid's scale must be a tensor of the weight's full rank (that "
                         f"axis divided by block_size={g}, rounded up), got {scale!r}")
    if not -scale.dim() <= axis < scale.dim():
        raise ValueError(f"axis={axis} is out of range for block scales of shape {tuple(scale.shape)}")
    if isinstance(offset, torch.Tensor) and offset.numel() > 1 and offset.shape != scale.shape:
        raise ValueError(f"offset has shape {tuple(offset.shape)} but the block scales have shape "
                         f"{tuple(scale.shape)}; they must match (or give one offset)")


def check_block_fit(grid, shape, where: str) -> None:
    """A block grid's scales fit a weight of ``shape`` (ValueError naming ``where``); other
    grids (and None) pass."""
    if grid is None or not grid.blocked:
        return
    n = len(shape)
    if not -n <= grid.axis < n or tuple(grid.scale.shape) != block_shape(shape, grid.axis % n, grid.block_size):
        raise ValueError(f"{where}: block scales of shape {tuple(grid.scale.shape)} do not fit the weight "
                         f"shape {tuple(shape)} in blocks of {grid.block_size} along axis {grid.axis}")


def check_block_size(block_size, name: str = "block_size") -> int | None:
    """``block_size`` as an int >= 1, or None."""
    return check_int(block_size, name, minimum=1, none_ok=True)


def n_blocks(n: int, g: int) -> int:
    """Blocks of ``g`` along an axis of length ``n`` (the last one may be short)."""
    return -(-n // g)


def block_shape(shape, axis: int, g: int) -> tuple[int, ...]:
    """The scale shape of a tensor of ``shape`` blocked along ``axis`` in blocks of ``g``."""
    out = list(shape)
    out[axis] = n_blocks(out[axis], g)
    return tuple(out)


def expand_blocks(t: torch.Tensor, axis: int, g: int, n: int) -> torch.Tensor:
    """Each block value of ``t`` repeated over its block: ``t``'s shape with ``axis`` of length ``n``.

    >>> expand_blocks(torch.tensor([[1.0, 2.0]]), 1, 3, 5).tolist()
    [[1.0, 1.0, 1.0, 2.0, 2.0]]
    """
    if t.dim() == 0:
        return t
    return t.repeat_interleave(g, dim=axis).narrow(axis, 0, n)


def block_sums(t: torch.Tensor, axis: int, g: int) -> torch.Tensor:
    """Sum of ``t`` over each block (zeros pad the last short block, adding nothing)."""
    n = t.shape[axis]
    nb = n_blocks(n, g)
    moved = t.movedim(axis, -1)
    if nb * g != n:
        moved = torch.nn.functional.pad(moved, (0, nb * g - n))
    return moved.unflatten(-1, (nb, g)).sum(dim=-1).movedim(-1, axis)


class BlockRows:
    """A tensor's blocks as rows of 2-D views, and back.

    The blocked axis is moved last; the full blocks form ``full`` (rows of ``g`` values) and the
    last short blocks, if the axis length is not a multiple of ``g``, form ``tail`` (rows of the
    remainder). Per-row results (one value per block) are put back into the scale layout by
    :meth:`assemble`. A per-row fit of these views is a per-block fit of the tensor.

    >>> br = BlockRows(torch.arange(10.0).reshape(2, 5), 1, 2)
    >>> br.full.tolist(), br.tail.tolist()
    ([[0.0, 1.0], [2.0, 3.0], [5.0, 6.0], [7.0, 8.0]], [[4.0], [9.0]])
    >>> br.assemble(br.full.amax(dim=1), br.tail.amax(dim=1)).tolist()
    [[1.0, 3.0, 4.0], [6.0, 8.0, 9.0]]
    """

    def __init__(self, x: torch.Tensor, axis: int, g: int):
        axis = axis % x.dim()
        n = x.shape[axis]
        moved = x.movedim(axis, -1)
        self.lead = moved.shape[:-1]
        rows = moved.reshape(-1, n)
        self.axis, self.g, self.n = axis, g, n
        self.n_full = n // g
        self.full = rows[:, : self.n_full * g].reshape(-1, g) if self.n_full else None
        self.tail = rows[:, self.n_full * g:] if self.n_full * g < n else None

    @property
    def parts(self) -> list[torch.Tensor]:
        return [p for p in (self.full, self.tail) if p is not None]

    def assemble(self, *values: torch.Tensor) -> torch.Tensor:
        """One value per row of each part (in :attr:`parts` order) -> the block-shaped tensor."""
        r = math.prod(self.lead)
        cols = []
        it = iter(values)
        if self.full is not None:
            cols.append(next(it).reshape(r, self.n_full))
        if self.tail is not None:
            cols.append(next(it).reshape(r, 1))
        out = torch.cat(cols, dim=1) if len(cols) > 1 else cols[0]
        return out.reshape(*self.lead, -1).movedim(-1, self.axis)


def round_scales(scale: torch.Tensor, offset: torch.Tensor, scale_bits: int = 16):
    """Scales as stored at ``scale_bits`` (16: the nearest float16, kept within its positive
    range; 32: unchanged), offsets moved with them so ``offset / scale`` (a multiple of 1/2 for
    every fitted grid) is kept. Float64 in and out; the scale stored and the scale used agree.

    >>> s, o = round_scales(torch.tensor([0.1], dtype=torch.float64), torch.tensor([-0.3], dtype=torch.float64))
    >>> float(s[0]) == float(torch.tensor(0.1).half()), float(o[0] / s[0])
    (True, -3.0)
    """
    if scale_bits == 32:
        return scale, offset
    ratio = torch.round(2 * offset / scale) / 2
    # float16 subnormals are stored as such (2**-24 the least); beyond 65504 would be inf
    s16 = scale.clamp(2.0**-24, torch.finfo(torch.float16).max).half().double()
    return s16, ratio * s16
