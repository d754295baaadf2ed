"""Input granularity options: one fitted scale per tensor (static) or one per row, computed at
run time (dynamic, per token).

``scan(..., quantize="separate", input_granularity=("tensor", "token"))`` measures both at
every input width. ``"tensor"`` (always first: the table's input rows) is the fitted grid of
the input; ``"token"`` is a :class:`~qwidgets.core.token_grid.TokenGrid`: every row of the
input (every axis but the last) on its own symmetric min-max grid. A token grid stores
nothing and costs in BOPs what a static grid of its width costs, so the planner weighs it by
its noise alone. The table keeps the token rows beside its input rows
(``SensitivityTable.sqnr_db(name, bits, source="input", granularity="token")``); in the table
file they are each entry's ``input_granularity_rows`` (version 6).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

from ..core.token_grid import TokenGrid
from .fields import FieldError, db_row, json_db

__all__ = ["INPUT_OPTIONS", "check_input_granularity", "scan_input_granularity", "input_rows",
           "input_rows_to_json", "input_rows_from_json", "split_token_columns", "input_grid_of"]

INPUT_OPTIONS = ("tensor", "token")


def check_input_granularity(value, name: str = "input_granularity") -> tuple:
    """The options, in the order given, duplicates dropped ("tensor" first when both).

    >>> check_input_granularity(("token", "tensor"))
    ('tensor', 'token')
    """
    if value is None:
        return ("tensor",)
    if isinstance(value, str):
        value = (value,)
    if not isinstance(value, Sequence) or not value:
        raise TypeError(f"{name} must be a non-empty tuple of 'tensor' and / or 'token', got {value!r}")
    for v in value:
        if v not in INPUT_OPTIONS:
            raise ValueError(f"{name} options are 'tensor' (a fitted scale) and 'token' (a scale per "
                             f"row, at run time), got {v!r}")
    return tuple(o for o in INPUT_OPTIONS if o in value)


def scan_input_granularity(value, quantize: str, rules) -> tuple:
    """The input options a scan measures (see ``scan``'s ``input_granularity``)."""
    opts = check_input_granularity(value)
    if opts != ("tensor",) and quantize != "separate":
        raise ValueError(f"input_granularity={value!r} needs quantize='separate' (inputs measured on "
                         f"their own), got quantize={quantize!r}")
    if opts[0] != "tensor":
        raise ValueError(f"input_granularity={value!r}: 'tensor' gives the table's input rows and "
                         "comes first; use ('tensor', 'token')")
    if "token" in opts and rules is not None and (rules.pow2_scales or rules.per_tensor_inputs):
        raise ValueError("input_granularity 'token' computes a scale per row at run time; the device "
                         "rules ask for " + ("power-of-two scales" if rules.pow2_scales else
                                             "one input scale per tensor (per_tensor_inputs=True)")
                         + "; leave 'token' out or change the rules")
    return opts


def split_token_columns(fields: dict, n: int) -> dict:
    """An input scan's fields whose SQNR columns hold the fitted grids (``n`` widths) then,
    when measured, the token grids: the first ``n`` as the rows, the rest under
    ``token_sqnr`` (scope -> array; None when the scan measured no token grids)."""
    out = dict(fields)
    some = next(a for a in (fields.get("layer_sqnr"), fields.get("model_sqnr")) if a is not None)
    if np.shape(some)[1] == n:
        out["token_sqnr"] = None
        return out
    token = {}
    for scope in ("layer", "model"):
        arr = fields.get(f"{scope}_sqnr")
        if arr is None:
            token[scope] = None
            continue
        arr = np.asarray(arr, dtype=float)
        out[f"{scope}_sqnr"], token[scope] = arr[:, :n].copy(), arr[:, n:].copy()
    out["token_sqnr"] = token
    return out


def input_rows(options, rows, layers: list, n_ibits: int, isqnr: dict) -> tuple[tuple, dict]:
    """(options, rows of the options after "tensor"), checked: ``rows[option][scope]`` arrays of
    ``len(layers) x n_ibits`` given exactly where the table's own input rows are."""
    options = check_input_granularity(options)
    rows = dict(rows or {})
    if set(rows) != set(options[1:]):
        raise ValueError(f"input_granularity_rows must hold the options {list(options[1:])}, got {list(rows)}")
    out, shape = {}, (len(layers), n_ibits)
    for opt, part in rows.items():
        if not isinstance(part, Mapping):
            raise TypeError(f"input_granularity_rows[{opt!r}] must be a dict of scope -> array")
        more = {}
        for scope in ("layer", "model"):
            arr = part.get(scope)
            if (arr is None) != (isqnr[scope] is None) or (arr is not None and np.shape(arr) != shape):
                raise ValueError(f"input_granularity_rows[{opt!r}][{scope!r}] must be a {shape} array "
                                 f"exactly when the input {scope} rows are given")
            more[scope] = None if arr is None else np.asarray(arr, dtype=float).copy()
        out[opt] = more
    return options, out


def input_grid_of(option, bits: int, fitted):
    """The input grid of one option at ``bits``: the fitted one, or a TokenGrid."""
    return TokenGrid(bits) if option == "token" else fitted


def input_rows_to_json(rows: dict, i: int) -> dict:
    """Entry ``i``'s rows of every option after "tensor" (the table file's input_granularity_rows)."""
    return {opt: {f"{scope}_sqnr_db": None if part[scope] is None else [json_db(v) for v in part[scope][i]]
                  for scope in ("layer", "model")} for opt, part in rows.items()}


def input_rows_from_json(entries: list, names: list, options: tuple, n_ibits: int,
                         has_rows: list, arrays: dict) -> dict:
    """``input_granularity_rows`` from the table file's entries (version 6), checked."""
    out = {}
    for opt in options[1:]:
        part = {}
        for scope in ("layer", "model"):
            if arrays.get(f"input_{scope}") is None:
                part[scope] = None
                continue
            rows = []
            for k, e in enumerate(entries):
                where = f"layers[{k}].input_granularity_rows"
                got = e.get("input_granularity_rows")
                if not has_rows[k]:
                    if got is not None:
                        raise FieldError(f"{where} must be absent: {names[k]!r} has no input rows")
                    rows.append([np.nan] * n_ibits)
                    continue
                if not isinstance(got, dict) or set(got) != set(options[1:]):
                    raise FieldError(f"{where} must be an object with the options {list(options[1:])}")
                v = got[opt]
                if not isinstance(v, dict) or set(v) != {"layer_sqnr_db", "model_sqnr_db"}:
                    raise FieldError(f"{where}.{opt} must be an object with layer_sqnr_db and model_sqnr_db")
                r = db_row(v[f"{scope}_sqnr_db"], n_ibits, f"{where}.{opt}.{scope}_sqnr_db")
                if r is None:
                    raise FieldError(f"{where}.{opt}.{scope}_sqnr_db must be given")
                rows.append(r)
            part[scope] = np.array(rows, dtype=float).reshape(len(names), n_ibits)
        out[opt] = part
    return out
