"""UniformGrid: the set of values a uniform quantizer may output.

A grid holds the integers ``k`` in ``[qmin, qmax]`` and maps them to ``scale * k + offset``.
Scale and offset are plain floats or tensors; tensors that require gradients keep them, so the
relaxed quantizer can learn them. With ``axis`` set, scale and offset hold one value per index
of that axis of the tensor being quantized (per-channel quantization).
"""

from __future__ import annotations

from numbers import Integral

import torch

from .checks import check_axis, check_bits, check_finite, check_positive, describe_values

__all__ = ["UniformGrid", "ZP_TOLERANCE", "integer_zero_point", "zero_points", "code_values", "channel_shape",
           "grid_params", "zero_point_param", "noise_param"]

# One rule decides whether a grid has an integer zero point Z (offset == -Z * scale): -offset /
# scale must lie within ZP_TOLERANCE * max(1, |Z|) of an integer. That is 4 float32 machine
# epsilons: the rounding that storing -Z * scale in float32 may cost, and nothing more, so a
# grid that has Z computes every value as (k - Z) * scale exactly. Grids decide it once, when
# they are made (``UniformGrid.zero_point``); quantization, export and the plan files all use
# that decision.
ZP_TOLERANCE = 4 * torch.finfo(torch.float32).eps


def integer_zero_point(scale, offset):
    """The integer Z with ``offset == -Z * scale`` under the one tolerance, or None.

    ``scale`` and ``offset`` are floats or tensors (broadcast against each other). Returns an
    int for scalars, an int64 tensor for tensors, or None when any entry is not an integer
    multiple (a grid has a zero point for all its channels or it has none).

    >>> integer_zero_point(0.1, -0.3), integer_zero_point(0.1, -(0.3 + 2e-5))
    (3, None)
    """
    z, whole = zero_points(scale, offset)
    return z if whole is True else None


def zero_points(scale, offset):
    """Entry by entry: ``(Z, whole)``, Z the nearest integer to ``-offset / scale`` where it is one
    under the tolerance (0 elsewhere) and ``whole`` True when every entry is, False when none
    is, else a bool tensor (a per-channel grid may have integer zero points on some channels)."""
    tensors = isinstance(scale, torch.Tensor) or isinstance(offset, torch.Tensor)
    # the decision is made in float64 on the stored values, whatever dtype later computes with them
    with torch.no_grad():
        s = torch.as_tensor(scale.detach() if isinstance(scale, torch.Tensor) else scale, dtype=torch.float64)
        o = torch.as_tensor(offset.detach() if isinstance(offset, torch.Tensor) else offset, dtype=torch.float64)
        z = -o / s
        zr = torch.round(z)
        mask = torch.abs(z - zr) <= ZP_TOLERANCE * torch.clamp(torch.abs(zr), min=1.0)
        zr = torch.where(mask, zr, 0.0) + 0.0
    if bool(mask.all()):
        whole = True
    elif not bool(mask.any()):
        whole = False
    else:
        whole = mask
    if zr.dim() == 0 or not tensors:
        return int(zr), whole
    return zr.to(torch.int64), whole


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

    Example
    -------
    >>> g = UniformGrid(3, 0.5)
    >>> g.levels.tolist()
    [-2.0, -1.5, -1.0, -0.5, 0.0, 0.5, 1.0, 1.5]
    >>> g.clip_range
    (-2.0, 1.5)
    """

    __slots__ = ("bits", "scale", "offset", "signed", "axis", "_zp", "_whole")
    _FIELDS = ("bits", "scale", "offset", "signed", "axis")

    def __init__(self, bits: int, scale, offset=0.0, signed: bool = True, axis: int | None = None):
        bits = check_bits(bits)
        if not isinstance(signed, bool):
            raise TypeError(f"signed must be a bool, got {signed!r}")
        if axis is not None and (isinstance(axis, bool) or not isinstance(axis, Integral)):
            raise TypeError(f"axis must be None or an int, got {axis!r}")
        scale = check_positive(scale, "scale")
        offset = check_finite(offset, "offset")
        for name, v in (("scale", scale), ("offset", offset)):
            if isinstance(v, torch.Tensor):
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
        ):
            raise ValueError(
                f"scale has {scale.numel()} channels but offset has {offset.numel()}; they must match"
            )
        zp, whole = zero_points(scale, offset)
        if whole is not False:
            offset = _derived_offset(zp, whole, scale, offset)
        object.__setattr__(self, "_zp", None if whole is False else zp)
        object.__setattr__(self, "_whole", whole)
        object.__setattr__(self, "bits", bits)
        object.__setattr__(self, "scale", scale)
        object.__setattr__(self, "offset", offset)
        object.__setattr__(self, "signed", signed)
        object.__setattr__(self, "axis", None if axis is None else int(axis))

    def __setattr__(self, name, value):
        raise AttributeError("UniformGrid is immutable; use .replace(...) to make a changed copy")

    # immutable, so a copy is the grid itself; pickling rebuilds it through __init__ (a planned
    # model copy holding grids in its hooks can be deep-copied and saved)
    def __copy__(self) -> UniformGrid:
        return self

    def __deepcopy__(self, memo) -> UniformGrid:
        return self

    def __reduce__(self):
        return (UniformGrid, (self.bits, self.scale, self.offset, self.signed, self.axis))

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
        return self.axis is not None

    @property
    def n_channels(self) -> int | None:
        """Number of channels the scale / offset carry (None for a per-tensor grid or scalars)."""
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
        if self.axis is None:
            return t.reshape(())
        n = self.n_channels
        t = t.reshape(-1)
        return t.expand(n) if (n is not None and t.numel() == 1) else t

    @property
    def levels(self) -> torch.Tensor:
        """All grid values, ascending: shape ``(n_levels,)``, or ``(channels, n_levels)``."""
        # Same arithmetic as ``quantize`` on default-dtype input, so its outputs are members.
        dtype = torch.get_default_dtype()
        k = torch.arange(self.qmin, self.qmax + 1, dtype=dtype)
        s = self.scale_tensor().detach().to(dtype)
        o = self.offset_tensor().detach().to(dtype)
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
    def zero_point(self):
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
    def replace(self, **changes) -> UniformGrid:
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
        return (
            f"UniformGrid(bits={self.bits}, scale={fmt(self.scale)}, offset={fmt(self.offset)}, "
            f"signed={self.signed}{ax})"
        )

def _derived_offset(zp, whole, scale, offset):
    """``-zp * scale`` in the type the offset was given in (a learned offset keeps its graph),
    on the entries that have an integer zero point (``whole``)."""
    if isinstance(offset, torch.Tensor) and offset.requires_grad:
        return offset  # learning: the value stays as given, quantization computes (k - Z) * s
    if whole is not True:  # some channels only: derive those, keep the others
        s = scale.detach() if isinstance(scale, torch.Tensor) else torch.tensor(float(scale))
        o = offset.detach() if isinstance(offset, torch.Tensor) else torch.tensor(float(offset), dtype=s.dtype)
        derived = -(torch.as_tensor(zp, dtype=s.dtype) * s) + 0.0
        shape = torch.broadcast_shapes(derived.shape, o.shape, whole.shape)
        return torch.where(whole.reshape(shape) if whole.numel() > 1 else whole, derived.to(o.dtype), o)
    if not bool(torch.as_tensor(zp).any()):  # Z = 0: offset 0, in the type it was given
        return torch.zeros_like(offset) if isinstance(offset, torch.Tensor) else 0.0
    if not isinstance(scale, torch.Tensor) and not isinstance(offset, torch.Tensor):
        return -zp * scale + 0.0
    s = scale.detach() if isinstance(scale, torch.Tensor) else torch.tensor(float(scale), dtype=offset.dtype)
    z = torch.as_tensor(zp, dtype=s.dtype)
    value = (-(z * s) + 0.0)
    if isinstance(offset, torch.Tensor):
        value = torch.broadcast_to(value, torch.broadcast_shapes(value.shape, offset.shape))
        return value.to(offset.dtype).reshape(offset.shape) if value.numel() == offset.numel() else value
    return float(value) if value.numel() == 1 else value


def channel_shape(x: torch.Tensor, grid: UniformGrid) -> tuple[int, ...] | None:
    """Shape that broadcasts a per-channel vector against ``x`` (None for per-tensor grids)."""
    if grid.axis is None:
        return None
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

def grid_params(x: torch.Tensor, grid: UniformGrid, dtype: torch.dtype | None = None):
    """Scale and offset as tensors broadcastable against ``x`` (x's device; x's dtype unless given)."""
    if not isinstance(grid, UniformGrid):
        raise TypeError(f"grid must be a UniformGrid, got {type(grid).__name__}")
    shape = channel_shape(x, grid)
    dtype = dtype or x.dtype
    return _param(grid.scale, x, shape, dtype), _param(grid.offset, x, shape, dtype)

def _param(v, x: torch.Tensor, shape, dtype) -> torch.Tensor:
    if isinstance(v, torch.Tensor):
        t = v.to(device=x.device, dtype=dtype)
        if shape is None or t.numel() == 1:
            return t.reshape(())
        return t.reshape(shape)
    return torch.tensor(float(v), dtype=dtype, device=x.device)

def zero_point_param(x: torch.Tensor, grid: UniformGrid, dtype: torch.dtype | None = None):
    """``(z, rest)`` for :func:`code_values`, broadcastable against ``x``, or None when no
    entry of the grid has an integer zero point (``rest`` is None when every entry has one)."""
    if grid._zp is None:
        return None
    return _shift(grid, dtype or x.dtype, x.device, channel_shape(x, grid))


def _shift(grid: UniformGrid, dtype, device, shape):
    if grid._zp is None:
        return None

    def shaped(t):
        return t.reshape(()) if shape is None or t.numel() == 1 else t.reshape(shape)

    z = shaped(torch.as_tensor(grid._zp, dtype=dtype, device=device))
    if grid._whole is True:
        return z, None
    o = grid.offset_tensor().detach().to(device=device, dtype=dtype)
    rest = torch.where(grid._whole.to(device), torch.zeros_like(o), o)
    return z, shaped(rest)


def noise_param(noise, x: torch.Tensor, grid: UniformGrid, name: str = "noise") -> torch.Tensor:
    """The logistic noise width as a tensor broadcastable against ``x`` (scalar or per channel)."""
    check_positive(noise, name)
    if isinstance(noise, torch.Tensor) and noise.numel() > 1:
        shape = channel_shape(x, grid)
        if shape is None:
            raise ValueError(f"{name} has {noise.numel()} values but the grid is per-tensor; give one")
        n = shape[grid.axis % x.dim()]
        if noise.numel() != n:
            raise ValueError(f"{name} has {noise.numel()} values but the tensor has {n} channels")
        return noise.to(device=x.device, dtype=x.dtype).reshape(shape)
    return _param(noise, x, None, x.dtype)
