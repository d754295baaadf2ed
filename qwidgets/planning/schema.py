"""The plan file's JSON schema (tables: table_schema.py; the field checks both use: fields.py).

A plan is data, never code: it is written and read as JSON (no pickle), and reading checks
every field. Its JSON layout (``version`` 4)::

    {
      "format": "qwidgets plan",
      "version": 4,
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
          "kind": "layer",                  # optional: layer / attention / recurrent / embedding /
                                            # product / activation (weight_shape [], no weight)
          "has_input": true,                # optional: false for weight-only entries
          "shared_with": [],                # optional: other places using the same tensor
          "weight_digest": "<16 hex digits>", # optional: the planned weight's values (or null)
          "partner": "att.key",             # optional, activations: the product's other operand
          "pinned": true                    # optional: the width was pinned by fixed=
        }
      },
      "other_weight_bits": 2656,            # optional: the model's other float weights, bits
      "figures": {                          # the plan's figures under the Plan attributes'
        "model_kib": 5.93,                  # names (the plan_budget keywords): null without
        "planned_kib": 5.61,                # other_weight_bits; checked against the layers
        "mean_bits": 4.21,                  # when read (relative 1e-9), so a file edited by
        "bops": 1234567                     # hand cannot say one thing and hold another
      },
      "state_digests": {"features.0.weight": "<16 hex digits>", ...}
                                            # optional: every floating-point weight and buffer
    }

Versions (each still reads): 1, without ``figures``; 2 added ``figures``; 3 added
activation entries (``weight_shape`` [], the optional ``partner``); 4 added block grids and
``scale_bits``, and its ``mean_bits`` counts stored bits (codes, scales and zero points;
versions 2 and 3 counted code bits only). Plans written before
entries were recorded (no optional fields) are read as they are: their layers have inputs, no
digest is checked and ``Plan.model_kib`` is None. 5 added the optional ``state_digests``
and per-layer ``pinned``; plans without ``state_digests`` are read with
``Plan.state_digests`` None: only their planned weights' digests are checked. 6 added
per-token inputs: ``"input": {"bits": 8, "granularity": "token"}`` (a
:class:`~qwidgets.core.token_grid.TokenGrid`, nothing stored); older files hold fitted input
grids only (``Plan.input_granularity`` "tensor").

Per-channel grids (``axis`` set) hold one scale / offset / zero point per channel; a grid
whose offset is not an integer multiple of its scale has ``"zero_point": null``. Block grids
add ``"block_size"`` and ``"shape"`` (their scales' shape: the ONNX opset 21 blocked layout,
``axis`` the blocked axis), their lists flat in that shape's order; the optional top-level
``"scale_bits"`` (16 or 32, default 16) is how their scales are stored. Plans without them
hold per-channel / per-tensor grids, as before.
"""

from __future__ import annotations

import math

from ..core.blocks import block_shape
from ..core.checks import MAX_BITS
from ..core.setting import LayerSetting
from .fields import (
    FieldError,
    bool_field,
    check_fields,
    digest_field,
    fingerprint_field,
    grid_from_dict,
    input_grid_from_dict,
    int_field,
    kind_of,
    number_field,
    string_field,
    string_list_field,
)

FORMAT = "qwidgets plan"
VERSION = 6  # 2 "figures", 3 activations ("partner"), 4 block grids, scale_bits, mean_bits stored,
#             5 "state_digests" and "pinned", 6 per-token inputs
READABLE = (1, 2, 3, 4, 5, 6)

FIGURES = ("model_kib", "planned_kib", "mean_bits", "bops")  # Plan attributes, budget keywords


_TOP = ("format", "version", "fingerprint", "predicted_sqnr_db", "assumed_input_bits", "layers")


_LAYER = ("bits", "weight_shape", "macs", "weight", "input")


_TOP_OPTIONAL = ("other_weight_bits", "scale_bits", "state_digests")


_LAYER_OPTIONAL = ("kind", "has_input", "shared_with", "weight_digest", "partner", "pinned")


def plan_fields(data) -> dict:
    """Check a plan's JSON data field by field; return the Plan constructor's arguments (and,
    from version 2, ``figures``: what the file states, for :func:`check_figures`)."""
    version = data.get("version") if isinstance(data, dict) else None
    if isinstance(data, dict) and "version" in data and (version not in READABLE or isinstance(version, bool)):
        raise FieldError(f"version {kind_of(version)} is not supported; this qwidgets "
                         f"reads versions {', '.join(map(str, READABLE))}")
    top_optional = _TOP_OPTIONAL[:{1: 1, 2: 1, 3: 1, 4: 2}.get(version, 3)]  # 4 scale_bits, 5 state_digests
    check_fields(data, _TOP + ("figures",) if version != 1 else _TOP, "the top level", top_optional)
    if data["format"] != FORMAT:
        raise FieldError(f"format must be {FORMAT!r}, got {kind_of(data['format'])}")
    figures = _figures(data["figures"]) if version != 1 else None
    # 3 added partner, 5 pinned
    layer_optional = _LAYER_OPTIONAL[:{1: 4, 2: 4, 3: 5, 4: 5}.get(version, len(_LAYER_OPTIONAL))]
    fp = fingerprint_field(data["fingerprint"])
    pred = data["predicted_sqnr_db"]
    pred = None if pred is None else number_field(pred, "predicted_sqnr_db")
    aib = data["assumed_input_bits"]
    aib = None if aib is None else int_field(aib, "assumed_input_bits", 1, MAX_BITS)
    layers_d = data["layers"]
    if not isinstance(layers_d, dict) or not layers_d:
        raise FieldError(f"layers must be a non-empty object, got {kind_of(layers_d)}")
    layers, bits, shapes, macs, entries = {}, {}, {}, {}, {}
    other = data.get("other_weight_bits")
    other = None if other is None else int_field(other, "other_weight_bits", 0)
    states = data.get("state_digests")
    if states is not None:
        if not isinstance(states, dict):
            raise FieldError(f"state_digests must be an object of state_dict name -> digest, got {kind_of(states)}")
        states = {k: digest_field(v, f"state_digests[{k!r}]") for k, v in states.items()}
        if any(v is None for v in states.values()):
            raise FieldError("state_digests values must be hex digests, not null")
    for name, entry in layers_d.items():
        where = f"layers[{name!r}]"
        check_fields(entry, _LAYER, where, layer_optional)
        entries[name] = _entry_fields(entry, where)
        b = int_field(entry["bits"], f"{where}.bits", 1, MAX_BITS)
        shape = entry["weight_shape"]
        activation = entries[name].get("kind") == "activation"
        if activation and shape != []:
            raise FieldError(f"{where}.weight_shape must be [] for an activation, got {kind_of(shape)}")
        if not activation and (not isinstance(shape, list) or len(shape) < 2):
            raise FieldError(f"{where}.weight_shape must be a list of >= 2 sizes, got {kind_of(shape)}")
        shape = tuple(int_field(s, f"{where}.weight_shape[{i}]", 1) for i, s in enumerate(shape))
        m = int_field(entry["macs"], f"{where}.macs", 0)
        wd = entry["weight"]
        channels = None
        if isinstance(wd, dict) and isinstance(wd.get("axis"), int) and not isinstance(wd["axis"], bool):
            if not -len(shape) <= wd["axis"] < len(shape):
                raise FieldError(f"{where}.weight.axis {wd['axis']} is out of range for "
                                 f"weight_shape {list(shape)}")
            channels = shape[wd["axis"]]
        if isinstance(wd, dict) and "block_size" in wd and version not in (4, 5, 6):
            raise FieldError(f"{where}.weight is a block grid, which plan files hold from version 4")
        w = grid_from_dict(wd, f"{where}.weight", channels)
        x = input_grid_from_dict(entry["input"], f"{where}.input", version)
        if w is None and x is None:
            raise FieldError(f"{where} has neither a weight nor an input grid")
        if activation and w is not None:
            raise FieldError(f"{where}.weight must be null for an activation (it has no weight)")
        main = w if w is not None else x
        if main.bits != b:
            raise FieldError(f"{where}.bits is {b} but its "
                             f"{'weight' if w is not None else 'input'} grid has {main.bits} bits")
        layers[name] = LayerSetting(weight=w, input=x)
        bits[name], shapes[name], macs[name] = b, shape, m
    scale_bits = int_field(data.get("scale_bits", 16), "scale_bits", 16, 32)
    if scale_bits not in (16, 32):
        raise FieldError(f"scale_bits must be 16 or 32, got {scale_bits}")
    for name, s in layers.items():
        g = s.weight
        if g is not None and g.blocked:
            want = block_shape(shapes[name], g.axis % len(shapes[name]), g.block_size) \
                if -len(shapes[name]) <= g.axis < len(shapes[name]) else None
            if tuple(g.scale.shape) != want:
                raise FieldError(f"layers[{name!r}].weight.shape {list(g.scale.shape)} does not fit "
                                 f"weight_shape {list(shapes[name])} in blocks of {g.block_size} along "
                                 f"axis {g.axis}")
    return dict(layers=layers, bits=bits, fingerprint=fp, weight_shapes=shapes, macs=macs,
                assumed_input_bits=aib, predicted_sqnr_db=pred, entries=entries,
                other_weight_bits=other, figures=figures, scale_bits=scale_bits,
                figures_version=version, state_digests=states)


def _figures(d) -> dict:
    check_fields(d, FIGURES, "figures")
    out = {k: number_field(d[k], f"figures.{k}") for k in FIGURES if d[k] is not None or k != "model_kib"}
    return {"model_kib": None, **out}


def plan_figures(plan) -> dict:
    """The plan's figures as the file records them (under the Plan attributes' names)."""
    return {k: getattr(plan, k) for k in FIGURES}


def check_figures(plan, stated: dict | None, version: int = VERSION) -> None:
    """Refuse a file whose stated figures are not its layers' (edited by hand, say). Versions 2
    and 3 stated mean bits of the codes alone (version 4: stored bits, scales and zero points too)."""
    if stated is None:  # version 1
        return
    figures = plan_figures(plan)
    if version in (2, 3):  # code bits: weights (activations hold none) at their widths, float at 32
        params = {n: 0 if s.weight is None and s.input is not None and not plan.weight_shapes[n]
                  else math.prod(plan.weight_shapes[n]) for n, s in plan.layers.items()}
        total = sum(params.values())
        figures["mean_bits"] = 0.0 if total == 0 else sum(
            params[n] * (32 if s.weight is None else s.weight.bits) for n, s in plan.layers.items()) / total
    for k, v in figures.items():
        s = stated[k]
        if (v is None) != (s is None) or (v is not None and abs(v - s) > 1e-9 * max(abs(v), 1.0)):
            raise FieldError(f"figures.{k} is {s!r} but the plan's layers give {v!r} (the file "
                             "was changed by hand? fix or delete the figures)")


def _entry_fields(entry: dict, where: str) -> dict:
    """The optional entry fields of a plan layer (kind, has_input, shared_with, weight_digest,
    pinned)."""
    out = {}
    if "kind" in entry:
        out["kind"] = string_field(entry["kind"], f"{where}.kind")
    if "has_input" in entry:
        out["has_input"] = bool_field(entry["has_input"], f"{where}.has_input")
    if "shared_with" in entry:
        out["shared_with"] = string_list_field(entry["shared_with"], f"{where}.shared_with")
    if "weight_digest" in entry:
        out["weight_digest"] = digest_field(entry["weight_digest"], f"{where}.weight_digest")
    if "partner" in entry:  # an activation: the other operand of its product (null: float)
        p = entry["partner"]
        out["partner"] = None if p is None else string_field(p, f"{where}.partner")
    if "pinned" in entry:
        out["pinned"] = bool_field(entry["pinned"], f"{where}.pinned")
    return out
