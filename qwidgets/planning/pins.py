"""Pinning one entry's choice (``plan_budget(fixed=...)``), the scanned width menus, and the
input granularity menu (``allowed_input_granularity``)."""

from __future__ import annotations

from collections.abc import Mapping
from numbers import Integral

from .granularity import check_granularity
from .input_granularity import check_input_granularity

__all__ = ["menus", "pin_entry", "has_input_rows", "allowed_input_options"]


def menus(table) -> tuple[tuple, tuple]:
    """Scanned (weight widths, input widths) of the table's options."""
    q = table.quantize
    if q == "weight":
        return table.bits, ()
    if q == "input":
        return (), table.bits
    if q == "both":
        return table.bits, table.bits
    return table.bits, tuple(table.input_bits)


def pin_entry(table, name: str, value) -> tuple:
    """``fixed[name]`` as (weight bits, input bits, granularity, input granularity), None where
    not pinned."""
    where = f"fixed[{name!r}]"
    act = table.kind(name) == "activation"
    pg = pig = None
    if isinstance(value, Mapping):
        extra = [k for k in value if k not in ("bits", "input_bits", "granularity", "input_granularity")]
        if extra or not value:
            raise ValueError(f"{where} as a dict takes 'bits', 'input_bits', 'granularity' and / or "
                             f"'input_granularity', got {sorted(map(str, value))}")
        if "input_granularity" in value:
            pig = _pinned_input_option(table, name, value["input_granularity"], where)
            value = {k: v for k, v in value.items() if k != "input_granularity"}
        if "granularity" in value:
            pg = check_granularity((value["granularity"],), name=f"{where}['granularity']")[0]
            if pg not in table.granularities:
                raise ValueError(f"{where}: granularity {pg!r} was not scanned; scanned: "
                                 f"{list(table.granularities)}")
        if not value:
            return None, None, pg, pig
        if "bits" in value and "input_bits" in value:
            value = (value["bits"], value["input_bits"])
        elif "bits" in value or "input_bits" in value:
            b = value.get("bits", value.get("input_bits"))
            if isinstance(b, bool) or not isinstance(b, Integral):
                raise TypeError(f"{where}: widths must be ints, got {b!r}")
            if "input_bits" in value and table.quantize != "input":
                value = (None, int(b))
            else:
                value = int(b)
        else:
            return None, None, pg, pig
    if isinstance(value, tuple) and len(value) == 2 and value[0] is None:
        pw, pi = None, int(value[1])
    elif isinstance(value, Integral) and not isinstance(value, bool):
        pw, pi = (None, int(value)) if (table.quantize == "input" or act) else (int(value), None)
    elif isinstance(value, tuple) and len(value) == 2 and all(
            isinstance(b, Integral) and not isinstance(b, bool) for b in value):
        pw, pi = int(value[0]), int(value[1])
    else:
        raise TypeError(f"{where} must be a width (int) or a (weight bits, input bits) pair of ints, "
                        f"got {value!r}")
    w_all, i_all = menus(table)
    if act and pw is not None:
        raise ValueError(f"{where}: {name!r} is an activation (no weight); pin its width as one int")
    if act and table.quantize == "both":
        i_all = table.bits
    if pw is not None and pw not in w_all:
        raise ValueError(f"{where}: weight width {pw} is not among the table's weight widths {list(w_all)}")
    if pi is not None and pi not in i_all:
        raise ValueError(f"{where}: input width {pi} is not among the table's input widths {list(i_all)}"
                         + ("; scan with quantize='separate' to plan inputs" if not i_all else ""))
    if table.quantize == "both" and pw is not None and pi is not None and pw != pi:
        raise ValueError(f"{where}: a table scanned with quantize='both' uses one width for weights "
                         f"and input, got {value!r}")
    if table.quantize == "both" and not act:
        pw = pi = pw if pw is not None else pi
    if pi is not None and not has_input_rows(table, name):
        raise ValueError(f"{where}: {name!r} has no input rows; pin its weight width only")
    return pw, pi, pg, pig


def has_input_rows(table, name: str) -> bool:
    """Whether the table offers input widths for entry ``name``."""
    if table.quantize in ("input", "both"):
        return True
    return table.quantize == "separate" and table.has_input_rows(name)


def _pinned_input_option(table, name: str, value, where: str) -> str:
    opt = check_input_granularity((value,), f"{where}['input_granularity']")[0]
    if opt not in table.input_granularities:
        raise ValueError(f"{where}: input granularity {opt!r} was not scanned; scanned: "
                         f"{list(table.input_granularities)} (scan with input_granularity=)")
    if not has_input_rows(table, name) or table.quantize != "separate" and opt != "tensor":
        raise ValueError(f"{where}: {name!r} has no input rows to quantize per {opt}")
    return opt


def allowed_input_options(table, allowed) -> tuple:
    """The input granularities entries without a pinned one may take (None: every scanned)."""
    if allowed is None:
        return tuple(table.input_granularities)
    allowed = check_input_granularity(allowed, "allowed_input_granularity")
    missing = [g for g in allowed if g not in table.input_granularities]
    if missing:
        raise ValueError(f"allowed_input_granularity holds {missing}, which the table did not scan; "
                         f"scanned: {list(table.input_granularities)}")
    return allowed
