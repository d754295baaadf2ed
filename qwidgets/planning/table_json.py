"""A SensitivityTable as JSON and back (the layout and its checks: :mod:`qwidgets.planning.table_schema`)."""

from __future__ import annotations

import json
import math

from .fields import FieldError, NonFinite, grid_to_dict, json_db
from .granularity import option_label
from .input_granularity import input_rows_to_json
from .table_schema import TABLE_FORMAT, TABLE_VERSION, table_fields


def table_to_dict(self) -> dict:
    """The table as JSON-ready data (layout: :func:`qwidgets.planning.table_schema.table_fields`)."""
    layers = []
    for i, name in enumerate(self.layers):
        entry = {"name": name, **{k: self._info[name].get(k) for k in ("type", "weight_shape", "input_shape", "macs", "model_pass")}}
        entry.update(kind=self.kind(name), axis=self.weight_axis(name), has_input=self.has_input(name),
                     shared_with=self.shared_with(name), stored_bits=self.stored_bits(name),
                     digest=self.weight_digest(name))
        if "partner" in self._info[name]:
            entry["partner"] = self._info[name]["partner"]
        entry["weight_shape"] = list(entry["weight_shape"])
        entry["input_shape"] = None if entry["input_shape"] is None else list(entry["input_shape"])
        for scope in ("layer", "model"):
            arr = self._sqnr[scope]
            entry[f"{scope}_sqnr_db"] = None if arr is None else [json_db(v) for v in arr[i]]
        for kind in ("weight", "input"):
            g = self._grids[kind]
            entry[f"{kind}_grids"] = None if g is None or g[name] is None else [
                grid_to_dict(x) for x in g[name]]
        for scope in ("layer", "model"):
            arr = self._input_sqnr[scope]
            entry[f"input_{scope}_sqnr_db"] = None if arr is None or not self.has_input_rows(name) \
                else [json_db(v) for v in arr[i]]
        if self._more:  # the rows of the other granularity options (NaN where skipped: null)
            entry["granularity_rows"] = {option_label(opt): {
                f"{scope}_sqnr_db": None if more[scope] is None else
                [None if math.isnan(v) else json_db(v) for v in more[scope][i]]
                for scope in ("layer", "model")} | {"weight_grids": None if more["grids"] is None else
                                                     [grid_to_dict(x) for x in more["grids"][name]]}
                for opt, more in self._more.items()}
        if self._input_more and self.has_input_rows(name):  # per-token input rows
            entry["input_granularity_rows"] = input_rows_to_json(self._input_more, i)
        layers.append(entry)
    extra = {} if self.state_digests is None else {"state_digests": dict(self.state_digests)}
    if self.input_granularities != ("tensor",):
        extra["input_granularities"] = list(self.input_granularities)
    if self.confirmed:
        extra["confirmed"] = [list(c) for c in sorted(self.confirmed)]
    return {**extra, "format": TABLE_FORMAT, "version": TABLE_VERSION, "bits": list(self.bits),
            "input_bits": list(self._input_bits),
            "quantize": self.quantize, "method": self.method, "per_channel": self.per_channel,
            "fingerprint": self.fingerprint, "n_samples": self.n_samples,
            "coverage": self.coverage.to_dict(), "estimate": self.estimate, "layers": layers,
            **({"notes": list(self.notes)} if self.notes else {}),
            **({"granularities": [option_label(g) for g in self.granularities]}
               if self.granularities != (("channel",) if self.per_channel else ("tensor",)) else {})}


def table_from_text(cls, text: str):
    """A table of class ``cls`` from the text :meth:`SensitivityTable.save` writes (every field
    checked; ValueError naming the field)."""
    try:
        data = json.loads(text, parse_constant=NonFinite)  # NaN / Infinity: named, refused
    except json.JSONDecodeError as e:
        raise ValueError(f"the table is not valid JSON (truncated or damaged?): {e}") from None
    try:
        return cls(**table_fields(data))
    except (FieldError, KeyError, TypeError) as e:
        raise ValueError(f"invalid sensitivity table: {e}") from None
