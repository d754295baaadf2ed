"""SensitivityTable: the SQNR of each layer quantized alone at each bit width, with its grids."""

from __future__ import annotations

import json
import math
import os
from collections.abc import Mapping, Sequence

import numpy as np

from ..core.checks import check_bits
from ..core.grid import UniformGrid
from ..core.setting import LayerSetting
from ..model.entries import Coverage
from .files import read_text, write_text
from .plan import Plan
from .schema import (
    TABLE_FORMAT,
    TABLE_VERSION,
    FieldError,
    grid_to_dict,
    json_db,
    table_fields,
)


class SensitivityTable:
    """SQNR of each layer quantized alone at each bit width, with the grids and costs behind it.

    Made by :func:`scan` (or :meth:`load`). ``layers`` are in execution order; ``bits`` ascend.

    >>> t = SensitivityTable.synthetic(np.array([[12.0, 36.0]]), params=[64], bits=(2, 6))
    >>> t.layers, t.bits, t.sqnr_db("layer0", 6), t.params("layer0")
    (['layer0'], (2, 6), 36.0, 64)
    """

    def __init__(self, *, layers: Sequence[str], bits: Sequence[int], quantize: str, method: str,
                 per_channel: bool, fingerprint: str, info: Mapping[str, Mapping],
                 layer_sqnr: np.ndarray | None, model_sqnr: np.ndarray | None,
                 weight_grids: Mapping[str, Sequence[UniformGrid]] | None,
                 input_grids: Mapping[str, Sequence[UniformGrid]] | None, n_samples: int,
                 coverage: Coverage | None = None):
        self.layers = list(layers)
        self.bits = tuple(int(b) for b in bits)
        self.quantize = quantize
        self.method = method
        self.per_channel = bool(per_channel)
        self.fingerprint = fingerprint
        self.n_samples = int(n_samples)
        self._info = {n: dict(info[n]) for n in self.layers}
        if coverage is None:  # a table from before coverage was recorded: what it holds
            n = sum(math.prod(self._info[k]["weight_shape"]) for k in self.layers)
            coverage = Coverage(n, n, (), sum(self.stored_bits(k) for k in self.layers))
        if not isinstance(coverage, Coverage):
            raise TypeError(f"coverage must be a Coverage, got {type(coverage).__name__}")
        self.coverage = coverage
        shape = (len(self.layers), len(self.bits))
        for what, arr in (("layer_sqnr", layer_sqnr), ("model_sqnr", model_sqnr)):
            if arr is not None and np.shape(arr) != shape:
                raise ValueError(f"{what} must have shape {shape} (layers x bits), got {np.shape(arr)}")
        self._sqnr = {
            "layer": None if layer_sqnr is None else np.asarray(layer_sqnr, dtype=float).copy(),
            "model": None if model_sqnr is None else np.asarray(model_sqnr, dtype=float).copy(),
        }
        self._grids = {
            "weight": None if weight_grids is None else {n: list(weight_grids[n]) for n in self.layers},
            "input": None if input_grids is None else {n: list(input_grids[n]) for n in self.layers},
        }

    # ------------------------------------------------------------------ look-ups
    def _row(self, layer: str) -> int:
        try:
            return self.layers.index(layer)
        except ValueError:
            raise KeyError(f"layer {layer!r} is not in the table; layers: {self.layers}") from None

    def _col(self, bits: int) -> int:
        try:
            return self.bits.index(bits)
        except ValueError:
            raise KeyError(f"bits={bits!r} was not scanned; scanned bit widths: {list(self.bits)}") from None

    @property
    def scopes(self) -> tuple[str, ...]:
        """The scopes this table holds: ``"layer"`` and / or ``"model"``."""
        return tuple(s for s in ("layer", "model") if self._sqnr[s] is not None)

    def sqnr_array(self, scope: str = "model") -> np.ndarray | None:
        """SQNR in dB as a (layers x bits) array (a copy), or None when that scope was not scanned."""
        if scope not in ("layer", "model"):
            raise ValueError(f"scope must be 'layer' or 'model', got {scope!r}")
        arr = self._sqnr[scope]
        return None if arr is None else arr.copy()

    def sqnr_db(self, layer: str, bits: int, scope: str = "model") -> float:
        """SQNR (dB) of ``layer``'s output (scope ``"layer"``) or the model's output (``"model"``)
        with only that layer quantized at ``bits``."""
        arr = self.sqnr_array(scope)
        if arr is None:
            raise ValueError(f"the table holds no {scope}-scope SQNR; scan with scope={scope!r} or 'both'")
        return float(arr[self._row(layer), self._col(bits)])

    def params(self, layer: str) -> int:
        """Number of weights of ``layer`` (bias not counted)."""
        return math.prod(self._info[self.layers[self._row(layer)]]["weight_shape"])

    def weight_shape(self, layer: str) -> tuple[int, ...]:
        return tuple(self._info[self.layers[self._row(layer)]]["weight_shape"])

    def weight_axis(self, layer: str) -> int:
        """The per-channel axis of ``layer``'s weight grids (1 for transposed convolutions)."""
        return int(self._info[self.layers[self._row(layer)]].get("axis", 0))

    def weight_channels(self, layer: str) -> int:
        """Channels of the weight grids (one scale and zero point each): output channels
        (embedding rows) per channel, else 1."""
        return self.weight_shape(layer)[self.weight_axis(layer)] if self.per_channel else 1

    def has_input(self, layer: str) -> bool:
        """True when ``layer`` runs as a module with a tensor input (its inputs can be
        quantized); False for weight-only entries (attention, recurrent, embedding, ...).

        >>> t = SensitivityTable.synthetic(np.array([[12.0, 36.0]]), params=[64], bits=(2, 6))
        >>> t.has_input("layer0")
        True
        """
        return bool(self._info[self.layers[self._row(layer)]].get("has_input", True))

    def shared_with(self, layer: str) -> list[str]:
        """The other places that use ``layer``'s weight tensor (tied weights), or ``[]``.

        >>> t = SensitivityTable.synthetic(np.array([[12.0, 36.0]]), params=[64], bits=(2, 6))
        >>> t.shared_with("layer0")
        []
        """
        return list(self._info[self.layers[self._row(layer)]].get("shared_with", ()))

    def stored_bits(self, layer: str) -> int:
        """Storage of ``layer``'s weight at its stored width, in bits (float32: 32 a value)."""
        v = self._info[self.layers[self._row(layer)]].get("stored_bits")
        return int(v) if v is not None else 32 * self.params(layer)

    def unplanned_bits(self, planned=None) -> int:
        """Storage in bits, at their stored width, of the model's floating-point weights outside
        ``planned`` (default: every entry of the table), from :attr:`coverage`.

        >>> t = SensitivityTable.synthetic(np.array([[12.0, 36.0]]), params=[64], bits=(2, 6))
        >>> t.unplanned_bits(), t.unplanned_bits([])
        (0, 2048)
        """
        names = self.layers if planned is None else list(planned)
        return max(0, int(self.coverage.total_bits) - sum(self.stored_bits(n) for n in names))

    def weight_digest(self, layer: str) -> str | None:
        """Digest of ``layer``'s weight values when scanned (plans check it against the model)."""
        return self._info[self.layers[self._row(layer)]].get("digest")

    def kind(self, layer: str) -> str:
        """``"layer"``, ``"attention"``, ``"recurrent"`` or ``"embedding"``."""
        return self._info[self.layers[self._row(layer)]].get("kind", "layer")

    def macs(self, layer: str) -> int:
        """Multiply-accumulates of ``layer`` per sample (from the shapes captured in the scan)."""
        return int(self._info[self.layers[self._row(layer)]]["macs"])

    def layer_type(self, layer: str) -> str:
        return self._info[self.layers[self._row(layer)]]["type"]

    def model_pass(self, layer: str) -> str:
        """How the model scope was measured: ``"stacked"``, ``"per bit width"`` or ``"-"``."""
        return self._info[self.layers[self._row(layer)]].get("model_pass", "-")

    def weight_grid(self, layer: str, bits: int) -> UniformGrid | None:
        """The weight grid fitted for ``layer`` at ``bits`` (None if weights were not scanned)."""
        g = self._grids["weight"]
        return None if g is None else g[self.layers[self._row(layer)]][self._col(bits)]

    def input_grid(self, layer: str, bits: int) -> UniformGrid | None:
        """The input grid fitted for ``layer`` at ``bits`` (None if inputs were not scanned)."""
        g = self._grids["input"]
        return None if g is None else g[self.layers[self._row(layer)]][self._col(bits)]

    # ------------------------------------------------------------------ plans
    def make_plan(self, bits: Mapping[str, int], *, input_bits: int | None = 8,
                  predicted_sqnr_db: float | None = None) -> Plan:
        """A :class:`Plan` with the scanned grids of the given bit width per layer.

        >>> t = SensitivityTable.synthetic(np.array([[12.0, 36.0]]), params=[64], bits=(2, 6))
        >>> t.make_plan({"layer0": 6}).bits
        {'layer0': 6}
        """
        if not isinstance(bits, Mapping) or not bits:
            raise ValueError("bits must be a non-empty mapping from layer name to bit width")
        settings, chosen = {}, {}
        for name in self.layers:
            if name not in bits:
                continue
            b = bits[name]
            self._col(b)
            settings[name] = LayerSetting(weight=self.weight_grid(name, b), input=self.input_grid(name, b))
            chosen[name] = int(b)
        unknown = [n for n in bits if n not in self._info]
        if unknown:
            raise KeyError(f"layers {unknown} are not in the table; layers: {self.layers}")
        return Plan(settings, chosen, fingerprint=self.fingerprint,
                    weight_shapes={n: self.weight_shape(n) for n in settings},
                    macs={n: self.macs(n) for n in settings},
                    assumed_input_bits=None if self.quantize != "weight" else input_bits,
                    predicted_sqnr_db=predicted_sqnr_db,
                    entries={n: {"kind": self.kind(n), "has_input": self.has_input(n),
                                 "shared_with": self.shared_with(n),
                                 "weight_digest": self.weight_digest(n)} for n in settings},
                    other_weight_bits=self.unplanned_bits(settings))

    # ------------------------------------------------------------------ display
    def to_rows(self) -> list[dict]:
        """One dict per (layer, bit width): layer, type, bits, params, macs, layer / model SQNR."""
        rows = []
        for i, name in enumerate(self.layers):
            for j, b in enumerate(self.bits):
                rows.append({
                    "layer": name,
                    "type": self.layer_type(name),
                    "bits": b,
                    "params": self.params(name),
                    "macs": self.macs(name),
                    "layer_sqnr_db": None if self._sqnr["layer"] is None else float(self._sqnr["layer"][i, j]),
                    "model_sqnr_db": None if self._sqnr["model"] is None else float(self._sqnr["model"][i, j]),
                })
        return rows

    def __repr__(self) -> str:
        return (f"SensitivityTable({len(self.layers)} layers x bits {list(self.bits)}, "
                f"quantize={self.quantize!r}, scopes={list(self.scopes)}; {self.coverage})")

    def _repr_html_(self) -> str:
        import html

        scope = "model" if "model" in self.scopes else "layer"
        arr = self._sqnr[scope]
        head = "".join(f"<th>{b} bits</th>" for b in self.bits)
        lo, hi = (np.nanmin(arr[np.isfinite(arr)]), np.nanmax(arr[np.isfinite(arr)])) \
            if np.isfinite(arr).any() else (0.0, 1.0)
        body = []
        for i, name in enumerate(self.layers):
            cells = []
            for v in arr[i]:
                shade = 0.0 if not np.isfinite(v) or hi == lo else (v - lo) / (hi - lo)
                bg = f"rgba(46,134,193,{0.08 + 0.5 * shade:.2f})"
                cells.append(f'<td style="background:{bg};text-align:right">{fmt_db(v)}</td>')
            shared = self.shared_with(name)
            label = html.escape(name) + (f" <small>(also {html.escape(', '.join(shared))})</small>"
                                         if shared else "")
            body.append(f"<tr><td>{label}</td><td>{html.escape(self.layer_type(name))}</td>"
                        f"<td>{'yes' if self.has_input(name) else 'weight only'}</td>"
                        f'<td style="text-align:right">{self.params(name):,}</td>'
                        f'<td style="text-align:right">{self.macs(name):,}</td>' + "".join(cells) + "</tr>")
        return (f"<div><b>{scope.capitalize()}-output SQNR (dB)</b>, {self.quantize} quantized, "
                f"one layer at a time ({self.n_samples} samples)<table>"
                f"<tr><th>layer</th><th>type</th><th>input</th><th>weights</th><th>MACs / sample</th>{head}</tr>"
                + "".join(body) + f"</table><small>{html.escape(str(self.coverage))}</small></div>")

    # ------------------------------------------------------------------ JSON
    def to_dict(self) -> dict:
        layers = []
        for i, name in enumerate(self.layers):
            entry = {"name": name, **{k: self._info[name].get(k) for k in ("type", "weight_shape", "input_shape", "macs", "model_pass")}}
            entry.update(kind=self.kind(name), axis=self.weight_axis(name), has_input=self.has_input(name),
                         shared_with=self.shared_with(name), stored_bits=self.stored_bits(name),
                         digest=self.weight_digest(name))
            entry["weight_shape"] = list(entry["weight_shape"])
            entry["input_shape"] = None if entry["input_shape"] is None else list(entry["input_shape"])
            for scope in ("layer", "model"):
                arr = self._sqnr[scope]
                entry[f"{scope}_sqnr_db"] = None if arr is None else [json_db(v) for v in arr[i]]
            for kind in ("weight", "input"):
                g = self._grids[kind]
                entry[f"{kind}_grids"] = None if g is None else [grid_to_dict(x) for x in g[name]]
            layers.append(entry)
        return {"format": TABLE_FORMAT, "version": TABLE_VERSION, "bits": list(self.bits),
                "quantize": self.quantize, "method": self.method, "per_channel": self.per_channel,
                "fingerprint": self.fingerprint, "n_samples": self.n_samples,
                "coverage": self.coverage.to_dict(), "layers": layers}

    def save(self, path: str | os.PathLike) -> None:
        """Write the table (SQNRs, shapes, fitted grids) as JSON."""
        write_text(path, json.dumps(self.to_dict(), allow_nan=False), "table")

    @classmethod
    def load(cls, path: str | os.PathLike) -> SensitivityTable:
        """Read a table written by :meth:`save` (JSON only; every field checked)."""
        text = read_text(path, "table")
        try:
            data = json.loads(text)
        except json.JSONDecodeError as e:
            raise ValueError(f"the table is not valid JSON (truncated or damaged?): {e}") from None
        try:
            return cls(**table_fields(data))
        except (FieldError, KeyError, TypeError) as e:
            raise ValueError(f"invalid sensitivity table: {e}") from None

    # ------------------------------------------------------------------ synthetic
    @classmethod
    def synthetic(cls, model_sqnr_db, *, params: Sequence[int], bits: Sequence[int],
                  macs: Sequence[int] | None = None, names: Sequence[str] | None = None
                  ) -> SensitivityTable:
        """A table from given model-scope SQNRs (for planning experiments, tests and benchmarks).

        Each layer gets a ``(params, 1)`` weight with per-tensor grids of scale 1.
        """
        arr = np.asarray(model_sqnr_db, dtype=float)
        if arr.ndim != 2 or arr.shape[0] != len(params) or arr.shape[1] != len(bits):
            raise ValueError(f"model_sqnr_db must be (layers, bits) = ({len(params)}, {len(bits)}), got {arr.shape}")
        names = list(names) if names is not None else [f"layer{i}" for i in range(len(params))]
        macs = list(macs) if macs is not None else list(params)
        bits = tuple(check_bits(b) for b in bits)
        info = {n: {"type": "Linear", "weight_shape": (int(p), 1), "input_shape": (1,), "macs": int(m),
                    "model_pass": "-"} for n, p, m in zip(names, params, macs, strict=True)}
        grids = {n: [UniformGrid(b, 1.0) for b in bits] for n in names}
        fp = _hash_lines(f"{n}:{info[n]['weight_shape']}" for n in names)
        return cls(layers=names, bits=bits, quantize="weight", method="mse", per_channel=False,
                   fingerprint=fp, info=info, layer_sqnr=None, model_sqnr=arr, weight_grids=grids,
                   input_grids=None, n_samples=1)


def fmt_db(v: float) -> str:
    if not np.isfinite(v):
        return "exact" if v > 0 else "-inf"
    return f"{v:.1f}"


def _hash_lines(lines) -> str:
    import hashlib

    h = hashlib.sha256()
    for line in lines:
        h.update((line + "\n").encode())
    return h.hexdigest()
