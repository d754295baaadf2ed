"""Device rules at the planning level: which scanned widths a plan may use, and whether the
scanned grids obey the rules (a table scanned without them cannot be planned under them)."""

from __future__ import annotations

from collections.abc import Mapping

from ..core.device_rules import DeviceRules, check_rules

__all__ = ["scan_bits", "rules_allowed_bits"]


def scan_bits(bits: tuple[int, ...], rules: DeviceRules | None, quantize: str,
              name: str = "bits") -> tuple[int, ...]:
    """``bits`` (given as ``name``), checked against the menus a scan under ``rules`` uses.

    A width the rules do not allow is an error naming it and the call that scans what the
    device runs (a scan never measures fewer widths than it was asked for).
    """
    if check_rules(rules) is None:
        return bits
    dropped = [b for b in bits if not _allowed(rules, b, quantize)]
    if not dropped:
        return bits
    menus = f"weight_bits={rules.weight_bits}, input_bits={rules.input_bits}"
    raise ValueError(f"{name}={bits} asks for width(s) {dropped} that the device rules do not allow "
                     f"for quantize={quantize!r} ({menus}); {_suggestion(bits, rules, quantize, name)}")


def _suggestion(bits: tuple[int, ...], rules: DeviceRules, quantize: str, name: str) -> str:
    """The scan call that measures what the device runs, for :func:`scan_bits`' error."""
    def menu(role):
        keep = tuple(b for b in bits if rules.allows_bits(b, role))
        return keep or rules.bits_menu(role)

    if quantize == "both":
        wb, ib = menu("weight"), menu("input")
        if wb == ib:
            return f"scan with bits={wb}"
        return (f"with different weight and input menus, scan the weights and the inputs each at "
                f"their own widths: scan(model, data, quantize='separate', bits={wb}, "
                f"input_bits={ib}, rules=rules)")
    role = "input" if quantize == "input" or name == "input_bits" else "weight"
    return f"scan with {name}={menu(role)}"


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
