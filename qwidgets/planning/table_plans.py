"""Plans from a SensitivityTable's scanned grids (``SensitivityTable.make_plan``)."""

from __future__ import annotations

from collections.abc import Mapping

from ..core.checks import check_bits
from ..core.renamed import take_renamed
from .granularity import check_granularity
from .plan import Plan


def plan_from_table(table, bits, chosen_input_bits, assumed_input_bits, predicted_sqnr_db,
                    renamed: dict, granularity=None, scale_bits: int = 16) -> Plan:
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
    grans = _granularities(table, granularity, bits)
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
        settings[name] = table._setting(name, b, ib, grans.get(name))
        chosen[name] = int(b)
    return Plan.unchecked(settings, chosen, fingerprint=table.fingerprint,
                          weight_shapes={n: table._shape(n) for n in settings},
                          macs={n: table._info[n]["macs"] for n in settings},
                          assumed_input_bits=(None if table.quantize in ("input", "both")
                                              else assumed_input_bits),
                          predicted_sqnr_db=predicted_sqnr_db,
                          entries={n: table._entry_info(n) for n in settings},
                          other_weight_bits=max(0, int(table.coverage.total_bits) - sum(
                              table._stored(n) for n in settings)), scale_bits=scale_bits,
                          state_digests=table.state_digests)


def _granularities(table, granularity, bits) -> dict:
    """Entry -> granularity option (None: the table's first), checked against the table."""
    if granularity is None:
        return {}
    if not isinstance(granularity, Mapping):
        granularity = {n: granularity for n in bits}
    extra = [n for n in granularity if n not in bits]
    if extra:
        raise KeyError(f"granularity names {extra}, which bits does not plan")
    out = {}
    for n, g in granularity.items():
        if g is None:
            continue
        g = check_granularity((g,), name=f"granularity[{n!r}]")[0]
        if g not in table.granularities:
            raise ValueError(f"granularity[{n!r}] = {g!r} was not scanned; scanned: {list(table.granularities)}")
        out[n] = None if g == table.granularities[0] else g
    return out
