"""A ``quantize="separate"`` scan's table fields from its two scans: weights at ``bits``, inputs
at ``input_bits`` (and, with ``input_granularity=("tensor", "token")``, per token)."""

from __future__ import annotations

import numpy as np

__all__ = ["NoInputEntries", "join_sides"]


class NoInputEntries(ValueError):
    """A scan of inputs found no entry whose input can be measured (all weight-only)."""


def join_sides(weights: dict, inputs: dict | None, ibits: tuple) -> dict:
    """One "separate" table from a weight scan and an input scan of the same model and data
    (activations, which have no weight, come from the input scan alone, in execution order)."""
    names = _merged(weights["layers"], [] if inputs is None else inputs["layers"])
    pos = {} if inputs is None else {n: j for j, n in enumerate(inputs["layers"])}
    wpos = {n: j for j, n in enumerate(weights["layers"])}

    def rows(side, key, width, at=wpos):  # ``at``: where each name is in ``side``'s rows
        if side is None or side[key] is None:
            return None
        arr = np.full((len(names), width), np.nan)
        for r, name in enumerate(names):
            if name in at:
                arr[r] = side[key][at[name]]
        return arr

    out = dict(weights)
    nb = len(weights["bits"])
    if weights.get("granularity_rows"):  # the other weight granularities, on the merged rows too
        out["granularity_rows"] = {opt: {
            **{k: rows(part, k, nb) for k in ("layer_sqnr", "model_sqnr")},
            "weight_grids": {n: (part.get("weight_grids") or {}).get(n) for n in names}}
            for opt, part in weights["granularity_rows"].items()}
    out.update(layers=names, layer_sqnr=rows(weights, "layer_sqnr", nb),
               model_sqnr=rows(weights, "model_sqnr", nb),
               info={n: weights["info"][n] if n in wpos else inputs["info"][n] for n in names},
               weight_grids={n: weights["weight_grids"].get(n) for n in names})
    if inputs is not None:
        out["notes"] = list(dict.fromkeys(list(weights.get("notes", ())) + list(inputs.get("notes", ()))))
    out.update(quantize="separate", input_bits=ibits,
               input_layer_sqnr=rows(inputs, "layer_sqnr", len(ibits), pos),
               input_model_sqnr=rows(inputs, "model_sqnr", len(ibits), pos),
               input_grids={n: (list(inputs["input_grids"][n]) if n in pos else None) for n in names})
    if inputs is not None and inputs.get("token_sqnr") is not None:  # rows per token too
        out.update(input_granularities=("tensor", "token"), input_granularity_rows={"token": {
            scope: rows(inputs["token_sqnr"], scope, len(ibits), pos) for scope in ("layer", "model")}})
    return out


def _merged(first: list, second: list) -> list:
    """``first`` with the names only ``second`` holds inserted after their predecessor there."""
    out = list(first)
    known = set(out)
    for j, n in enumerate(second):
        if n in known:
            continue
        prev = next((second[i] for i in range(j - 1, -1, -1) if second[i] in known), None)
        out.insert(0 if prev is None else out.index(prev) + 1, n)
        known.add(n)
    return out
