"""Field checks shared by the JSON readers of plans (schema.py) and tables (table_schema.py).

Each check takes the value and ``where`` (the field's path, e.g. ``layers[3].weight_grids[2]``)
and raises :class:`FieldError` naming it; the readers add what kind of file was read. Grids
are written and read here for both files (one layout: bits, signed, axis, scale, offset,
zero_point; per-channel grids, ``axis`` set, hold one value per channel).
"""

from __future__ import annotations

import math

import torch

from ..core.checks import MAX_BITS
from ..core.grid import UniformGrid
from ..core.token_grid import TokenGrid

HEX = "0123456789abcdef"


def grid_to_dict(g: UniformGrid | TokenGrid | None) -> dict | None:
    if g is None:
        return None
    if isinstance(g, TokenGrid):  # nothing stored: a scale per row at run time
        return {"bits": g.bits, "granularity": "token"}
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
    out = {"bits": g.bits, "signed": g.signed, "axis": g.axis, "scale": scale, "offset": offset,
           "zero_point": zp}
    if g.blocked:  # the ONNX blocked layout: scale, offset, zero_point flat in the order of shape
        out.update(block_size=g.block_size, shape=list(g.scale.shape))
    return out


class FieldError(ValueError):
    """A malformed field; the reader adds what kind of file it was reading."""


class NonFinite:
    """Stands for a NaN / Infinity literal in the JSON, so the check can name its field."""

    def __init__(self, literal: str):
        self.literal = literal


_GRID = ("bits", "signed", "axis", "scale", "offset", "zero_point")


def check_fields(obj, keys, where: str, optional=()) -> None:
    if not isinstance(obj, dict):
        raise FieldError(f"{where} must be a JSON object, got {kind_of(obj)}")
    missing = [k for k in keys if k not in obj]
    extra = [k for k in obj if k not in keys and k not in optional]
    if missing:
        raise FieldError(f"{where} is missing field(s) {missing}")
    if extra:
        raise FieldError(f"{where} has unknown field(s) {extra}; expected {list(keys)}")


def kind_of(v) -> str:
    if isinstance(v, NonFinite):
        return v.literal
    if v is None:
        return "null"
    return {bool: "a boolean", int: "an integer", float: "a number", str: "a string",
            list: "a list", dict: "an object"}.get(type(v), type(v).__name__) + f" ({v!r})"[:60]


def int_field(v, where: str, lo: int | None = None, hi: int | None = None) -> int:
    if isinstance(v, bool) or not isinstance(v, int):
        raise FieldError(f"{where} must be an integer, got {kind_of(v)}")
    if (lo is not None and v < lo) or (hi is not None and v > hi):
        rng = f"in {lo}..{hi}" if hi is not None else f">= {lo}"
        raise FieldError(f"{where} must be {rng}, got {v}")
    return v


def number_field(v, where: str, positive: bool = False) -> float:
    if isinstance(v, NonFinite):
        raise FieldError(f"{where} must be a finite number, got {v.literal}")
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise FieldError(f"{where} must be a number, got {kind_of(v)}")
    if not math.isfinite(v):
        raise FieldError(f"{where} must be a finite number, got {v}")
    if positive and v <= 0:
        raise FieldError(f"{where} must be > 0, got {v}")
    return float(v)


def input_grid_from_dict(d, where: str, version: int) -> UniformGrid | TokenGrid | None:
    """A plan's input grid: a fitted grid, or (version 6) ``{"bits": b, "granularity": "token"}``."""
    if not (isinstance(d, dict) and "granularity" in d):
        return grid_from_dict(d, where, None)
    if version < 6:
        raise FieldError(f"{where} is a per-token input, which plan files hold from version 6")
    check_fields(d, ("bits", "granularity"), where)
    if d["granularity"] != "token":
        raise FieldError(f"{where}.granularity must be 'token', got {d['granularity']!r}")
    bits = int_field(d["bits"], f"{where}.bits", 2, MAX_BITS)
    return TokenGrid(bits)


def grid_from_dict(d, where: str, channels: int | None) -> UniformGrid | None:
    if d is None:
        return None
    check_fields(d, _GRID, where, optional=("block_size", "shape") if "block_size" in d else ())
    bits = int_field(d["bits"], f"{where}.bits", 1, MAX_BITS)
    if not isinstance(d["signed"], bool):
        raise FieldError(f"{where}.signed must be true or false, got {kind_of(d['signed'])}")
    axis = d["axis"]
    if axis is not None:
        axis = int_field(axis, f"{where}.axis")
    if axis is None:
        scale = number_field(d["scale"], f"{where}.scale", positive=True)
        offset = number_field(d["offset"], f"{where}.offset")
        zp = None if d["zero_point"] is None else int_field(d["zero_point"], f"{where}.zero_point")
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
                             f"channel, axis={axis}), got {kind_of(v)}")
        lists[k] = v
    lengths = {k: len(v) for k, v in lists.items()}
    if len(set(lengths.values())) != 1:
        raise FieldError(f"{where} per-channel lists differ in length: {lengths}")
    n = next(iter(lengths.values()))
    block = _block_fields(d, where, n)
    if block is not None:
        channels = None  # the caller checks the block shape against the weight
    if channels is not None and n != channels:
        raise FieldError(f"{where}.scale has {n} values but the weight has {channels} "
                         f"channels along axis {axis}")
    scale = [number_field(v, f"{where}.scale[{i}]", positive=True) for i, v in enumerate(lists["scale"])]
    offset = [number_field(v, f"{where}.offset[{i}]") for i, v in enumerate(lists["offset"])]
    shape = (-1,) if block is None else block[1]
    try:
        grid = UniformGrid(bits, torch.tensor(scale, dtype=torch.float32).reshape(shape),
                           torch.tensor(offset, dtype=torch.float32).reshape(shape), signed=d["signed"],
                           axis=axis, block_size=None if block is None else block[0])
    except ValueError as e:
        raise FieldError(f"{where}: {e}") from None
    if "zero_point" in lists:
        for i, z in enumerate(lists["zero_point"]):
            z = int_field(z, f"{where}.zero_point[{i}]")
            if not _zp_matches(z, grid, i):
                raise FieldError(f"{where}.zero_point[{i}] = {z} does not match "
                                 f"offset / scale (offset {offset[i]}, scale {scale[i]})")
    return grid


def _block_fields(d: dict, where: str, n: int):
    """(block_size, shape) of a block grid's fields, or None for a per-channel grid."""
    if "block_size" not in d:
        return None
    g = int_field(d["block_size"], f"{where}.block_size", 1)
    shape = d.get("shape")
    if not isinstance(shape, list) or not shape:
        raise FieldError(f"{where}.shape must be a non-empty list of sizes, got {kind_of(shape)}")
    shape = tuple(int_field(v, f"{where}.shape[{i}]", 1) for i, v in enumerate(shape))
    if math.prod(shape) != n:
        raise FieldError(f"{where}.shape {list(shape)} holds {math.prod(shape)} blocks but the "
                         f"lists hold {n} values")
    return g, shape


def _zp_matches(z: int, grid: UniformGrid, i: int | None) -> bool:
    """The file's zero point is the grid's own (the one rule of ``UniformGrid.zero_point``)."""
    if not grid.has_zero_point():
        return False
    own = grid.zero_point
    return int(own if i is None else own.reshape(-1)[i]) == z


def json_db(v: float):
    return float(v) if math.isfinite(v) else ("inf" if v > 0 else "-inf")


def db_from_json(v, where: str) -> float:
    if isinstance(v, str) and v in ("inf", "-inf"):
        return float(v)
    return number_field(v, where)


def db_row(v, n: int, where: str):
    if v is None:
        return None
    if not isinstance(v, list) or len(v) != n:
        raise FieldError(f"{where} must hold {n} values")
    return [db_from_json(x, where) for x in v]




def bool_field(v, where: str) -> bool:
    if not isinstance(v, bool):
        raise FieldError(f"{where} must be true or false, got {kind_of(v)}")
    return v


def string_field(v, where: str) -> str:
    if not isinstance(v, str):
        raise FieldError(f"{where} must be a string, got {kind_of(v)}")
    return v


def string_list_field(v, where: str) -> list[str]:
    if not isinstance(v, list) or not all(isinstance(x, str) for x in v):
        raise FieldError(f"{where} must be a list of strings, got {kind_of(v)}")
    return list(v)


def digest_field(v, where: str) -> str | None:
    """Lowercase hex digits (a weight's digest) or null."""
    if v is not None and (not isinstance(v, str) or not v or any(c not in HEX for c in v)):
        raise FieldError(f"{where} must be lowercase hex digits or null, got {kind_of(v)}")
    return v


def fingerprint_field(v, where: str = "fingerprint") -> str:
    if not isinstance(v, str) or len(v) != 64 or any(c not in HEX for c in v):
        raise FieldError(f"{where} must be 64 lowercase hex digits, got {kind_of(v)}")
    return v
