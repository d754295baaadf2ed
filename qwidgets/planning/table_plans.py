"""Plans from a SensitivityTable's scanned grids (``SensitivityTable.make_plan``)."""

from __future__ import annotations

from collections.abc import Mapping

from ..core.checks import check_bits
from ..core.renamed import take_renamed
from ..core.setting import LayerSetting
from .granularity import check_granularity
from .plan import Plan


def plan_from_table(table, bits, chosen_input_bits, assumed_input_bits, predicted_sqnr_db,
                    renamed: dict, granularity=None, scale_bits: int = 16, input_granularity=None) -> Plan:
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
    igrans = _input_granularities(table, input_granularity, bits)
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
        ig = igrans.get(name)
        if ig is not None and ib is None and not isinstance(input_granularity, Mapping):
            ig = None  # one option for every entry: those whose input stays float keep none
        if ig is not None and (ib is None or table.quantize != "separate" or not table.has_input_rows(name)):
            raise ValueError(f"input_granularity[{name!r}]: {name!r} has no chosen input width to "
                             "quantize per token")
        settings[name] = entry_setting(table, name, b, ib, grans.get(name), ig)
        chosen[name] = int(b)
    return Plan.unchecked(settings, chosen, fingerprint=table.fingerprint,
                          weight_shapes={n: tuple(int(d) for d in table._info[n]["weight_shape"]) for n in settings},
                          macs={n: table._info[n]["macs"] for n in settings},
                          assumed_input_bits=(None if table.quantize in ("input", "both")
                                              else assumed_input_bits),
                          predicted_sqnr_db=predicted_sqnr_db,
                          entries={n: table._entry_info(n) for n in settings},
                          other_weight_bits=max(0, int(table.coverage.total_bits) - sum(
                              _stored(table, n) for n in settings)), scale_bits=scale_bits,
                          state_digests=table.state_digests)


def _stored(table, name: str) -> int:
    """:meth:`SensitivityTable.stored_bits`, cached (a front's plans each sum it over every entry)."""
    key = ("stored", name)
    v = table._settings.get(key)
    if v is None:
        v = table._settings[key] = table.stored_bits(name)
    return v


def entry_setting(table, name: str, b: int, ib: int | None, gran=None, igran=None) -> LayerSetting:
    """The LayerSetting of one entry's choice (cached on the table: plans of a front share
    them); ``igran``: None (the fitted input grid) or "token"."""
    key = (name, b, ib, gran, igran)
    s = table._settings.get(key)
    if s is None:
        if table.quantize == "input" or table.kind(name) == "activation":  # no weight grid
            s = LayerSetting(input=table.input_grid(name, b if ib is None else ib, igran))
        else:
            w = table.weight_grid(name, table.bits[table._col(b)], granularity=gran)
            if w is None and table._grids["weight"] is not None:
                raise ValueError(f"{name!r} has no {gran!r} grids: it skipped that granularity "
                                 "in the scan (see the table's coverage)")
            x = None if ib is None else table.input_grid(name, ib, igran)
            s = LayerSetting(weight=w, input=x)
        table._settings[key] = s
    return s


def _input_granularities(table, value, bits) -> dict:
    """Entry -> "token" where the input is quantized per token (checked against the table)."""
    if value is None:
        return {}
    if not isinstance(value, Mapping):
        value = {n: value for n in bits if table.quantize == "separate" and table.has_input_rows(n)}
    extra = [n for n in value if n not in bits]
    if extra:
        raise KeyError(f"input_granularity names {extra}, which bits does not plan")
    out = {}
    for n, g in value.items():
        if g is None or g == "tensor":
            continue
        if g not in table.input_granularities:
            raise ValueError(f"input_granularity[{n!r}] = {g!r} was not scanned; scanned: "
                             f"{list(table.input_granularities)} (scan with input_granularity=)")
        out[n] = g
    return out


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
