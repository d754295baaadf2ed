"""Argument checks shared by every public entry point (one place; TypeError for a wrong type,
ValueError for a wrong value, each message naming the parameter and what was expected)."""

from __future__ import annotations

import math
from numbers import Integral, Real

import numpy as np
import torch

MAX_BITS = 16
_LOW_PRECISION = (torch.float16, torch.bfloat16)

def check_bits(bits, name: str = "bits") -> int:
    """Return ``bits`` as an int in 1..16, or raise a clear error."""
    if isinstance(bits, bool) or not isinstance(bits, Integral):
        raise TypeError(f"{name} must be an int in 1..{MAX_BITS}, got {bits!r} ({type(bits).__name__})")
    if not 1 <= int(bits) <= MAX_BITS:
        raise ValueError(f"{name} must be in 1..{MAX_BITS}, got {bits}")
    return int(bits)

def check_positive(value, name: str):
    """Check that a float or tensor is finite and > 0 everywhere; return it unchanged."""
    if isinstance(value, torch.Tensor):
        if not value.is_floating_point():
            raise TypeError(f"{name} must be a float tensor, got dtype {value.dtype}")
        v = value.detach()
        if not bool(torch.isfinite(v).all()):
            raise ValueError(f"{name} must be finite, got {describe_values(v)}")
        if not bool((v > 0).all()):
            raise ValueError(f"{name} must be > 0, got {describe_values(v)}")
        return value
    if isinstance(value, bool) or not isinstance(value, Real):
        raise TypeError(f"{name} must be a float or a float tensor, got {type(value).__name__}")
    if not math.isfinite(value):
        raise ValueError(f"{name} must be finite, got {value}")
    if value <= 0:
        raise ValueError(f"{name} must be > 0, got {value}")
    return float(value)

def check_finite(value, name: str):
    """Check that a float or tensor holds only finite numbers; return it (floats as float)."""
    if isinstance(value, torch.Tensor):
        if not value.is_floating_point():
            raise TypeError(f"{name} must be a float tensor, got dtype {value.dtype}")
        if not bool(torch.isfinite(value.detach()).all()):
            raise ValueError(f"{name} must be finite, got {describe_values(value.detach())}")
        return value
    if isinstance(value, bool) or not isinstance(value, Real):
        raise TypeError(f"{name} must be a float or a float tensor, got {type(value).__name__}")
    if not math.isfinite(value):
        raise ValueError(f"{name} must be finite, got {value}")
    return float(value)

def describe_values(t: torch.Tensor) -> str:
    """A short text for an error message: the value, or the offending values of a tensor."""
    if t.numel() == 1:
        return f"{t.item():g}"
    bad = t[~torch.isfinite(t) | (t <= 0)]
    show = bad if bad.numel() else t
    vals = ", ".join(f"{v:g}" for v in show.flatten()[:4].tolist())
    more = ", ..." if show.numel() > 4 else ""
    return f"tensor of shape {tuple(t.shape)} holding [{vals}{more}]"

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

def finite_check(x: torch.Tensor, name: str, error: type[Exception] = ValueError) -> None:
    """Raise ``error`` (ValueError) saying how many NaN / inf values ``x`` holds, if any."""
    # A sum is a cheap single read; it is non-finite whenever an element is (or on overflow,
    # which the exact count below tells apart).
    if x.numel() == 0 or bool(torch.isfinite(x.detach().sum())):
        return
    n_nan = int(torch.isnan(x).sum())
    n_inf = int(torch.isinf(x).sum())
    if n_nan or n_inf:
        raise error(
            f"{name} holds {n_nan} NaN and {n_inf} inf value(s) out of {x.numel()}; "
            "quantization needs finite numbers"
        )


def check_int(value, name: str, *, minimum: int | None = None, maximum: int | None = None,
              none_ok: bool = False) -> int | None:
    """Return ``value`` as an int within [minimum, maximum]: TypeError for a non-int (bools
    included), ValueError for an int out of range.

    >>> check_int(3, "steps", minimum=0)
    3
    >>> check_int(2.5, "steps")
    Traceback (most recent call last):
    ...
    TypeError: steps must be an int, got 2.5 (float)
    """
    if value is None and none_ok:
        return None
    want = _int_words(minimum, maximum, none_ok)
    if isinstance(value, bool) or not isinstance(value, Integral):
        raise TypeError(f"{name} must be {want}, got {value!r} ({type(value).__name__})")
    if (minimum is not None and value < minimum) or (maximum is not None and value > maximum):
        raise ValueError(f"{name} must be {want}, got {value}")
    return int(value)


def _int_words(minimum, maximum, none_ok) -> str:
    if minimum is not None and maximum is not None:
        words = f"an int in {minimum}..{maximum}"
    elif minimum is not None:
        words = f"an int >= {minimum}"
    elif maximum is not None:
        words = f"an int <= {maximum}"
    else:
        words = "an int"
    return f"None or {words}" if none_ok else words


def check_choice(value, options: tuple, name: str) -> str:
    """Return ``value`` if it is one of the strings ``options``: TypeError for a non-string,
    ValueError for another string.

    >>> check_choice("mse", ("minmax", "mse"), "method")
    'mse'
    """
    listed = ", ".join(map(repr, options))
    if not isinstance(value, str):
        raise TypeError(f"{name} must be one of {listed} (a str), got {value!r} ({type(value).__name__})")
    if value not in options:
        raise ValueError(f"{name} must be one of {listed}, got {value!r}")
    return value


def check_bool(value, name: str) -> bool:
    """Return ``value`` if it is True or False (TypeError otherwise: 0, 1 and "false" too)."""
    if not isinstance(value, bool):
        raise TypeError(f"{name} must be True or False, got {value!r} ({type(value).__name__})")
    return value


def check_axis(axis, ndim: int, name: str = "axis") -> int | None:
    """Return ``axis`` (None or an int valid for a tensor of ``ndim`` dimensions) unchanged.

    >>> check_axis(-1, 2), check_axis(None, 0)
    (-1, None)
    """
    if axis is None:
        return None
    if isinstance(axis, bool) or not isinstance(axis, Integral):
        raise TypeError(f"{name} must be None or an int, got {axis!r} ({type(axis).__name__})")
    if ndim == 0:
        raise ValueError(f"{name}={axis} needs a tensor with at least one dimension, got a scalar")
    if not -ndim <= axis < ndim:
        raise ValueError(f"{name}={axis} is out of range for a tensor with {ndim} dimension(s)")
    return int(axis)
