"""UniformGrid: the set of values a uniform quantizer may output.

A grid holds the integers ``k`` in ``[qmin, qmax]`` and maps them to ``scale * k + offset``.
Scale and offset are plain floats or tensors; tensors that require gradients keep them, so the
relaxed quantizer can learn them. With ``axis`` set, scale and offset hold one value per index
of that axis of the tensor being quantized (per-channel quantization). With ``block_size`` too,
they hold one value per block of consecutive values along ``axis`` (the blocked axis), in the
layout of ONNX opset 21 blocked quantization (see ``blocks``).
"""

from __future__ import annotations

from numbers import Integral
from typing import Any

import torch

from .blocks import block_shape, check_block_params, check_block_size, expand_blocks
from .checks import check_axis, check_bits, check_finite, check_positive, describe_values
from .zero_rule import ZP_TOLERANCE, derived_offset, integer_zero_point, zero_points

__all__ = ["UniformGrid", "ZP_TOLERANCE", "integer_zero_point", "zero_points", "code_values", "channel_shape",
           "grid_params", "zero_point_param", "param_layout", "place_param", "block_axis"]

def code_values(k: torch.Tensor, s: torch.Tensor, o: torch.Tensor, shift=None) -> torch.Tensor:
    """Grid values ``s * k + o`` for (float-typed) integer codes ``k``.

    With the grid's integer zero point, ``shift = (z, rest)`` (see :func:`zero_point_param`),
    they are computed as ``(k - z) * s``: one rounding, the way integer-arithmetic inference
    dequantizes, so results equal the reference operators bit for bit (``rest`` holds the offset
    of channels without an integer zero point, where z is 0, or is None); without one, as
    ``k * s + o``. Either way ``quantize`` returns an exact member of ``UniformGrid.levels``. The
    gradient is that of ``s * k + o`` (scale and offset are independent parameters).
    """
    if shift is None:
        value = k * s + o
    else:
        z, rest = shift
        value = (k - z) * s if rest is None else (k - z) * s + rest
    if shift is None or not (s.requires_grad or o.requires_grad):
        return value
    lin = k * s + o
    return lin + (value - lin).detach()  # the value of ``value``


class UniformGrid:
    """Grid points ``scale * k + offset`` for integer ``k`` in ``[qmin, qmax]``.

    Parameters
    ----------
    bits : int in 1..16
    scale : float or tensor, > 0 (the grid step)
    offset : float or tensor (shifts every grid point; ``offset == -zero_point * scale``)
    signed : ``k`` in ``[-2**(bits-1), 2**(bits-1) - 1]`` if True, else ``[0, 2**bits - 1]``
    axis : None for one scale / offset for the whole tensor, or the axis along which they vary
        (per channel: 1-D scale / offset); with ``block_size``, the blocked axis
    block_size : None, or ``g`` >= 1: one scale / offset per block of ``g`` consecutive values
        along ``axis``. Scale and offset then have the tensor's full rank and shape, ``axis``
        divided by ``g`` rounded up (a last short block is allowed): the ONNX opset 21 blocked
        layout, e.g. scales ``[O, ceil(I / g), kh, kw]`` for a conv weight ``[O, I, kh, kw]``
        blocked along ``axis=1``. A float offset applies to every block.

    Example
    -------
    >>> g = UniformGrid(3, 0.5)
    >>> g.levels.tolist()
    [-2.0, -1.5, -1.0, -0.5, 0.0, 0.5, 1.0, 1.5]
    >>> g.clip_range
    (-2.0, 1.5)
    >>> UniformGrid(4, torch.ones(8, 3), axis=1, block_size=32).granularity
    32
    """

    __slots__ = ("bits", "scale", "offset", "signed", "axis", "block_size", "_zp", "_whole")
    _FIELDS = ("bits", "scale", "offset", "signed", "axis", "block_size")

    def __init__(self, bits: int, scale: float | torch.Tensor, offset: float | torch.Tensor = 0.0,
                 signed: bool = True, axis: int | None = None, block_size: int | None = None):
        bits = check_bits(bits)
        if not isinstance(signed, bool):
            raise TypeError(f"signed must be a bool, got {signed!r}")
        if axis is not None and (isinstance(axis, bool) or not isinstance(axis, Integral)):
            raise TypeError(f"axis must be None or an int, got {axis!r}")
        block_size = check_block_size(block_size)
        scale = check_positive(scale, "scale")
        offset = check_finite(offset, "offset")
        if block_size is not None:
            check_block_params(scale, offset, axis, block_size)
        for name, v in (("scale", scale), ("offset", offset)):
            if isinstance(v, torch.Tensor) and block_size is None:
                if axis is None and v.numel() != 1:
                    raise ValueError(
                        f"{name} has {v.numel()} values but axis is None; give one value, "
                        "or set axis for per-channel quantization"
                    )
                if axis is not None and v.dim() > 1:
                    raise ValueError(f"per-channel {name} must be 1-D, got shape {tuple(v.shape)}")
        if (
            isinstance(scale, torch.Tensor)
            and isinstance(offset, torch.Tensor)
            and scale.numel() > 1
            and offset.numel() > 1
            and scale.numel() != offset.numel()
            and block_size is None
        ):
            raise ValueError(
                f"scale has {scale.numel()} channels but offset has {offset.numel()}; they must match"
            )
        zp, whole = zero_points(scale, offset)
        if whole is not False:
            offset = derived_offset(zp, whole, scale, offset)
        object.__setattr__(self, "_zp", None if whole is False else zp)
        object.__setattr__(self, "_whole", whole)
        object.__setattr__(self, "bits", bits)
        object.__setattr__(self, "scale", scale)
        object.__setattr__(self, "offset", offset)
        object.__setattr__(self, "signed", signed)
        object.__setattr__(self, "axis", None if axis is None else int(axis))
        object.__setattr__(self, "block_size", block_size)

    def __setattr__(self, name, value):
        raise AttributeError("UniformGrid is immutable; use .replace(...) to make a changed copy")

    # immutable, so a copy is the grid itself; pickling rebuilds it through __init__ (a planned
    # model copy holding grids in its hooks can be deep-copied and saved)
    def __copy__(self) -> UniformGrid:
        return self

    def __deepcopy__(self, memo) -> UniformGrid:
        return self

    def __reduce__(self):
        return (UniformGrid, (self.bits, self.scale, self.offset, self.signed, self.axis, self.block_size))

    # ------------------------------------------------------------------ integer range
    @property
    def qmin(self) -> int:
        return -(2 ** (self.bits - 1)) if self.signed else 0

    @property
    def qmax(self) -> int:
        return 2 ** (self.bits - 1) - 1 if self.signed else 2**self.bits - 1

    @property
    def n_levels(self) -> int:
        return 2**self.bits

    @property
    def per_channel(self) -> bool:
        """One scale per channel (a 1-D scale along ``axis``; False for block grids)."""
        return self.axis is not None and self.block_size is None

    @property
    def blocked(self) -> bool:
        """One scale per block of ``block_size`` values along ``axis``."""
        return self.block_size is not None

    @property
    def granularity(self) -> str | int:
        """``"tensor"``, ``"channel"`` or the block size."""
        return "tensor" if self.axis is None else ("channel" if self.block_size is None else self.block_size)

    @property
    def n_channels(self) -> int | None:
        """Number of channels the scale / offset carry (None for a per-tensor grid or scalars;
        for a block grid, the number of blocks)."""
        if self.blocked:
            return self.scale.numel()
        sizes = [v.numel() for v in (self.scale, self.offset) if isinstance(v, torch.Tensor)]
        sizes = [s for s in sizes if s > 1]
        return max(sizes) if sizes else None

    # ------------------------------------------------------------------ values
    def scale_tensor(self) -> torch.Tensor:
        """Scale as a tensor: 0-d per tensor, 1-d (one per channel) per channel."""
        return self._as_tensor(self.scale)

    def offset_tensor(self) -> torch.Tensor:
        return self._as_tensor(self.offset)

    def _as_tensor(self, v) -> torch.Tensor:
        t = v if isinstance(v, torch.Tensor) else torch.tensor(float(v))
        if self.blocked:  # the block layout, a float offset broadcast to it
            return t.expand(self.scale.shape) if t.numel() == 1 else t
        if self.axis is None:
            return t.reshape(())
        n = self.n_channels
        t = t.reshape(-1)
        return t.expand(n) if (n is not None and t.numel() == 1) else t

    @property
    def levels(self) -> torch.Tensor:
        """All grid values, ascending: shape ``(n_levels,)``, or ``(channels, n_levels)``
        (a block grid: one row per block, blocks in the order of ``scale.reshape(-1)``)."""
        # Same arithmetic as ``quantize`` on default-dtype input, so its outputs are members.
        dtype = torch.get_default_dtype()
        k = torch.arange(self.qmin, self.qmax + 1, dtype=dtype)
        s = self.scale_tensor().detach().to(dtype)
        o = self.offset_tensor().detach().to(dtype)
        if self.blocked:
            s, o = s.reshape(-1), o.reshape(-1)
        shift = _shift(self, dtype, k.device, None if not (s.dim() or o.dim()) else (-1, 1))
        if s.dim() or o.dim():
            s, o = s.reshape(-1, 1), o.reshape(-1, 1)
        return code_values(k, s, o, shift)

    @property
    def clip_range(self) -> tuple:
        """(lowest, highest) grid value; inputs beyond are saturated to these.

        Floats for a per-tensor grid, a pair of 1-D tensors for a per-channel one.
        """
        s = self.scale_tensor().detach()
        o = self.offset_tensor().detach()
        lo, hi = s * self.qmin + o, s * self.qmax + o
        if lo.dim() == 0:
            return float(lo), float(hi)
        return lo, hi

    @property
    def zero_point(self) -> int | torch.Tensor:
        """The integer Z with ``offset == -Z * scale`` (int, or int64 tensor per channel).

        Decided once, when the grid is made, by :func:`integer_zero_point` (the one tolerance,
        ``ZP_TOLERANCE``); a grid that has Z stores its offset as ``-Z * scale``. Raises
        ValueError when the offset is not an integer multiple of the scale; use
        :meth:`snapped` for the nearest grid that has an integer zero point.
        """
        if not self.has_zero_point():
            z = -self.offset_tensor().detach().double() / self.scale_tensor().detach().double()
            raise ValueError(
                "offset is not an integer multiple of scale, so the grid has no integer zero "
                f"point (-offset/scale = {describe_values(z)}); call .snapped() for the nearest grid that has one"
            )
        return self._zp if isinstance(self._zp, int) else self._zp.clone()

    def has_zero_point(self) -> bool:
        """Whether the grid has an integer zero point (see :attr:`zero_point`)."""
        return self._whole is True

    # ------------------------------------------------------------------ copies
    def replace(self, **changes: Any) -> UniformGrid:
        """A copy with some fields changed (validated like the constructor)."""
        fields = {k: getattr(self, k) for k in self._FIELDS}
        unknown = set(changes) - set(fields)
        if unknown:
            raise TypeError(f"unknown UniformGrid field(s) {sorted(unknown)}; known: {list(fields)}")
        fields.update(changes)
        return UniformGrid(**fields)

    def snapped(self) -> UniformGrid:
        """A copy whose offset is rounded to the nearest integer multiple of the scale."""
        s = self.scale
        if isinstance(self.offset, torch.Tensor) or isinstance(s, torch.Tensor):
            st = self.scale_tensor().detach()
            z = torch.round(-self.offset_tensor().detach() / st)
            off = -z * st
            if off.dim() == 0 and not isinstance(self.offset, torch.Tensor):
                off = float(off)
            return self.replace(offset=off + 0.0)
        return self.replace(offset=-round(-self.offset / s) * s + 0.0)

    def detached(self) -> UniformGrid:
        """A copy with scale and offset cut from any autograd graph (floats stay floats)."""
        d = {k: (v.detach().clone() if isinstance(v, torch.Tensor) else v) for k, v in
             (("scale", self.scale), ("offset", self.offset))}
        return self.replace(**d)

    # ------------------------------------------------------------------ display
    def __repr__(self) -> str:
        def fmt(v):
            if isinstance(v, torch.Tensor):
                v = v.detach()
                if v.numel() == 1:
                    return f"{float(v):.6g}"
                return f"<{v.numel()} values, {float(v.detach().min()):.4g}..{float(v.detach().max()):.4g}>"
            return f"{v:.6g}"

        ax = "" if self.axis is None else f", axis={self.axis}"
        ax += "" if self.block_size is None else f", block_size={self.block_size}"
        return (
            f"UniformGrid(bits={self.bits}, scale={fmt(self.scale)}, offset={fmt(self.offset)}, "
            f"signed={self.signed}{ax})"
        )

class _Blocked:
    """Where block parameters meet ``x``: repeated over each block, or (``split``) shaped for
    ``x`` viewed as ``(..., blocks, g, ...)`` (no copy of the parameters per value)."""

    def __init__(self, grid: UniformGrid, axis: int, n: int, split: bool):
        self.shape, self.axis, self.g, self.n, self.split = grid.scale.shape, axis, grid.block_size, n, split

    def place(self, t: torch.Tensor) -> torch.Tensor:
        t = t.reshape(self.shape)
        return t.unsqueeze(self.axis + 1) if self.split else expand_blocks(t, self.axis, self.g, self.n)


def block_axis(x: torch.Tensor, grid: UniformGrid) -> int:
    """The blocked axis of ``grid`` on ``x`` (0..x.dim()-1), after checking that the block
    scales fit ``x``'s shape."""
    axis = check_axis(grid.axis, x.dim()) % x.dim()
    want = block_shape(x.shape, axis, grid.block_size)
    if tuple(grid.scale.shape) != want:
        raise ValueError(
            f"the grid's block scales have shape {tuple(grid.scale.shape)}, but x of shape "
            f"{tuple(x.shape)} in blocks of {grid.block_size} along axis {grid.axis} needs {want}")
    return axis


def param_layout(x: torch.Tensor, grid: UniformGrid, split: bool = False):
    """How the grid's parameters broadcast against ``x``: None (per tensor), a shape (per
    channel) or a block placement; ``split`` for ``x`` viewed as ``(..., blocks, g, ...)``."""
    if grid.blocked:
        axis = block_axis(x, grid)
        return _Blocked(grid, axis, x.shape[axis], split)
    return channel_shape(x, grid)


def channel_shape(x: torch.Tensor, grid: UniformGrid) -> tuple[int, ...] | None:
    """Shape that broadcasts a per-channel vector against ``x`` (None for per-tensor grids)."""
    if grid.axis is None:
        return None
    if grid.blocked:
        raise ValueError("a block grid has no per-channel shape; use param_layout")
    axis = check_axis(grid.axis, x.dim()) % x.dim()
    n = grid.n_channels
    if n is not None and n != x.shape[axis]:
        raise ValueError(
            f"the grid has {n} per-channel values but x.shape[{grid.axis}] = {x.shape[axis]}; "
            "they must match"
        )
    shape = [1] * x.dim()
    shape[axis] = x.shape[axis]
    return tuple(shape)

def grid_params(x: torch.Tensor, grid: UniformGrid, dtype: torch.dtype | None = None, *,
                split: bool = False):
    """Scale and offset as tensors broadcastable against ``x`` (x's device; x's dtype unless
    given). Block parameters are repeated over their blocks; with ``split``, shaped for ``x``
    viewed as ``(..., blocks, g, ...)`` instead (the blocked axis a multiple of g)."""
    if not isinstance(grid, UniformGrid):
        raise TypeError(f"grid must be a UniformGrid, got {type(grid).__name__}")
    shape = param_layout(x, grid, split)
    dtype = dtype or x.dtype
    return place_param(grid.scale, x, shape, dtype), place_param(grid.offset, x, shape, dtype)

def place_param(v, x: torch.Tensor, shape, dtype) -> torch.Tensor:
    if isinstance(v, torch.Tensor):
        t = v.to(device=x.device, dtype=dtype)
        if shape is None or t.numel() == 1:
            return t.reshape(())
        return shape.place(t) if isinstance(shape, _Blocked) else t.reshape(shape)
    return torch.tensor(float(v), dtype=dtype, device=x.device)

def zero_point_param(x: torch.Tensor, grid: UniformGrid, dtype: torch.dtype | None = None, *,
                     split: bool = False):
    """``(z, rest)`` for :func:`code_values`, broadcastable against ``x``, or None when no
    entry of the grid has an integer zero point (``rest`` is None when every entry has one)."""
    if grid._zp is None:
        return None
    return _shift(grid, dtype or x.dtype, x.device, param_layout(x, grid, split))


def _shift(grid: UniformGrid, dtype, device, shape):
    if grid._zp is None:
        return None

    def shaped(t):
        if shape is None or t.numel() == 1:
            return t.reshape(())
        return shape.place(t) if isinstance(shape, _Blocked) else t.reshape(shape)

    z = shaped(torch.as_tensor(grid._zp, dtype=dtype, device=device))
    if grid._whole is True:
        return z, None
    o = grid.offset_tensor().detach().to(device=device, dtype=dtype)
    rest = torch.where(grid._whole.to(device), torch.zeros_like(o), o)
    return z, shaped(rest)
