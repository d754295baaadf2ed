"""The sensitivity table's JSON schema, as strict as the plan's (schema.py); the field checks
both use are in fields.py.

Version 5 layout (3 added activation entries: ``weight_shape`` [] and the optional
``partner``; 4 granularities; 5 the optional state_digests and confirmed; every version still reads): the top
level holds format, version, bits, input_bits (the input widths of
``quantize="separate"``, else empty), quantize, method, per_channel, fingerprint, n_samples
and layers (optionally coverage, estimate, state_digests: state_dict name -> digest of
every floating-point weight and buffer of the scanned model, and confirmed: the
[entry, source, bits] cells of a gain estimate measured exactly afterwards); each entry of layers holds name, type,
weight_shape, input_shape, macs, layer_sqnr_db / model_sqnr_db (one value per bit width, or
null), weight_grids / input_grids (one grid per width, or null: the grid of column ``j`` has
the width ``bits[j]``, an input grid of ``quantize="separate"`` the width ``input_bits[j]``)
and input_layer_sqnr_db / input_model_sqnr_db (one value per input width; null unless the
entry's input was scanned on its own). Optional entry fields: model_pass and kind (strings),
axis (the weight's per-channel axis, default 0: with ``per_channel`` every weight grid has
this axis, without it weight grids are whole-tensor, axis null), has_input (boolean),
shared_with (a list of names), stored_bits (an integer or null) and digest (hex or null).
Version 1 had no input_bits and no input rows. Version 4 added, optional: a top-level granularities (the
weight grid options scanned, ``"tensor"``, ``"channel"`` or block sizes as digits; the first
is the rows above, default ``["channel"]``, or ``["tensor"]`` without per_channel) and, when
it names more than one, each entry's granularity_rows: for every other option an object of
layer_sqnr_db / model_sqnr_db (null values where the entry skipped the option) and
weight_grids (block grids with block_size and the shape of their scales); coverage notes.
Versions 1 to 3 still read (one granularity). Version 6 added, optional: a top-level
input_granularities (``["tensor", "token"]`` when inputs were also measured per token) and each
entry's input_granularity_rows (``{"token": {"layer_sqnr_db", "model_sqnr_db"}}``, one value
per input width; absent for entries without input rows).
"""

from __future__ import annotations

import math

import numpy as np

from ..core.blocks import block_shape
from ..core.checks import MAX_BITS
from .fields import (
    FieldError,
    bool_field,
    db_row,
    digest_field,
    fingerprint_field,
    grid_from_dict,
    int_field,
    kind_of,
    string_field,
    string_list_field,
)
from .granularity import grid_options, option_from_label, option_label
from .input_granularity import check_input_granularity, input_rows_from_json

QUANTIZE_MODES = ("weight", "input", "both", "separate")
SCOPES = ("layer", "model", "both")
ESTIMATES = ("exact", "gain")  # how a table's model scope was found (see scan)
TABLE_FORMAT = "qwidgets sensitivity table"
TABLE_VERSION = 6  # 2 added input_bits and the input rows of quantize="separate", 3 activation
# entries (weight_shape [], the optional partner), 4 granularities, 5 the optional state_digests
# and confirmed, 6 per-token input rows; every version still reads
TABLE_READABLE = (1, 2, 3, 4, 5, 6)

_TOP = ("format", "version", "bits", "quantize", "method", "per_channel", "fingerprint",
        "n_samples", "layers")
_ENTRY = ("name", "type", "weight_shape", "input_shape", "macs", "layer_sqnr_db",
          "model_sqnr_db", "weight_grids", "input_grids")
_ENTRY_OPTIONAL = ("model_pass", "kind", "axis", "has_input", "shared_with", "stored_bits", "digest",
                   "partner")


def table_fields(d) -> dict:
    """Check a table's JSON data field by field; return the SensitivityTable constructor's
    arguments (the layout: this module's docstring)."""
    if not isinstance(d, dict):
        raise FieldError("expected a JSON object at the top level")
    version = d.get("version")
    keys = _TOP if version == 1 else _TOP + ("input_bits",)
    more = {"granularities"} if version != 1 and version not in (2, 3) else set()  # 4: granularities
    more |= {"state_digests", "confirmed"} if version not in (1, 2, 3, 4) else set()  # 5
    more |= {"input_granularities"} if version not in (1, 2, 3, 4, 5) else set()  # 6
    if not set(keys) <= set(d) <= set(keys) | {"coverage", "estimate", "notes"} | more:
        raise FieldError(f"expected an object with fields {list(keys)} (and optionally coverage, "
                         "estimate, notes)")
    notes = d.get("notes", [])
    if not isinstance(notes, list) or not all(isinstance(n, str) for n in notes):
        raise FieldError("notes must be a list of strings")
    # tables written before "estimate" existed hold exact model scopes
    if d.get("estimate", "exact") not in ESTIMATES:
        raise FieldError(f"estimate must be one of {ESTIMATES}, got {d.get('estimate')!r}")
    if d["format"] != TABLE_FORMAT or version not in TABLE_READABLE or isinstance(version, bool):
        raise FieldError(f"format / version must be {TABLE_FORMAT!r} / one of {TABLE_READABLE}, "
                         f"got {d['format']!r} / {version!r}")
    if not isinstance(d["bits"], list) or not d["bits"]:
        raise FieldError("bits must be a non-empty list of widths")
    bits, ibits = _widths(d["bits"], "bits"), _widths(d.get("input_bits", []), "input_bits")
    _table_header(d)
    separate = d["quantize"] == "separate"
    if separate != bool(ibits):
        raise FieldError("input_bits must be non-empty exactly when quantize is 'separate'")
    entry_keys = set(_ENTRY) | ({"input_layer_sqnr_db", "input_model_sqnr_db"} if version != 1 else set())
    optional = _ENTRY_OPTIONAL if version in (3, 4, 5, 6) else _ENTRY_OPTIONAL[:-1]  # 3 added partner
    optional += ("input_granularity_rows",) if "input_granularities" in more else ()
    if not isinstance(d["layers"], list) or not d["layers"]:
        raise FieldError("layers must be a non-empty list")
    names, info, sq, grids = [], {}, {"layer": [], "model": []}, {"weight": {}, "input": {}}
    isq = {"layer": [], "model": []}
    widths = {"weight": (bits, "bits"), "input": (ibits, "input_bits") if separate else (bits, "bits")}
    for k, e in enumerate(d["layers"]):
        where = f"layers[{k}]"
        if not isinstance(e, dict) or not entry_keys <= set(e) or not set(e) <= entry_keys | set(optional) | (
                {"granularity_rows"} if more else set()):
            raise FieldError(f"{where} must be an object with fields {sorted(entry_keys)} "
                             f"(and optionally {sorted(optional)})")
        name = _table_entry(e, where, info)
        names.append(name)
        info[name] = _entry_info(e, where)
        for scope in ("layer", "model"):
            sq[scope].append(db_row(e[f"{scope}_sqnr_db"], len(bits), f"{where}.{scope}_sqnr_db"))
            v = e.get(f"input_{scope}_sqnr_db")
            if v is not None and not separate:
                raise FieldError(f"{where}.input_{scope}_sqnr_db must be null unless quantize is 'separate'")
            isq[scope].append(db_row(v, len(ibits), f"{where}.input_{scope}_sqnr_db"))
        for kind in ("weight", "input"):
            if e[f"{kind}_grids"] is not None:
                axis = info[name]["axis"] if d["per_channel"] and kind == "weight" else None
                grids[kind][name] = _grids(e[f"{kind}_grids"], f"{where}.{kind}_grids", *widths[kind],
                                           kind, axis, info[name]["weight_shape"])
    arrays = {}
    for scope in ("layer", "model"):
        rows = sq[scope]
        if any(r is None for r in rows) and not all(r is None for r in rows):
            raise FieldError(f"{scope}_sqnr_db must be given for every layer or for none")
        arrays[scope] = None if rows[0] is None else np.array(rows, dtype=float)
        if separate and arrays[scope] is not None:
            arrays[f"input_{scope}"] = np.array(
                [[math.nan] * len(ibits) if r is None else r for r in isq[scope]], dtype=float).reshape(
                len(names), len(ibits))
            for k, (n, r) in enumerate(zip(names, isq[scope], strict=True)):
                if (r is None) != (n not in grids["input"]):
                    raise FieldError(f"layers[{k}]: input_{scope}_sqnr_db and input_grids must be "
                                     "given together")
        elif any(r is not None for r in isq[scope]):
            raise FieldError(f"input_{scope}_sqnr_db given without {scope}_sqnr_db")
    grans = _granularities(d)
    more = _granularity_rows(d["layers"], names, info, grans, bits, arrays)
    try:
        igrans = check_input_granularity(d.get("input_granularities", ["tensor"]), "input_granularities")
    except (TypeError, ValueError) as e:
        raise FieldError(str(e)) from None
    irows = input_rows_from_json(d["layers"], names, igrans, len(ibits),
                                 [n in grids["input"] for n in names], arrays) if separate else {}
    if separate:
        input_grids = {n: grids["input"].get(n) for n in names}
    else:
        input_grids = grids["input"] if len(grids["input"]) == len(names) else None
    return dict(
        layers=names, bits=bits, quantize=d["quantize"], method=str(d["method"]),
        per_channel=bool(d["per_channel"]), fingerprint=str(d["fingerprint"]), info=info,
        layer_sqnr=arrays["layer"], model_sqnr=arrays["model"],
        weight_grids={n: grids["weight"].get(n) for n in names} if grids["weight"] else None,
        input_grids=input_grids, n_samples=int(d["n_samples"]), input_bits=ibits,
        coverage=_coverage_from_json(d.get("coverage"), version), estimate=d.get("estimate", "exact"),
        input_layer_sqnr=arrays.get("input_layer"), input_model_sqnr=arrays.get("input_model"),
        notes=notes, granularities=grans, granularity_rows=more,
        state_digests=_state_digests(d.get("state_digests")),
        confirmed=_confirmed(d.get("confirmed", []), names, bits, ibits),
        input_granularities=igrans, input_granularity_rows=irows)


def _confirmed(v, names, bits, ibits) -> list:
    """The optional confirmed cells: [entry, "weight" / "input", bits] each, of this table."""
    if not isinstance(v, list):
        raise FieldError(f"confirmed must be a list of [entry, source, bits], got {kind_of(v)}")
    out = []
    for k, c in enumerate(v):
        ok = (isinstance(c, list) and len(c) == 3 and c[0] in names and c[1] in ("weight", "input")
              and isinstance(c[2], int) and c[2] in (ibits if c[1] == "input" and ibits else bits))
        if not ok:
            raise FieldError(f"confirmed[{k}] must be [entry, 'weight' or 'input', a scanned width], got {c!r}")
        out.append(tuple(c))
    return out


def _state_digests(v):
    """The optional state_digests object (tables written before it: None)."""
    if v is None:
        return None
    if not isinstance(v, dict) or not all(isinstance(x, str) and x and set(x) <= set("0123456789abcdef")
                                          for x in v.values()):
        raise FieldError(f"state_digests must be an object of state_dict name -> hex digest, got {kind_of(v)}")
    return dict(v)


def _widths(v, where: str) -> tuple:
    if not isinstance(v, list):
        raise FieldError(f"{where} must be a list of widths, got {kind_of(v)}")
    out = tuple(int_field(b, f"{where}[{i}]", 1, MAX_BITS) for i, b in enumerate(v))
    if any(a >= b for a, b in zip(out[:-1], out[1:], strict=True)):
        raise FieldError(f"{where} must ascend strictly (sorted, no duplicates), got {list(out)}")
    return out


def _table_header(d) -> None:
    """The top-level fields of a table other than the widths, as strictly as a plan's."""
    from ..core.ranges import METHODS

    for key, options in (("quantize", QUANTIZE_MODES), ("method", METHODS)):
        if d[key] not in options:
            raise FieldError(f"{key} must be one of {list(options)}, got {kind_of(d[key])}")
    bool_field(d["per_channel"], "per_channel")
    fingerprint_field(d["fingerprint"])
    int_field(d["n_samples"], "n_samples", 1)


def _table_entry(e, where: str, info: dict) -> str:
    """An entry's name (unique), type, shapes and MACs, checked as a plan's are."""
    name = e["name"]
    if not isinstance(name, str) or not name:
        raise FieldError(f"{where}.name must be a non-empty string, got {kind_of(name)}")
    if name in info:
        raise FieldError(f"{where}.name {name!r} appears twice; layer names must be unique")
    string_field(e["type"], f"{where}.type")
    for key in ("weight_shape", "input_shape"):
        v = e[key]
        if not (v is None and key == "input_shape"):
            if not isinstance(v, list) or (key == "weight_shape" and not v and e.get("kind") != "activation"):
                raise FieldError(f"{where}.{key} must be a list of sizes, got {kind_of(v)}")
            for i, s in enumerate(v):
                int_field(s, f"{where}.{key}[{i}]", 0)
    int_field(e["macs"], f"{where}.macs", 0)
    return name


def _entry_info(e: dict, where: str) -> dict:
    """What the table keeps of an entry: its type, shapes and MACs (checked by _table_entry)
    and the optional fields, each checked as the plan reader checks its own."""
    shape = tuple(e["weight_shape"])
    axis = int_field(e.get("axis", 0), f"{where}.axis")
    if shape and not 0 <= axis < len(shape) or not shape and e.get("kind") != "activation":
        raise FieldError(f"{where}.axis {axis} is out of range for weight_shape {list(shape)}")
    stored = e.get("stored_bits")
    return {"type": e["type"], "weight_shape": shape,
            "input_shape": None if e["input_shape"] is None else tuple(e["input_shape"]),
            "macs": e["macs"], "model_pass": string_field(e.get("model_pass", "-"), f"{where}.model_pass"),
            "kind": string_field(e.get("kind", "layer"), f"{where}.kind"), "axis": axis,
            "has_input": bool_field(e.get("has_input", True), f"{where}.has_input"),
            "shared_with": string_list_field(e.get("shared_with", []), f"{where}.shared_with"),
            "stored_bits": None if stored is None else int_field(stored, f"{where}.stored_bits", 0),
            "digest": digest_field(e.get("digest"), f"{where}.digest"),
            **({"partner": None if e.get("partner") is None else string_field(e["partner"], f"{where}.partner")}
               if "partner" in e else {})}


def _grids(v, where: str, widths: tuple, column: str, kind: str, axis: int | None,
           shape: tuple) -> list:
    """One entry's weight or input grids: one per width, grid ``j`` of width ``widths[j]``;
    weight grids per channel along ``axis`` (None: whole-tensor grids, axis null)."""
    if not isinstance(v, list) or len(v) != len(widths):
        raise FieldError(f"{where} must hold {len(widths)} grids")
    out = []
    for j, g in enumerate(v):
        at = f"{where}[{j}]"
        if isinstance(g, dict) and kind == "weight" and "axis" in g and "block_size" not in g and (
                g["axis"] != axis or isinstance(g["axis"], bool)):
            want = "null (per_channel is false)" if axis is None else \
                f"{axis} (the entry's per-channel axis)"
            raise FieldError(f"{at}.axis must be {want}, got {kind_of(g['axis'])}")
        grid = grid_from_dict(g, at, None if axis is None else shape[axis])
        if grid is not None and grid.bits != widths[j]:
            raise FieldError(f"{at}.bits must be {widths[j]} (its column, {column}[{j}]), "
                             f"got {grid.bits}")
        out.append(grid)
    return out


def _coverage_from_json(c, version=TABLE_VERSION):
    from ..model.entries import Coverage

    if c is None:
        return None
    if not isinstance(c, dict) or not {"scanned", "total", "skipped", "total_bits"} <= set(c) <= {
            "scanned", "total", "skipped", "total_bits", "float_activations"} | (
            {"skipped_options"} if version in (4, 5, 6) else set()):
        raise FieldError("coverage must be an object with fields scanned, total, skipped, total_bits "
                         "(and optionally float_activations, skipped_options)")
    floats = c.get("float_activations", [])
    if not isinstance(floats, list) or not all(isinstance(v, str) for v in floats):
        raise FieldError("coverage.float_activations must be a list of strings")
    pairs = {}
    for key in ("skipped", "skipped_options"):
        v = c.get(key, [])
        if not isinstance(v, list) or not all(
                isinstance(p, list) and len(p) == 2 and all(isinstance(x, str) for x in p) for p in v):
            raise FieldError(f"coverage.{key} must be a list of [name, reason] pairs")
        pairs[key] = tuple((a, b) for a, b in v)
    return Coverage(int_field(c["scanned"], "coverage.scanned", 0), int_field(c["total"], "coverage.total", 0),
                    pairs["skipped"], int_field(c["total_bits"], "coverage.total_bits", 0), tuple(floats),
                    pairs["skipped_options"])

def _granularities(d: dict) -> tuple:
    default = ["channel"] if d["per_channel"] else ["tensor"]
    labels = d.get("granularities", default)
    if not isinstance(labels, list) or not labels or labels[0] != default[0] or len(set(map(str, labels))) != len(labels):
        raise FieldError(f"granularities must be a list of distinct options starting with {default[0]!r} "
                         f"(per_channel is {str(d['per_channel']).lower()}), got {kind_of(labels)}")
    try:
        return tuple(option_from_label(v, "granularities") for v in labels)
    except ValueError as e:
        raise FieldError(str(e)) from None


def _granularity_rows(layers: list, names: list, info: dict, grans: tuple, bits: tuple, arrays: dict):
    """The rows of every option after the first: option -> the table's granularity_rows."""
    labels = {option_label(g): g for g in grans[1:]}
    out = {g: {"layer_sqnr": [], "model_sqnr": [], "weight_grids": {}} for g in grans[1:]}
    for k, (e, name) in enumerate(zip(layers, names, strict=True)):
        where = f"layers[{k}].granularity_rows"
        rows = e.get("granularity_rows", {} if not labels else None)
        if not isinstance(rows, dict) or set(rows) != set(labels):
            raise FieldError(f"{where} must be an object with the options {sorted(labels)}, got {kind_of(rows)}")
        shape, axis = info[name]["weight_shape"], info[name]["axis"]
        for label, part in rows.items():
            at, opt = f"{where}.{label}", labels[label]
            if not isinstance(part, dict) or set(part) != {"layer_sqnr_db", "model_sqnr_db", "weight_grids"}:
                raise FieldError(f"{at} must be an object with layer_sqnr_db, model_sqnr_db, weight_grids")
            for scope in ("layer", "model"):
                v = part[f"{scope}_sqnr_db"]
                if (v is None) != (arrays[scope] is None):
                    raise FieldError(f"{at}.{scope}_sqnr_db must be given exactly when {scope}_sqnr_db is")
                if v is not None:
                    if not isinstance(v, list):
                        raise FieldError(f"{at}.{scope}_sqnr_db must hold {len(bits)} values")
                    v = db_row([0.0 if x is None else x for x in v], len(bits), f"{at}.{scope}_sqnr_db")
                    v = [math.nan if x is None else y for x, y in zip(part[f"{scope}_sqnr_db"], v, strict=True)]
                out[opt][f"{scope}_sqnr"].append(v)
            opts = grid_options(opt, axis)
            gs = part["weight_grids"]
            if gs is not None:
                gs = _grids(gs, f"{at}.weight_grids", bits, "bits", "weight", opts["axis"], shape)
                for j, g in enumerate(gs):
                    if g is not None and (g.block_size != opts.get("block_size") or (
                            g.blocked and (g.axis != opts["axis"] or tuple(g.scale.shape) != block_shape(
                                shape, g.axis % len(shape), g.block_size)))):
                        raise FieldError(f"{at}.weight_grids[{j}] is not a {label} grid of a weight of "
                                         f"shape {list(shape)}")
            out[opt]["weight_grids"][name] = gs
    for part in out.values():
        for scope in ("layer", "model"):
            part[f"{scope}_sqnr"] = None if arrays[scope] is None else np.array(part[f"{scope}_sqnr"], dtype=float)
        if any(v is None for v in part["weight_grids"].values()):
            part["weight_grids"] = None
    return out
