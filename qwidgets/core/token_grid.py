"""TokenGrid: a dynamic input grid, one scale per row (token) computed at run time.

Where :class:`~qwidgets.core.grid.UniformGrid` holds a scale fitted beforehand, a token grid
holds only its width: every row of the tensor it quantizes gets its own scale from that row's
values, at run time. A row ("token") is one index of every axis but the last; its values are
the last axis (a sequence ``[batch, tokens, features]`` has one row per token).

The rule (chosen here, and the one the ONNX export computes in its graph): symmetric, signed,
min-max per row. With ``m`` the row's largest ``|x|`` and ``qmax = 2**(bits-1) - 1``, the
row's scale is ``S = max(m / qmax, tiny)`` (``tiny`` float32's smallest normal number, so an
all-zero row quantizes to zeros instead of dividing by zero), its codes
``k = clamp(round(x / S), -qmax, qmax)`` (ties to even; the code ``-2**(bits-1)`` is never
used, so the range is symmetric and the zero point is 0), its values ``k * S``. Every value of
a row lies inside its range, so nothing is clipped. All in float32 (the arithmetic of
QuantizeLinear / DequantizeLinear with a float32 scale), so the export reproduces it exactly.

A token grid stores nothing (no scale in the file, nothing in the weight budget); its BOPs are
those of a static grid of the same width.
"""

from __future__ import annotations

import torch

from .checks import check_bits

__all__ = ["TokenGrid", "TINY_SCALE", "row_scales", "quantize_rows"]

TINY_SCALE = float(torch.finfo(torch.float32).tiny)  # the least row scale (an all-zero row)


class TokenGrid:
    """A per-row (per-token) dynamic grid of ``bits`` bits: symmetric signed min-max per row.

    >>> import torch
    >>> from qwidgets import quantize
    >>> g = TokenGrid(4)
    >>> g.bits, g.granularity, g.qmax
    (4, 'token', 7)
    >>> quantize(torch.tensor([[7.0, -2.5, 0.4], [14.0, 3.0, -5.0]]), g).tolist()  # scales 1 and 2
    [[7.0, -2.0, 0.0], [14.0, 4.0, -4.0]]
    """

    __slots__ = ("bits",)
    signed = True
    axis = -1  # the axis each row's values lie along (rows: every other axis)
    granularity = "token"
    blocked = False
    per_channel = False

    def __init__(self, bits: int):
        bits = check_bits(bits)
        if bits < 2:
            raise ValueError(f"bits of a TokenGrid must be >= 2 (a symmetric signed grid), got {bits}")
        object.__setattr__(self, "bits", bits)

    def __setattr__(self, name, value):
        raise AttributeError("TokenGrid is immutable")

    def __copy__(self) -> TokenGrid:
        return self

    def __deepcopy__(self, memo) -> TokenGrid:
        return self

    def __reduce__(self):
        return (TokenGrid, (self.bits,))

    def __eq__(self, other) -> bool:
        return isinstance(other, TokenGrid) and other.bits == self.bits

    def __hash__(self) -> int:
        return hash(("token", self.bits))

    @property
    def qmax(self) -> int:
        """The largest code; codes lie in ``[-qmax, qmax]`` (symmetric)."""
        return 2 ** (self.bits - 1) - 1

    @property
    def qmin(self) -> int:
        return -self.qmax

    def has_zero_point(self) -> bool:
        return True

    @property
    def zero_point(self) -> int:
        return 0

    def detached(self) -> TokenGrid:
        return self

    def __repr__(self) -> str:
        return f"TokenGrid(bits={self.bits})"


def row_scales(x: torch.Tensor, grid: TokenGrid) -> torch.Tensor:
    """Each row's scale, float32, with the last axis kept (size 1): ``max(max|x| / qmax, tiny)``."""
    x = x.float()
    if x.dim() == 0:
        x = x.reshape(1)
    m = x.detach().abs().amax(dim=-1, keepdim=True)
    return torch.clamp_min(m / float(grid.qmax), TINY_SCALE)


def quantize_rows(x: torch.Tensor, grid: TokenGrid, out_dtype: torch.dtype | None = None) -> torch.Tensor:
    """``x`` on each row's own grid (see the module docstring); gradients pass straight through
    the rounding (the scale is computed from the values, not learned)."""
    if out_dtype is None:
        out_dtype = x.dtype if x.is_floating_point() else torch.float32
    shape = x.shape
    xf = x.float()
    if xf.dim() == 0:
        xf = xf.reshape(1)
    s = row_scales(xf, grid)
    k = torch.clamp(torch.round(xf.detach() / s), -grid.qmax, grid.qmax)
    value = k * s
    if xf.requires_grad:
        value = xf + (value - xf).detach()
    return value.to(out_dtype).reshape(shape)
