"""DeviceRules: what a target device can run, and fitting grids that obey it.

Integer accelerators and kernels often need power-of-two scales (a shift instead of a
multiply), symmetric weight grids (zero point 0), one scale per activation tensor, or a fixed
menu of bit widths. A plan fitted without those rules is measured under conditions the device
cannot run; every grid made under ``rules`` obeys them exactly (common practice).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

import torch

from .blocks import SCALE_BITS, block_sums
from .checks import check_bits
from .grid import UniformGrid
from .rounding import quantize
from .token_grid import TokenGrid

__all__ = ["DeviceRules", "ROLES", "power_of_two_fit", "is_power_of_two", "conform_grid"]

ROLES = ("weight", "input")

# Powers of two tried around the fitted scale 2**e (e = floor(log2(scale))): by the MSE method
# every power from 2**(e-8) to 2**(e+2); by min-max / percentile the two powers that bracket it.
_MSE_BELOW, _MSE_ABOVE = 8, 2


@dataclass(frozen=True)
class DeviceRules:
    """The grids a device can run.

    Parameters
    ----------
    pow2_scales : every scale an exact power of two
    symmetric_weights : weight grids have zero point 0
    per_channel_weights : the device takes one weight scale per output channel (False: one per
        tensor)
    per_tensor_inputs : input (activation) grids have one scale and zero point per tensor
    weight_bits, input_bits : the allowed widths (e.g. ``(4, 8)``), or None for any in 1..16
    scale_bits : how the device stores a block grid's scales: 16 (float16, the default, common
        practice) or 32 (float32). Fitted block scales are rounded to that format, and each
        block pays ``scale_bits`` in a plan's storage.

    Every grid made under rules also has an integer zero point (the device computes
    ``r = S (q - Z)``), so mid-rise grids are refused.

    >>> rules = DeviceRules(pow2_scales=True, symmetric_weights=True, weight_bits=(4, 8))
    >>> rules.allows_bits(6, "weight"), rules.allows_bits(6, "input")
    (False, True)
    >>> rules.obeys(UniformGrid(4, 0.25), "weight"), rules.obeys(UniformGrid(4, 0.3), "weight")
    (True, False)
    """

    pow2_scales: bool = False
    symmetric_weights: bool = False
    per_channel_weights: bool = True
    per_tensor_inputs: bool = True
    weight_bits: tuple[int, ...] | None = None
    input_bits: tuple[int, ...] | None = None
    scale_bits: int = 16

    def __post_init__(self):
        for name in ("pow2_scales", "symmetric_weights", "per_channel_weights", "per_tensor_inputs"):
            v = getattr(self, name)
            if not isinstance(v, bool):
                raise TypeError(f"{name} must be True or False, got {v!r}")
        for name in ("weight_bits", "input_bits"):
            object.__setattr__(self, name, _menu(getattr(self, name), name))
        if isinstance(self.scale_bits, bool) or self.scale_bits not in SCALE_BITS:
            raise ValueError(f"scale_bits must be one of {SCALE_BITS}, got {self.scale_bits!r}")

    # ------------------------------------------------------------------ widths
    def bits_menu(self, role: str) -> tuple[int, ...] | None:
        """The allowed widths for ``role`` ("weight" or "input"), or None for any."""
        return self.weight_bits if check_role(role) == "weight" else self.input_bits

    def allows_bits(self, bits: int, role: str) -> bool:
        menu = self.bits_menu(role)
        return menu is None or check_bits(bits) in menu

    def allowed_bits(self, candidates: Iterable[int], role: str) -> tuple[int, ...]:
        """The ``candidates`` the rules allow for ``role``, in order."""
        return tuple(b for b in candidates if self.allows_bits(b, role))

    def check_bits(self, bits: int, role: str, name: str = "bits") -> int:
        bits = check_bits(bits, name)
        if not self.allows_bits(bits, role):
            raise ValueError(f"{name}={bits} is not allowed for {role}s by the device rules; "
                             f"allowed: {self.bits_menu(role)}")
        return bits

    # ------------------------------------------------------------------ grids
    def fit_options(self, role: str, *, symmetric: bool, style: str,
                    axis: int | None) -> tuple[bool, str, int | None]:
        """(symmetric, style, axis) for fitting a ``role`` grid under the rules; raises on conflicts."""
        role = check_role(role)
        if style != "midtread":
            raise ValueError(f"style={style!r} has no integer zero point; device rules need "
                             "style='midtread'")
        if role == "weight":
            if self.symmetric_weights and not symmetric:
                raise ValueError("symmetric=False conflicts with the device rules "
                                 "(symmetric_weights=True): weight grids must have zero point 0")
            if axis is not None and not self.per_channel_weights:
                raise ValueError(f"axis={axis} (per-channel weights) conflicts with the device "
                                 "rules (per_channel_weights=False); use axis=None")
        elif axis is not None and self.per_tensor_inputs:
            raise ValueError(f"axis={axis} (per-channel inputs) conflicts with the device rules "
                             "(per_tensor_inputs=True); use axis=None")
        return symmetric, style, axis

    def weight_axis(self, axis: int | None = 0) -> int | None:
        """The axis a weight grid may use: ``axis`` if per-channel weights are allowed, else None."""
        return axis if self.per_channel_weights else None

    def violations(self, grid: UniformGrid | TokenGrid, role: str) -> list[str]:
        """What about ``grid`` breaks the rules for ``role`` (empty when it obeys them)."""
        if isinstance(grid, TokenGrid):  # a scale per row, computed at run time
            role = check_role(role)
            out = [] if self.allows_bits(grid.bits, role) else [
                f"{grid.bits} bits is not in the {role} menu {self.bits_menu(role)}"]
            if role != "input" or self.per_tensor_inputs or self.pow2_scales:
                out.append("per-token grid (a scale per row at run time), but the device takes "
                           + ("power-of-two scales" if self.pow2_scales else "one input scale per tensor"))
            return out
        if not isinstance(grid, UniformGrid):
            raise TypeError(f"grid must be a UniformGrid or a TokenGrid, got {type(grid).__name__}")
        role = check_role(role)
        out = []
        if not self.allows_bits(grid.bits, role):
            out.append(f"{grid.bits} bits is not in the {role} menu {self.bits_menu(role)}")
        if not grid.has_zero_point():
            out.append("no integer zero point")
        elif role == "weight" and self.symmetric_weights:
            if bool((torch.as_tensor(grid.zero_point) != 0).any()):
                out.append("weight zero point is not 0")
        if self.pow2_scales and not is_power_of_two(grid.scale_tensor()):
            out.append("scale is not a power of two")
        if role == "weight" and grid.axis is not None and not self.per_channel_weights:
            out.append("per-channel weight grid, but the device takes one scale per tensor")
        if role == "input" and grid.axis is not None and self.per_tensor_inputs:
            out.append("per-channel input grid, but the device takes one scale per tensor")
        return out

    def obeys(self, grid: UniformGrid, role: str) -> bool:
        return not self.violations(grid, role)


def check_role(role) -> str:
    if role not in ROLES:
        raise ValueError(f"role must be one of {ROLES}, got {role!r}")
    return role


def check_rules(rules) -> DeviceRules | None:
    if rules is not None and not isinstance(rules, DeviceRules):
        raise TypeError(f"rules must be a DeviceRules or None, got {type(rules).__name__}")
    return rules


def _menu(v, name: str):
    if v is None:
        return None
    if isinstance(v, (str, bytes)) or not isinstance(v, Iterable):
        raise TypeError(f"{name} must be None or a sequence of ints in 1..16, got {v!r}")
    menu = tuple(sorted({check_bits(b, name) for b in v}))
    if not menu:
        raise ValueError(f"{name} must list at least one width, or be None for any")
    return menu


def is_power_of_two(t) -> bool:
    """Whether every value of ``t`` (a float or tensor) is an exact power of two."""
    t = torch.as_tensor(t).detach()
    if not bool((t > 0).all()):
        return False
    mantissa, _ = torch.frexp(t)
    return bool((mantissa == 0.5).all())


# ---------------------------------------------------------------------------- fitting
def power_of_two_fit(x: torch.Tensor, grid: UniformGrid, method: str) -> UniformGrid:
    """The grid like ``grid`` (fitted to ``x``) whose scale is the power of two with the least
    squared error on ``x`` (per channel for per-channel grids), not the nearest power.

    Candidates around ``2**e <= scale < 2**(e+1)``: with ``method="mse"`` every power from
    ``2**(e-8)`` to ``2**(e+2)``, otherwise ``2**e`` and ``2**(e+1)``; ties go to the smaller
    power. Symmetric grids keep offset 0; asymmetric ones keep their clipping range centred,
    with the integer zero point ``Z`` (clamped to the code range) nearest to that.

    >>> g = power_of_two_fit(torch.tensor([-1.0, 0.2, 0.5]), UniformGrid(3, 1 / 3), "minmax")
    >>> g.scale
    0.25
    """
    with torch.no_grad():
        xd = x.detach().float()
        s = grid.scale_tensor().detach().double()
        e = torch.floor(torch.log2(s))
        lo_d, hi_d = (-_MSE_BELOW, _MSE_ABOVE) if method == "mse" else (0, 1)
        symmetric = grid.has_zero_point() and bool((torch.as_tensor(grid.zero_point) == 0).all())
        lo, hi = (torch.as_tensor(v).double() for v in grid.clip_range)
        best_err = best_s = best_o = None
        for d in range(lo_d, hi_d + 1):
            cand_s = torch.exp2(e + d)
            if symmetric:
                cand_o = torch.zeros_like(cand_s)
            else:  # centre the clipping range, integer zero point
                mid_code = (grid.qmin + grid.qmax) / 2
                z = torch.round(mid_code - (lo + hi) / (2 * cand_s)).clamp(grid.qmin, grid.qmax)
                cand_o = -z * cand_s
            cand = _like(grid, cand_s, cand_o)
            err = _sq_error(xd, quantize(xd, cand), grid)
            if best_err is None:
                best_err, best_s, best_o = err, cand_s, cand_o
            else:
                better = err < best_err
                best_err = torch.where(better, err, best_err)
                best_s = torch.where(better, cand_s, best_s)
                best_o = torch.where(better, cand_o, best_o)
        return _like(grid, best_s, best_o)


def conform_grid(grid: UniformGrid, x: torch.Tensor, rules: DeviceRules, role: str) -> UniformGrid:
    """The grid nearest to ``grid`` (a learned or hand-set one) that obeys ``rules``, fitted on ``x``.

    The zero point is rounded to an integer (0 for symmetric weights); with power-of-two
    scales the scale is the power with the least squared error on ``x`` among those around it
    (as :func:`power_of_two_fit` with the MSE candidates). Widths outside the menu and
    per-channel grids the device cannot take are refused (they are choices, not roundings).

    >>> rules = DeviceRules(pow2_scales=True, symmetric_weights=True)
    >>> g = conform_grid(UniformGrid(4, 0.3, offset=0.05), torch.linspace(-2, 2, 101), rules, "weight")
    >>> g.scale, g.zero_point
    (0.25, 0)
    """
    if not isinstance(grid, UniformGrid):
        raise TypeError(f"grid must be a UniformGrid, got {type(grid).__name__}")
    if check_rules(rules) is None:
        raise TypeError("rules must be a DeviceRules, got None")
    role = check_role(role)
    rules.check_bits(grid.bits, role, "grid.bits")
    rules.fit_options(role, symmetric=True, style="midtread", axis=grid.axis)
    g = grid.detached()
    if role == "weight" and rules.symmetric_weights:
        g = g.replace(offset=torch.zeros_like(g.offset) if isinstance(g.offset, torch.Tensor) else 0.0)
    elif not g.has_zero_point():
        g = g.snapped()
    if rules.pow2_scales and not is_power_of_two(g.scale_tensor()):
        g = power_of_two_fit(x, g, "mse")
    return g


def _like(grid: UniformGrid, s: torch.Tensor, o: torch.Tensor) -> UniformGrid:
    if grid.blocked:
        dev = grid.scale.device
        return grid.replace(scale=s.reshape(grid.scale.shape).to(dev, torch.float32),
                            offset=o.reshape(grid.scale.shape).to(dev, torch.float32) + 0.0)
    if grid.axis is None:
        return grid.replace(scale=float(s.reshape(())), offset=float(o.reshape(())) + 0.0)
    dev = grid.scale_tensor().device
    return grid.replace(scale=s.reshape(-1).to(dev, torch.float32),
                        offset=o.reshape(-1).to(dev, torch.float32) + 0.0)


def _sq_error(x: torch.Tensor, q: torch.Tensor, grid: UniformGrid) -> torch.Tensor:
    """Squared error per tensor, channel or block (the grid's parameter layout)."""
    diff = (q.double() - x.double()).square()
    axis = grid.axis
    if axis is None:
        return diff.sum()
    if grid.blocked:
        return block_sums(diff, axis % x.dim(), grid.block_size)
    return diff.movedim(axis, 0).reshape(diff.shape[axis], -1).sum(dim=1)

