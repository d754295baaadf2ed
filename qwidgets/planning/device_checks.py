"""Device rules at the planning level: which scanned widths a plan may use, and whether the
scanned grids obey the rules (a table scanned without them cannot be planned under them)."""

from __future__ import annotations

import warnings
from collections.abc import Mapping

from ..core.device_rules import DeviceRules, check_rules

__all__ = ["scan_bits", "rules_allowed_bits"]


def scan_bits(bits: tuple[int, ...], rules: DeviceRules | None, quantize: str) -> tuple[int, ...]:
    """The widths of ``bits`` a scan under ``rules`` measures (those in the menus it uses)."""
    if check_rules(rules) is None:
        return bits
    keep = tuple(b for b in bits if _allowed(rules, b, quantize))
    if not keep:
        raise ValueError(f"none of bits={bits} is allowed by the device rules "
                         f"(weight_bits={rules.weight_bits}, input_bits={rules.input_bits})")
    dropped = sorted(set(bits) - set(keep))
    if dropped:
        warnings.warn(f"scan skips bit widths {dropped}: not allowed by the device rules", stacklevel=3)
    return keep


def rules_allowed_bits(table, rules: DeviceRules | None, allowed_bits, input_bits: int | None):
    """``allowed_bits`` for the solver narrowed to the device's menus (unchanged without rules).

    Raises ValueError when the assumed input width is not allowed, when no width is left, or
    when a scanned grid of an allowed width breaks the rules (the table was scanned without them).
    """
    if check_rules(rules) is None:
        return allowed_bits
    q = table.quantize
    if q == "weight" and input_bits is not None and not rules.allows_bits(input_bits, "input"):
        raise ValueError(f"assumed_input_bits={input_bits} is not allowed by the device rules; "
                         f"allowed: {rules.input_bits}")
    sides = {}
    if q in ("weight", "both", "separate"):
        sides["weight"] = tuple(table.bits)
    if q in ("input", "both", "separate"):
        sides["input"] = tuple(table.input_bits) if q == "separate" else tuple(table.bits)
    user = allowed_bits
    if user is not None and not isinstance(user, Mapping):
        user = {"input" if q == "input" else "weight": user}
    out = {}
    for side, widths in sides.items():
        keep = tuple(b for b in widths if rules.allows_bits(b, side)
                     and (user is None or side not in user or b in tuple(user[side])))
        if not keep:
            raise ValueError(f"none of the table's {side} widths {list(widths)} is allowed by the "
                             f"device rules ({side}_bits={rules.bits_menu(side)})")
        out[side] = keep
        _check_grids(table, rules, side, keep)
    return out


def _check_grids(table, rules: DeviceRules, side: str, widths) -> None:
    for name in table.layers:
        for b in widths:
            grid = table.weight_grid(name, b) if side == "weight" else table.input_grid(name, b)
            broken = [] if grid is None else rules.violations(grid, side)
            if broken:
                raise ValueError(f"the table's {side} grid of {name!r} at {b} bits breaks the device "
                                 f"rules ({'; '.join(broken)}); scan with rules= to fit grids the "
                                 "device can run")


def _allowed(rules: DeviceRules, b: int, quantize: str) -> bool:
    ok = True
    if quantize in ("weight", "both", "separate"):
        ok = ok and rules.allows_bits(b, "weight")
    if quantize in ("input", "both"):
        ok = ok and rules.allows_bits(b, "input")
    return ok
