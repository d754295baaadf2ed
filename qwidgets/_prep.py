"""Input checks and broadcasting shared by the quantizers (one place, validated once)."""

from __future__ import annotations

import numpy as np
import torch

from .grid import UniformGrid, check_positive

_LOW_PRECISION = (torch.float16, torch.bfloat16)


def as_input(x, name: str = "x", *, check_finite: bool = True) -> tuple[torch.Tensor, torch.dtype]:
    """Validate a tensor to be quantized; return (compute tensor, dtype to return).

    float32 / float64 are used as they are; float16 / bfloat16 are computed in float32 and the
    result is cast back; integer tensors are cast to float32 (their values are exact there up
    to 2**24). Bool and complex tensors are refused. The caller's tensor is never modified.
    """
    if isinstance(x, np.ndarray):
        x = torch.from_numpy(x)
    if not isinstance(x, torch.Tensor):
        raise TypeError(f"{name} must be a torch.Tensor, got {type(x).__name__}")
    if x.dtype == torch.bool or x.is_complex():
        raise TypeError(f"{name} must hold real numbers, got dtype {x.dtype}")
    out_dtype = x.dtype
    if x.dtype in _LOW_PRECISION:
        x = x.float()
    elif not x.is_floating_point():
        x = x.float()
        out_dtype = torch.float32
    if check_finite:
        finite_check(x, name)
    return x, out_dtype


def finite_check(x: torch.Tensor, name: str) -> None:
    """Raise ValueError saying how many NaN / inf values ``x`` holds, if any."""
    # A sum is a cheap single read; it is non-finite whenever an element is (or on overflow,
    # which the exact count below tells apart).
    if x.numel() == 0 or bool(torch.isfinite(x.detach().sum())):
        return
    n_nan = int(torch.isnan(x).sum())
    n_inf = int(torch.isinf(x).sum())
    if n_nan or n_inf:
        raise ValueError(
            f"{name} holds {n_nan} NaN and {n_inf} inf value(s) out of {x.numel()}; "
            "quantization needs finite numbers"
        )


def channel_shape(x: torch.Tensor, grid: UniformGrid) -> tuple[int, ...] | None:
    """Shape that broadcasts a per-channel vector against ``x`` (None for per-tensor grids)."""
    if grid.axis is None:
        return None
    if x.dim() == 0:
        raise ValueError(f"axis={grid.axis} needs a tensor with at least one dimension, got a scalar")
    if not -x.dim() <= grid.axis < x.dim():
        raise ValueError(f"axis={grid.axis} is out of range for a tensor with {x.dim()} dimension(s)")
    axis = grid.axis % x.dim()
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
