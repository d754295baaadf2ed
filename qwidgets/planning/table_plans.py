"""Plans from a SensitivityTable's scanned grids (``SensitivityTable.make_plan``)."""

from __future__ import annotations

from collections.abc import Mapping

from ..core.checks import check_bits
from ..core.renamed import take_renamed
from .plan import Plan


def plan_from_table(table, bits, chosen_input_bits, assumed_input_bits, predicted_sqnr_db,
                    renamed: dict) -> Plan:
    """What :meth:`SensitivityTable.make_plan` returns (its arguments, checked here)."""
    if renamed:
        old = renamed.get("input_bits")  # chosen widths on a separate table, else BOPs' width
        new = "chosen_input_bits" if isinstance(old, Mapping) or table.quantize == "separate" \
            else "assumed_input_bits"
        given = take_renamed(renamed, {"input_bits": new}, "SensitivityTable.make_plan")
        chosen_input_bits = given.get("chosen_input_bits", chosen_input_bits)
        assumed_input_bits = given.get("assumed_input_bits", assumed_input_bits)
    if not isinstance(bits, Mapping):
        raise TypeError(f"bits must be a mapping from entry name to bit width, got {type(bits).__name__}")
    if not bits:
        raise ValueError("bits must be a non-empty mapping from entry name to bit width")
    unknown = [n for n in bits if n not in table._index]
    if unknown:
        raise KeyError(f"layers {unknown} are not in the table; layers: {table.layers}")
    per_entry = isinstance(chosen_input_bits, Mapping)
    if chosen_input_bits is not None and table.quantize != "separate":
        raise ValueError("chosen_input_bits needs a table scanned with quantize='separate' "
                         f"(this one: quantize={table.quantize!r})")
    if per_entry:
        extra = [n for n in chosen_input_bits if n not in bits]
        if extra:
            raise KeyError(f"chosen_input_bits names {extra}, which bits does not plan")
    if assumed_input_bits is not None:
        check_bits(assumed_input_bits, "assumed_input_bits")
    settings, chosen = {}, {}
    for name in table.layers:
        if name not in bits:
            continue
        b = bits[name]
        if table.quantize == "separate":
            ib = chosen_input_bits.get(name) if per_entry else (
                chosen_input_bits if table.has_input_rows(name) else None)
            if ib is not None and not table.has_input_rows(name):
                raise ValueError(f"chosen_input_bits[{name!r}]: {name!r} has no input rows")
        else:
            ib = b if table.quantize in ("input", "both") else None
        settings[name] = table._setting(name, b, ib)
        chosen[name] = int(b)
    return Plan.unchecked(settings, chosen, fingerprint=table.fingerprint,
                          weight_shapes={n: table._shape(n) for n in settings},
                          macs={n: table._info[n]["macs"] for n in settings},
                          assumed_input_bits=(None if table.quantize in ("input", "both")
                                              else assumed_input_bits),
                          predicted_sqnr_db=predicted_sqnr_db,
                          entries={n: table._entry_info(n) for n in settings},
                          other_weight_bits=max(0, int(table.coverage.total_bits) - sum(
                              table._stored(n) for n in settings)))
