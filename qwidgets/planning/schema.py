"""The JSON files: one strict schema for plans and sensitivity tables.

Plans

A plan is data, never code: it is written and read as JSON (no pickle), and reading checks
every field. Its JSON layout (``version`` 1)::

    {
      "format": "qwidgets plan",
      "version": 1,
      "fingerprint": "<sha256 of the model's ordered parameter names and shapes>",
      "predicted_sqnr_db": 31.4,            # or null; +inf is written as null too
      "assumed_input_bits": 8,              # input width used for BOPs where no input grid
      "layers": {                           # in execution order
        "features.0": {
          "bits": 6,                        # the chosen width (the weight grid's, else the input's)
          "weight_shape": [16, 3, 3, 3],
          "macs": 442368,                   # multiply-accumulates per sample
          "weight": {"bits": 6, "signed": true, "axis": 0,
                     "scale": [...], "offset": [...], "zero_point": [...]},   # or null
          "input": {"bits": 6, "signed": false, "axis": null,
                    "scale": 0.02, "offset": 0.0, "zero_point": 0},           # or null
          "kind": "layer",                  # optional: layer / attention / recurrent / embedding
          "has_input": true,                # optional: false for weight-only entries
          "shared_with": [],                # optional: other places using the same tensor
          "weight_digest": "<16 hex digits>"  # optional: the planned weight's values (or null)
        }
      },
      "other_weight_bits": 2656             # optional: the model's other float weights, bits
    }

Plans written before entries were recorded (no optional fields) are read as they are: their
layers have inputs, no digest is checked and ``Plan.model_kib`` is None.

Per-channel grids (``axis`` set) hold one scale / offset / zero point per channel; a grid
whose offset is not an integer multiple of its scale has ``"zero_point": null``.
"""

from __future__ import annotations

import math

import numpy as np
import torch

from ..core.checks import MAX_BITS
from ..core.grid import UniformGrid
from ..core.setting import LayerSetting

QUANTIZE_MODES = ("weight", "input", "both", "separate")
SCOPES = ("layer", "model", "both")
ESTIMATES = ("exact", "gain")  # how a table's model scope was found (see scan)
FORMAT = "qwidgets plan"


VERSION = 1


TABLE_FORMAT = "qwidgets sensitivity table"


TABLE_VERSION = 2  # 2 added input_bits and the input rows of quantize="separate"; 1 still reads


def grid_to_dict(g: UniformGrid | None) -> dict | None:
    if g is None:
        return None
    g = g.detached()
    if g.axis is None:  # floats as given (a 0-d tensor's value as a float)
        scale, offset = float(g.scale), float(g.offset) + 0.0
    else:
        scale = [float(v) for v in g.scale_tensor().reshape(-1).tolist()]
        offset = [float(v) + 0.0 for v in g.offset_tensor().reshape(-1).tolist()]
        n = max(len(scale), len(offset))
        scale = scale * n if len(scale) == 1 else scale
        offset = offset * n if len(offset) == 1 else offset
    zp = None
    if g.has_zero_point():
        z = g.zero_point
        zp = int(z) if isinstance(z, int) else [int(v) for v in z.reshape(-1).tolist()]
        if isinstance(zp, list) and isinstance(scale, list) and len(zp) == 1:
            zp = zp * len(scale)
    return {"bits": g.bits, "signed": g.signed, "axis": g.axis, "scale": scale, "offset": offset,
            "zero_point": zp}


class FieldError(ValueError):
    """A malformed field; the reader adds what kind of file it was reading."""


class NonFinite:
    """Stands for a NaN / Infinity literal in the JSON, so the check can name its field."""

    def __init__(self, literal: str):
        self.literal = literal


_TOP = ("format", "version", "fingerprint", "predicted_sqnr_db", "assumed_input_bits", "layers")


_LAYER = ("bits", "weight_shape", "macs", "weight", "input")


_TOP_OPTIONAL = ("other_weight_bits",)


_LAYER_OPTIONAL = ("kind", "has_input", "shared_with", "weight_digest")


_GRID = ("bits", "signed", "axis", "scale", "offset", "zero_point")


def _fields(obj, keys, where: str, optional=()) -> None:
    if not isinstance(obj, dict):
        raise FieldError(f"{where} must be a JSON object, got {_kind(obj)}")
    missing = [k for k in keys if k not in obj]
    extra = [k for k in obj if k not in keys and k not in optional]
    if missing:
        raise FieldError(f"{where} is missing field(s) {missing}")
    if extra:
        raise FieldError(f"{where} has unknown field(s) {extra}; expected {list(keys)}")


def _kind(v) -> str:
    if isinstance(v, NonFinite):
        return v.literal
    if v is None:
        return "null"
    return {bool: "a boolean", int: "an integer", float: "a number", str: "a string",
            list: "a list", dict: "an object"}.get(type(v), type(v).__name__) + f" ({v!r})"[:60]


def _int(v, where: str, lo: int | None = None, hi: int | None = None) -> int:
    if isinstance(v, bool) or not isinstance(v, int):
        raise FieldError(f"{where} must be an integer, got {_kind(v)}")
    if (lo is not None and v < lo) or (hi is not None and v > hi):
        rng = f"in {lo}..{hi}" if hi is not None else f">= {lo}"
        raise FieldError(f"{where} must be {rng}, got {v}")
    return v


def _num(v, where: str, positive: bool = False) -> float:
    if isinstance(v, NonFinite):
        raise FieldError(f"{where} must be a finite number, got {v.literal}")
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise FieldError(f"{where} must be a number, got {_kind(v)}")
    if not math.isfinite(v):
        raise FieldError(f"{where} must be a finite number, got {v}")
    if positive and v <= 0:
        raise FieldError(f"{where} must be > 0, got {v}")
    return float(v)


def grid_from_dict(d, where: str, channels: int | None) -> UniformGrid | None:
    if d is None:
        return None
    _fields(d, _GRID, where)
    bits = _int(d["bits"], f"{where}.bits", 1, MAX_BITS)
    if not isinstance(d["signed"], bool):
        raise FieldError(f"{where}.signed must be true or false, got {_kind(d['signed'])}")
    axis = d["axis"]
    if axis is not None:
        axis = _int(axis, f"{where}.axis")
    if axis is None:
        scale = _num(d["scale"], f"{where}.scale", positive=True)
        offset = _num(d["offset"], f"{where}.offset")
        zp = None if d["zero_point"] is None else _int(d["zero_point"], f"{where}.zero_point")
        grid = UniformGrid(bits, scale, offset, signed=d["signed"])
        if zp is not None and not _zp_matches(zp, grid, None):
            raise FieldError(f"{where}.zero_point {zp} does not match offset / scale "
                             f"(offset must equal -zero_point * scale, got offset {offset}, scale {scale})")
        return grid
    lists = {}
    for k in ("scale", "offset") + (("zero_point",) if d["zero_point"] is not None else ()):
        v = d[k]
        if not isinstance(v, list) or not v:
            raise FieldError(f"{where}.{k} must be a non-empty list (one value per "
                             f"channel, axis={axis}), got {_kind(v)}")
        lists[k] = v
    lengths = {k: len(v) for k, v in lists.items()}
    if len(set(lengths.values())) != 1:
        raise FieldError(f"{where} per-channel lists differ in length: {lengths}")
    n = next(iter(lengths.values()))
    if channels is not None and n != channels:
        raise FieldError(f"{where}.scale has {n} values but the weight has {channels} "
                         f"channels along axis {axis}")
    scale = [_num(v, f"{where}.scale[{i}]", positive=True) for i, v in enumerate(lists["scale"])]
    offset = [_num(v, f"{where}.offset[{i}]") for i, v in enumerate(lists["offset"])]
    grid = UniformGrid(bits, torch.tensor(scale, dtype=torch.float32),
                       torch.tensor(offset, dtype=torch.float32), signed=d["signed"], axis=axis)
    if "zero_point" in lists:
        for i, z in enumerate(lists["zero_point"]):
            z = _int(z, f"{where}.zero_point[{i}]")
            if not _zp_matches(z, grid, i):
                raise FieldError(f"{where}.zero_point[{i}] = {z} does not match "
                                 f"offset / scale (offset {offset[i]}, scale {scale[i]})")
    return grid


def _zp_matches(z: int, grid: UniformGrid, i: int | None) -> bool:
    """The file's zero point is the grid's own (the one rule of ``UniformGrid.zero_point``)."""
    if not grid.has_zero_point():
        return False
    own = grid.zero_point
    return int(own if i is None else own.reshape(-1)[i]) == z


def plan_fields(data) -> dict:
    """Check a plan's JSON data field by field; return the Plan constructor's arguments."""
    _fields(data, _TOP, "the top level", _TOP_OPTIONAL)
    if data["format"] != FORMAT:
        raise FieldError(f"format must be {FORMAT!r}, got {_kind(data['format'])}")
    version = data["version"]
    if version != VERSION or isinstance(version, bool):
        raise FieldError(f"version {_kind(version)} is not supported; this qwidgets "
                         f"reads version {VERSION}")
    fp = data["fingerprint"]
    if not isinstance(fp, str) or len(fp) != 64 or any(c not in "0123456789abcdef" for c in fp):
        raise FieldError(f"fingerprint must be 64 lowercase hex digits, got {_kind(fp)}")
    pred = data["predicted_sqnr_db"]
    pred = None if pred is None else _num(pred, "predicted_sqnr_db")
    aib = data["assumed_input_bits"]
    aib = None if aib is None else _int(aib, "assumed_input_bits", 1, MAX_BITS)
    layers_d = data["layers"]
    if not isinstance(layers_d, dict) or not layers_d:
        raise FieldError(f"layers must be a non-empty object, got {_kind(layers_d)}")
    layers, bits, shapes, macs, entries = {}, {}, {}, {}, {}
    other = data.get("other_weight_bits")
    other = None if other is None else _int(other, "other_weight_bits", 0)
    for name, entry in layers_d.items():
        where = f"layers[{name!r}]"
        _fields(entry, _LAYER, where, _LAYER_OPTIONAL)
        entries[name] = _entry_fields(entry, where)
        b = _int(entry["bits"], f"{where}.bits", 1, MAX_BITS)
        shape = entry["weight_shape"]
        if not isinstance(shape, list) or len(shape) < 2:
            raise FieldError(f"{where}.weight_shape must be a list of >= 2 sizes, got {_kind(shape)}")
        shape = tuple(_int(s, f"{where}.weight_shape[{i}]", 1) for i, s in enumerate(shape))
        m = _int(entry["macs"], f"{where}.macs", 0)
        wd = entry["weight"]
        channels = None
        if isinstance(wd, dict) and isinstance(wd.get("axis"), int) and not isinstance(wd["axis"], bool):
            if not -len(shape) <= wd["axis"] < len(shape):
                raise FieldError(f"{where}.weight.axis {wd['axis']} is out of range for "
                                 f"weight_shape {list(shape)}")
            channels = shape[wd["axis"]]
        w = grid_from_dict(wd, f"{where}.weight", channels)
        x = grid_from_dict(entry["input"], f"{where}.input", None)
        if w is None and x is None:
            raise FieldError(f"{where} has neither a weight nor an input grid")
        main = w if w is not None else x
        if main.bits != b:
            raise FieldError(f"{where}.bits is {b} but its "
                             f"{'weight' if w is not None else 'input'} grid has {main.bits} bits")
        layers[name] = LayerSetting(weight=w, input=x)
        bits[name], shapes[name], macs[name] = b, shape, m
    return dict(layers=layers, bits=bits, fingerprint=fp, weight_shapes=shapes, macs=macs,
                assumed_input_bits=aib, predicted_sqnr_db=pred, entries=entries,
                other_weight_bits=other)


def _entry_fields(entry: dict, where: str) -> dict:
    """The optional entry fields of a plan layer (kind, has_input, shared_with, weight_digest)."""
    out = {}
    if "kind" in entry:
        if not isinstance(entry["kind"], str):
            raise FieldError(f"{where}.kind must be a string, got {_kind(entry['kind'])}")
        out["kind"] = entry["kind"]
    if "has_input" in entry:
        if not isinstance(entry["has_input"], bool):
            raise FieldError(f"{where}.has_input must be true or false, got {_kind(entry['has_input'])}")
        out["has_input"] = entry["has_input"]
    if "shared_with" in entry:
        v = entry["shared_with"]
        if not isinstance(v, list) or not all(isinstance(x, str) for x in v):
            raise FieldError(f"{where}.shared_with must be a list of strings, got {_kind(v)}")
        out["shared_with"] = list(v)
    if "weight_digest" in entry:
        v = entry["weight_digest"]
        if v is not None and (not isinstance(v, str) or not v or any(c not in "0123456789abcdef" for c in v)):
            raise FieldError(f"{where}.weight_digest must be lowercase hex digits or null, got {_kind(v)}")
        out["weight_digest"] = v
    return out


def json_db(v: float):
    return float(v) if math.isfinite(v) else ("inf" if v > 0 else "-inf")


def _db_from_json(v, where: str) -> float:
    if isinstance(v, str) and v in ("inf", "-inf"):
        return float(v)
    return _num(v, where)


def _db_row(v, n: int, where: str):
    if v is None:
        return None
    if not isinstance(v, list) or len(v) != n:
        raise FieldError(f"{where} must hold {n} values")
    return [_db_from_json(x, where) for x in v]


def table_fields(d) -> dict:
    """Check a table's JSON data field by field; return the SensitivityTable constructor's arguments.

    Version 2 layout: the top level holds format, version, bits, input_bits (the input widths
    of ``quantize="separate"``, else empty), quantize, method, per_channel, fingerprint,
    n_samples and layers; each entry of layers holds name, type, weight_shape, input_shape,
    macs, model_pass, layer_sqnr_db / model_sqnr_db (one value per bit width, or null),
    weight_grids / input_grids (one grid per width, or null) and input_layer_sqnr_db /
    input_model_sqnr_db (one value per input width; null unless the entry's input was scanned
    on its own). Version 1 had no input_bits and no input rows.
    """
    keys1 = ("format", "version", "bits", "quantize", "method", "per_channel", "fingerprint",
             "n_samples", "layers")
    if not isinstance(d, dict):
        raise FieldError("expected a JSON object at the top level")
    version = d.get("version")
    keys = keys1 if version == 1 else keys1 + ("input_bits",)
    if not set(keys) <= set(d) <= set(keys) | {"coverage", "estimate"}:
        raise FieldError(f"expected an object with fields {list(keys)} (and optionally coverage, "
                         "estimate)")
    # tables written before "estimate" existed hold exact model scopes
    if d.get("estimate", "exact") not in ESTIMATES:
        raise FieldError(f"estimate must be one of {ESTIMATES}, got {d.get('estimate')!r}")
    if d["format"] != TABLE_FORMAT or version not in (1, TABLE_VERSION) or isinstance(version, bool):
        raise FieldError(f"format / version must be {TABLE_FORMAT!r} / 1 or {TABLE_VERSION}, "
                          f"got {d['format']!r} / {version!r}")
    if not isinstance(d["bits"], list) or not d["bits"]:
        raise FieldError("bits must be a non-empty list of widths")
    bits, ibits = _widths(d["bits"], "bits"), _widths(d.get("input_bits", []), "input_bits")
    _table_header(d)
    if (d["quantize"] == "separate") != bool(ibits):
        raise FieldError("input_bits must be non-empty exactly when quantize is 'separate'")
    entry_keys = {"name", "type", "weight_shape", "input_shape", "macs", "layer_sqnr_db",
                  "model_sqnr_db", "weight_grids", "input_grids"}
    if version != 1:
        entry_keys |= {"input_layer_sqnr_db", "input_model_sqnr_db"}
    if not isinstance(d["layers"], list) or not d["layers"]:
        raise FieldError("layers must be a non-empty list")
    names, info, sq, grids = [], {}, {"layer": [], "model": []}, {"weight": {}, "input": {}}
    isq = {"layer": [], "model": []}
    separate = d["quantize"] == "separate"
    for k, e in enumerate(d["layers"]):
        optional = {"model_pass", "kind", "axis", "has_input", "shared_with", "stored_bits", "digest"}
        if not isinstance(e, dict) or not entry_keys <= set(e) or not set(e) <= entry_keys | optional:
            raise FieldError(f"layers[{k}] must be an object with fields {sorted(entry_keys)} "
                             f"(and optionally {sorted(optional)})")
        name = _table_entry(e, f"layers[{k}]", info)
        names.append(name)
        info[name] = {"type": str(e["type"]), "weight_shape": tuple(int(s) for s in e["weight_shape"]),
                      "input_shape": None if e["input_shape"] is None else tuple(e["input_shape"]),
                      "macs": int(e["macs"]), "model_pass": str(e.get("model_pass", "-")),
                      "kind": str(e.get("kind", "layer")), "axis": int(e.get("axis", 0)),
                      "has_input": bool(e.get("has_input", True)),
                      "shared_with": [str(v) for v in e.get("shared_with", [])],
                      "stored_bits": e.get("stored_bits"), "digest": e.get("digest")}
        for scope in ("layer", "model"):
            sq[scope].append(_db_row(e[f"{scope}_sqnr_db"], len(bits), f"layers[{k}].{scope}_sqnr_db"))
            v = e.get(f"input_{scope}_sqnr_db")
            if v is not None and not separate:
                raise FieldError(f"layers[{k}].input_{scope}_sqnr_db must be null unless quantize is 'separate'")
            isq[scope].append(_db_row(v, len(ibits), f"layers[{k}].input_{scope}_sqnr_db"))
        for kind in ("weight", "input"):
            v = e[f"{kind}_grids"]
            if v is not None:
                n = len(ibits) if kind == "input" and separate else len(bits)
                if not isinstance(v, list) or len(v) != n:
                    raise FieldError(f"layers[{k}].{kind}_grids must hold {n} grids")
                ch = (info[name]["weight_shape"][info[name]["axis"]]
                      if kind == "weight" and d["per_channel"] else None)
                grids[kind][name] = [None if g is None and kind == "input" else
                                     grid_from_dict(g, f"layers[{k}].{kind}_grids[{j}]", ch)
                                     for j, g in enumerate(v)]
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
    if separate:
        input_grids = {n: grids["input"].get(n) for n in names}
    else:
        input_grids = grids["input"] if len(grids["input"]) == len(names) else None
    return dict(
        layers=names, bits=bits, quantize=d["quantize"], method=str(d["method"]),
        per_channel=bool(d["per_channel"]), fingerprint=str(d["fingerprint"]), info=info,
        layer_sqnr=arrays["layer"], model_sqnr=arrays["model"],
        weight_grids=grids["weight"] if len(grids["weight"]) == len(names) else None,
        input_grids=input_grids, n_samples=int(d["n_samples"]), input_bits=ibits,
        coverage=_coverage_from_json(d.get("coverage")), estimate=d.get("estimate", "exact"),
        input_layer_sqnr=arrays.get("input_layer"), input_model_sqnr=arrays.get("input_model"))


def _widths(v, where: str) -> tuple:
    if not isinstance(v, list):
        raise FieldError(f"{where} must be a list of widths, got {_kind(v)}")
    out = tuple(_int(b, f"{where}[{i}]", 1, MAX_BITS) for i, b in enumerate(v))
    if any(a >= b for a, b in zip(out[:-1], out[1:], strict=True)):
        raise FieldError(f"{where} must ascend strictly (sorted, no duplicates), got {list(out)}")
    return out


def _table_header(d) -> None:
    """The top-level fields of a table other than the widths, as strictly as a plan's."""
    from ..core.ranges import METHODS

    for key, options in (("quantize", QUANTIZE_MODES), ("method", METHODS)):
        if d[key] not in options:
            raise FieldError(f"{key} must be one of {list(options)}, got {_kind(d[key])}")
    if not isinstance(d["per_channel"], bool):
        raise FieldError(f"per_channel must be true or false, got {_kind(d['per_channel'])}")
    fp = d["fingerprint"]
    if not isinstance(fp, str) or len(fp) != 64 or any(c not in "0123456789abcdef" for c in fp):
        raise FieldError(f"fingerprint must be 64 lowercase hex digits, got {_kind(fp)}")
    _int(d["n_samples"], "n_samples", 1)


def _table_entry(e, where: str, info: dict) -> str:
    """An entry's name (unique), type, shapes and MACs, checked as a plan's are."""
    name = e["name"]
    if not isinstance(name, str) or not name:
        raise FieldError(f"{where}.name must be a non-empty string, got {_kind(name)}")
    if name in info:
        raise FieldError(f"{where}.name {name!r} appears twice; layer names must be unique")
    if not isinstance(e["type"], str):
        raise FieldError(f"{where}.type must be a string, got {_kind(e['type'])}")
    for key in ("weight_shape", "input_shape"):
        v = e[key]
        if not (v is None and key == "input_shape"):
            if not isinstance(v, list):
                raise FieldError(f"{where}.{key} must be a list of sizes, got {_kind(v)}")
            for i, s in enumerate(v):
                _int(s, f"{where}.{key}[{i}]", 0)
    _int(e["macs"], f"{where}.macs", 0)
    for key in ("has_input",):
        if key in e and not isinstance(e[key], bool):
            raise FieldError(f"{where}.{key} must be true or false, got {_kind(e[key])}")
    return name


def _coverage_from_json(c):
    from ..model.entries import Coverage

    if c is None:
        return None
    if not isinstance(c, dict) or set(c) != {"scanned", "total", "skipped", "total_bits"}:
        raise FieldError("coverage must be an object with fields scanned, total, skipped, total_bits")
    skipped = c["skipped"]
    if not isinstance(skipped, list) or not all(
            isinstance(v, list) and len(v) == 2 and all(isinstance(x, str) for x in v) for v in skipped):
        raise FieldError("coverage.skipped must be a list of [parameter name, reason] pairs")
    return Coverage(_int(c["scanned"], "coverage.scanned", 0), _int(c["total"], "coverage.total", 0),
                    tuple((a, b) for a, b in skipped), _int(c["total_bits"], "coverage.total_bits", 0))
