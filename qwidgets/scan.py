"""Per-layer sensitivity scan: how much each layer, quantized alone, costs at each bit width.

Two scopes, measured for every quantizable layer and bit width:

- layer scope: the layer's own output, computed functionally from the input it received in one
  capturing pass (no further forward passes);
- model scope: the model's output with only that layer quantized, by an output-replacing hook
  on the user's model (no copies). For each layer the model runs once with the layer's output
  replaced by a stack along the batch axis of ``len(bits) + 2`` versions (one per bit width
  between two float copies), so the part of the model before the layer runs once for all bit
  widths. That is valid when the rest of the model treats samples independently (eval-mode
  BatchNorm, pooling, convolutions, residual additions of tensors computed after the layer);
  the float copies at both ends of the stack are the check: they must reproduce the float
  model's output. When the stacked pass fails (for example a skip connection from before the
  layer meets the stacked tensor) or the check fails (operations that mix samples), the layer
  is measured with one pass per bit width instead. Results are the same either way.
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Mapping, Sequence
from numbers import Integral

import numpy as np
import torch
from torch import nn

from . import probe
from .grid import UniformGrid, check_bits
from .metrics import error_stats
from .plan import (
    Plan,
    _FieldError,
    _grid_from_dict,
    _grid_to_dict,
    _read_text,
    _write_text,
    model_fingerprint,
)
from .quantize import quantize as _quantize
from .ranges import METHODS, fit_range
from .setting import LayerSetting

__all__ = ["scan", "SensitivityTable", "QUANTIZE_MODES", "SCOPES"]

QUANTIZE_MODES = ("weight", "input", "both")
SCOPES = ("layer", "model", "both")
_TABLE_FORMAT = "qwidgets sensitivity table"
_TABLE_VERSION = 1


# ---------------------------------------------------------------------------- the table
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
                 input_grids: Mapping[str, Sequence[UniformGrid]] | None, n_samples: int):
        self.layers = list(layers)
        self.bits = tuple(int(b) for b in bits)
        self.quantize = quantize
        self.method = method
        self.per_channel = bool(per_channel)
        self.fingerprint = fingerprint
        self.n_samples = int(n_samples)
        self._info = {n: dict(info[n]) for n in self.layers}
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

    def weight_channels(self, layer: str) -> int:
        """Channels of the weight grids (one scale and zero point each): output channels
        per channel, else 1."""
        return self.weight_shape(layer)[0] if self.per_channel else 1

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
                    predicted_sqnr_db=predicted_sqnr_db)

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
                f"quantize={self.quantize!r}, scopes={list(self.scopes)})")

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
                cells.append(f'<td style="background:{bg};text-align:right">{_fmt_db(v)}</td>')
            body.append(f"<tr><td>{html.escape(name)}</td><td>{html.escape(self.layer_type(name))}</td>"
                        f'<td style="text-align:right">{self.params(name):,}</td>'
                        f'<td style="text-align:right">{self.macs(name):,}</td>' + "".join(cells) + "</tr>")
        return (f"<div><b>{scope.capitalize()}-output SQNR (dB)</b>, {self.quantize} quantized, "
                f"one layer at a time ({self.n_samples} samples)<table>"
                f"<tr><th>layer</th><th>type</th><th>weights</th><th>MACs / sample</th>{head}</tr>"
                + "".join(body) + "</table></div>")

    def plot(self, scope: str = "model", ax=None):
        """A heatmap of SQNR (dB), layers x bit widths, values written in the cells.

        Returns the matplotlib Figure (a new one unless ``ax`` is given).
        """
        from matplotlib.figure import Figure

        arr = self.sqnr_array(scope)
        if arr is None:
            raise ValueError(f"the table holds no {scope}-scope SQNR; scan with scope={scope!r} or 'both'")
        if ax is None:
            fig = Figure(figsize=(1.2 + 0.75 * len(self.bits) + 0.08 * max(map(len, self.layers)),
                                  1.4 + 0.32 * len(self.layers)), dpi=100)
            ax = fig.add_subplot()
        else:
            fig = ax.figure
        from .widgets.heatmap import draw_heatmap  # drawing lives with the widgets

        draw_heatmap(ax, arr, self.layers, self.bits, f"{scope}-output SQNR (dB)")
        fig.tight_layout()
        return fig

    # ------------------------------------------------------------------ JSON
    def to_dict(self) -> dict:
        layers = []
        for i, name in enumerate(self.layers):
            entry = {"name": name, **{k: self._info[name].get(k) for k in ("type", "weight_shape", "input_shape", "macs", "model_pass")}}
            entry["weight_shape"] = list(entry["weight_shape"])
            entry["input_shape"] = None if entry["input_shape"] is None else list(entry["input_shape"])
            for scope in ("layer", "model"):
                arr = self._sqnr[scope]
                entry[f"{scope}_sqnr_db"] = None if arr is None else [_json_db(v) for v in arr[i]]
            for kind in ("weight", "input"):
                g = self._grids[kind]
                entry[f"{kind}_grids"] = None if g is None else [_grid_to_dict(x) for x in g[name]]
            layers.append(entry)
        return {"format": _TABLE_FORMAT, "version": _TABLE_VERSION, "bits": list(self.bits),
                "quantize": self.quantize, "method": self.method, "per_channel": self.per_channel,
                "fingerprint": self.fingerprint, "n_samples": self.n_samples, "layers": layers}

    def save(self, path: str | os.PathLike) -> None:
        """Write the table (SQNRs, shapes, fitted grids) as JSON."""
        _write_text(path, json.dumps(self.to_dict(), allow_nan=False), "table")

    @classmethod
    def load(cls, path: str | os.PathLike) -> SensitivityTable:
        """Read a table written by :meth:`save` (JSON only; every field checked)."""
        text = _read_text(path, "table")
        try:
            data = json.loads(text)
        except json.JSONDecodeError as e:
            raise ValueError(f"the table is not valid JSON (truncated or damaged?): {e}") from None
        try:
            return _table_from_dict(data)
        except (_FieldError, KeyError, TypeError) as e:
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


def _fmt_db(v: float) -> str:
    if not np.isfinite(v):
        return "exact" if v > 0 else "-inf"
    return f"{v:.1f}"


def _json_db(v: float):
    return float(v) if math.isfinite(v) else ("inf" if v > 0 else "-inf")


def _hash_lines(lines) -> str:
    import hashlib

    h = hashlib.sha256()
    for line in lines:
        h.update((line + "\n").encode())
    return h.hexdigest()


def _table_from_dict(d) -> SensitivityTable:
    keys = ("format", "version", "bits", "quantize", "method", "per_channel", "fingerprint",
            "n_samples", "layers")
    if not isinstance(d, dict) or set(d) != set(keys):
        raise _FieldError(f"expected an object with fields {list(keys)}")
    if d["format"] != _TABLE_FORMAT or d["version"] != _TABLE_VERSION:
        raise _FieldError(f"format / version must be {_TABLE_FORMAT!r} / {_TABLE_VERSION}, "
                          f"got {d['format']!r} / {d['version']!r}")
    bits = tuple(check_bits(b, "bits[]") for b in d["bits"])
    if d["quantize"] not in QUANTIZE_MODES:
        raise _FieldError(f"quantize must be one of {QUANTIZE_MODES}, got {d['quantize']!r}")
    names, info, sq, grids = [], {}, {"layer": [], "model": []}, {"weight": {}, "input": {}}
    for k, e in enumerate(d["layers"]):
        name = e["name"]
        if not isinstance(name, str):
            raise _FieldError(f"layers[{k}].name must be a string")
        names.append(name)
        info[name] = {"type": str(e["type"]), "weight_shape": tuple(int(s) for s in e["weight_shape"]),
                      "input_shape": None if e["input_shape"] is None else tuple(e["input_shape"]),
                      "macs": int(e["macs"]), "model_pass": str(e.get("model_pass", "-"))}
        for scope in ("layer", "model"):
            v = e[f"{scope}_sqnr_db"]
            if v is not None and len(v) != len(bits):
                raise _FieldError(f"layers[{k}].{scope}_sqnr_db must hold {len(bits)} values")
            sq[scope].append(None if v is None else [_db_from_json(x, f"layers[{k}].{scope}_sqnr_db") for x in v])
        for kind in ("weight", "input"):
            v = e[f"{kind}_grids"]
            if v is not None:
                if len(v) != len(bits):
                    raise _FieldError(f"layers[{k}].{kind}_grids must hold {len(bits)} grids")
                ch = info[name]["weight_shape"][0] if kind == "weight" and d["per_channel"] else None
                grids[kind][name] = [_grid_from_dict(g, f"layers[{k}].{kind}_grids[{j}]", ch)
                                     for j, g in enumerate(v)]
    arrays = {}
    for scope in ("layer", "model"):
        rows = sq[scope]
        if any(r is None for r in rows) and not all(r is None for r in rows):
            raise _FieldError(f"{scope}_sqnr_db must be given for every layer or for none")
        arrays[scope] = None if not rows or rows[0] is None else np.array(rows, dtype=float)
    return SensitivityTable(
        layers=names, bits=bits, quantize=d["quantize"], method=str(d["method"]),
        per_channel=bool(d["per_channel"]), fingerprint=str(d["fingerprint"]), info=info,
        layer_sqnr=arrays["layer"], model_sqnr=arrays["model"],
        weight_grids=grids["weight"] if len(grids["weight"]) == len(names) else None,
        input_grids=grids["input"] if len(grids["input"]) == len(names) else None,
        n_samples=int(d["n_samples"]))


def _db_from_json(v, where: str) -> float:
    if v in ("inf", "-inf"):
        return float(v)
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise _FieldError(f"{where} must hold numbers, got {v!r}")
    return float(v)


# ---------------------------------------------------------------------------- scanning
def scan(model: nn.Module, data, bits: Sequence[int] = (2, 3, 4, 5, 6, 8), *, quantize: str = "weight",
         method: str = "mse", per_channel: bool = True, scope: str = "both",
         max_samples: int | None = None, progress: bool = True) -> SensitivityTable:
    """Measure every quantizable layer, quantized alone, at every bit width in ``bits``.

    Parameters
    ----------
    model, data : the user's model and a batch it accepts (tensor, tuple of args or dict of
        kwargs); the model is left bit-identical
    bits : bit widths to try (ints in 1..16; sorted, duplicates dropped)
    quantize : ``"weight"`` (weights on a grid fitted to them, per output channel when
        ``per_channel``), ``"input"`` (the layer's input on a per-tensor grid fitted to what it
        received) or ``"both"`` (each bit width used for both)
    method : range fitting, as in :func:`qwidgets.fit_range` (``"minmax"``, ``"percentile"``,
        ``"mse"``)
    scope : ``"layer"`` (each layer's output), ``"model"`` (the model's output) or ``"both"``
    max_samples : use only the first that many samples of ``data``
    progress : show a progress bar (tqdm.auto)

    >>> _ = torch.manual_seed(0)
    >>> net = nn.Sequential(nn.Linear(8, 16), nn.ReLU(), nn.Linear(16, 4))
    >>> t = scan(net, torch.randn(64, 8), bits=(4, 8), progress=False)
    >>> t.layers, t.sqnr_db("0", 8) > t.sqnr_db("0", 4) + 15
    (['0', '2'], True)
    """
    probe.check_model(model)
    bits = _check_bits_tuple(bits)
    if quantize not in QUANTIZE_MODES:
        raise ValueError(f"quantize must be one of {', '.join(map(repr, QUANTIZE_MODES))}, got {quantize!r}")
    if method not in METHODS:
        raise ValueError(f"method must be one of {', '.join(map(repr, METHODS))}, got {method!r}")
    if scope not in SCOPES:
        raise ValueError(f"scope must be one of {', '.join(map(repr, SCOPES))}, got {scope!r}")
    if not isinstance(per_channel, bool):
        raise TypeError(f"per_channel must be True or False, got {per_channel!r}")
    max_samples = probe.check_max_samples(max_samples)
    data = probe.check_data(model, data, max_samples)
    inputs = probe.capture_inputs(model, data)
    modules = dict(model.named_modules())
    n_data = _batch_size(data)
    qw, qi = quantize in ("weight", "both"), quantize in ("input", "both")
    ref = probe.forward_float(model, data) if scope != "layer" else None

    names = list(inputs)
    info, wgrids, igrids = {}, {}, {}
    layer_sq = np.full((len(names), len(bits)), np.nan) if scope != "model" else None
    model_sq = np.full((len(names), len(bits)), np.nan) if scope != "layer" else None
    bar = _progress(len(names), progress)
    try:
        for i, name in enumerate(names):
            layer, x = modules[name], inputs[name]
            wg = [probe.fit_weight(layer, b, method, per_channel=per_channel) for b in bits] if qw else None
            ig = [fit_range(x, b, method) for b in bits] if qi else None
            wgrids[name], igrids[name] = wg, ig
            configs = [(None if wg is None else wg[j], None if ig is None else ig[j]) for j in range(len(bits))]
            info[name] = {"type": probe.base_type_name(layer), "weight_shape": tuple(layer.weight.shape),
                          "input_shape": tuple(x.shape[1:]),
                          "macs": probe.layer_macs(layer, tuple(x.shape)) // max(n_data, 1),
                          "model_pass": "-"}
            if layer_sq is not None:
                layer_sq[i] = _layer_scope(layer, x, configs)
            if model_sq is not None:
                model_sq[i], info[name]["model_pass"] = _model_scope(model, data, name, layer, configs, ref)
            bar.update(1)
    finally:
        bar.close()
    return SensitivityTable(layers=names, bits=bits, quantize=quantize, method=method,
                            per_channel=per_channel, fingerprint=model_fingerprint(model), info=info,
                            layer_sqnr=layer_sq, model_sqnr=model_sq,
                            weight_grids=wgrids if qw else None, input_grids=igrids if qi else None,
                            n_samples=n_data)


def _check_bits_tuple(bits) -> tuple[int, ...]:
    if isinstance(bits, Integral) and not isinstance(bits, bool):
        bits = (bits,)
    if isinstance(bits, (str, bytes)) or not isinstance(bits, Sequence):
        raise TypeError(f"bits must be a tuple of ints in 1..16, got {bits!r}")
    if len(bits) == 0:
        raise ValueError("bits is empty; give at least one bit width, e.g. bits=(4, 8)")
    return tuple(sorted({check_bits(b, "bits") for b in bits}))


def _batch_size(data) -> int:
    first = next(probe.iter_tensors(data))
    return int(first.shape[0]) if first.dim() else 1


def _progress(total: int, show: bool):
    from tqdm.auto import tqdm

    return tqdm(total=total, desc="scan", unit="layer", disable=not show, leave=False)


def _layer_scope(layer: nn.Module, x: torch.Tensor, configs) -> np.ndarray:
    """Layer-output SQNR of each (weight grid, input grid) config, from the captured input.

    Configs that quantize only the weights share one call of the layer: their weights (and
    the float weight, for the reference) are stacked along the output channels, so the input
    is read, and for convolutions unfolded, once for all of them.
    """
    with torch.no_grad():
        w = layer.weight.detach()
        if all(ig is None for _, ig in configs) and _stacks_weights(layer):
            weights = [w] + [w if wg is None else _quantize(w, wg) for wg, _ in configs]
            signal, errors = _stacked_weight_errors(layer, x, weights)
            return np.array([_db(signal, e) for e in errors[1:]])
        ref = probe.layer_forward(layer, x, w)
        signal = _power(ref)
        out = []
        for wg, ig in configs:
            y = probe.layer_forward(layer, x if ig is None else _quantize(x, ig),
                                  w if wg is None else _quantize(w, wg))
            out.append(_db(signal, _power(y - ref)))
        return np.array(out)


def _power(t: torch.Tensor) -> float:
    """Sum of squares, accumulated in float64."""
    return float(torch.linalg.vector_norm(t, dtype=torch.float64)) ** 2


_CHANNELS_LAST = {4: torch.channels_last, 5: torch.channels_last_3d}
_STACK_ELEMENTS = 1 << 24  # at most this many output values (64 MiB in float32) per stacked call


def _stacks_weights(layer: nn.Module) -> bool:
    return isinstance(layer, nn.Linear) or getattr(layer, "groups", 1) == 1


def _stacked_weight_errors(layer: nn.Module, x: torch.Tensor, weights: list) -> tuple[float, list]:
    """Output power for ``weights[0]`` and the error power of each weight's output against it.

    The layer is linear in its weight, so the error of weight ``w_q`` is the layer's output for
    ``w_q - w`` with no bias: one call computes it directly (more accurately than a difference
    of two outputs). Several weights go in one call (output channels stacked), and the powers of
    a call come from one reduction over everything but the stacking axis.
    """
    linear = isinstance(layer, nn.Linear)
    per_out = max(1, _out_numel(layer, x))
    group = max(1, _STACK_ELEMENTS // per_out)
    w = weights[0]
    stacked = [w] + [q - w for q in weights[1:]]
    # Many output channels in one call run several times faster in channels-last layout on
    # the CPU (measured 3x for 112 x 16 x 3 x 3 on 64 x 16 x 32 x 32); the results are the same.
    layout = _CHANNELS_LAST.get(x.dim())
    if layout is not None:
        x = x.contiguous(memory_format=layout)
    signal, errors = 0.0, [0.0]
    for i in range(0, len(stacked), group):
        ws = torch.cat(stacked[i : i + group], dim=0)
        if layout is not None:
            ws = ws.contiguous(memory_format=layout)
        y = probe.layer_forward(layer, x, ws, use_bias=False)
        ws = stacked[i : i + group]
        axis = y.dim() - 1 if linear else 1
        y = y.unflatten(axis, (len(ws), -1))  # (..., config, out) or (N, config, C, ...)
        first = 0
        if i == 0:
            ref = y.select(axis, 0)
            if layer.bias is not None:
                b = layer.bias.detach()
                ref = ref + (b if linear else b.reshape((-1,) + (1,) * (ref.dim() - 2)))
            signal = _power(ref)
            first = 1
        part = y.narrow(axis, first, len(ws) - first)
        # float32 sums over each sample's values (short, accurate), then float64 across them:
        # a float32 sum over the whole batch drifts by ~1e-5, and a float64 copy costs more
        inner = tuple(d for d in range(1, y.dim()) if d != axis) if axis != 0 else ()
        partial = part.square().sum(dim=inner) if inner else part.square()
        outer = tuple(d for d in range(partial.dim()) if d != (1 if axis != 0 else 0))
        errors.extend(partial.double().sum(dim=outer).tolist())
    return signal, errors


def _out_numel(layer: nn.Module, x: torch.Tensor) -> int:
    if isinstance(layer, nn.Linear):
        return x.numel() // layer.in_features * layer.out_features
    return probe.layer_macs(layer, tuple(x.shape)) // max(1, layer.weight[0].numel())


class _NotStackable(Exception):
    """The stacked model-scope pass does not apply to this layer; measure one config at a time."""


def _model_scope(model, data, name, layer, configs, ref) -> tuple[np.ndarray, str]:
    ref_parts = [t for t in probe.iter_tensors(ref) if t.is_floating_point()]
    ref_flat = probe.flat_output(ref, "float")
    try:
        return _model_scope_stacked(model, data, name, layer, configs, ref_parts, ref_flat), "stacked"
    except _NotStackable:
        pass
    out = []
    for wg, ig in configs:
        q = probe.forward_quantized(model, data, {name: LayerSetting(weight=wg, input=ig)})
        out.append(error_stats(ref_flat, probe.flat_output(q, "quantized")).sqnr_db)
    return np.array(out), "per bit width"


def _model_scope_stacked(model, data, name, layer, configs, ref_parts, ref_flat) -> np.ndarray:
    """Model-output SQNR of every config from one forward with the layer's output stacked.

    The stack along the batch axis holds every config and a float copy between them (two
    configs or more: [config 1, ..., float, ..., config B]; one config: [float, config, float]).
    The float copy is the check that the rest of the model keeps samples apart: an operation
    mixing them, in either direction along the batch, changes it. One copy rather than one at
    each end keeps the extra work of the check to 1 / B.
    """
    b = len(configs)
    float_at = [b // 2] if b >= 2 else [0, 2]
    order: list = list(range(b))  # config indices, with None where a float copy goes
    for k in float_at:
        order.insert(k, None)
    n_copies = len(order)
    w = layer.weight.detach()
    with torch.no_grad():
        quantized = [w if wg is None else _quantize(w, wg) for wg, _ in configs]
    weights = [w if i is None else quantized[i] for i in order]
    inputs = [None if i is None else configs[i][1] for i in order]
    calls = [0]
    if not ref_parts or any(t.dim() == 0 for t in ref_parts):
        raise _NotStackable

    def outputs(parts):
        return [probe.layer_forward(layer, p if ig is None else _quantize(p, ig), wq)
                for p, ig, wq in zip(parts, inputs, weights, strict=True)]

    def hook(module, args, kwargs, output):
        x = probe.first_input(module, name, args, kwargs)
        calls[0] += 1
        if calls[0] == 1:
            if type(module).forward not in probe.BASE_FORWARDS:
                probe.check_same_math(module, name, x, output)
            if not isinstance(output, torch.Tensor) or output.dim() == 0:
                raise _NotStackable
            return torch.cat(outputs([x] * n_copies), dim=0)
        # a layer called again within the same forward sees the stacked batch: one part each
        if x.dim() == 0 or x.shape[0] % n_copies:
            raise _NotStackable
        return torch.cat(outputs(x.chunk(n_copies, dim=0)), dim=0)

    try:
        out = probe.run_with_hooks(model, data, {layer: hook}, pre=False)
    except _NotStackable:
        raise
    except (RuntimeError, ValueError) as e:
        if isinstance(e, probe.LayerInputError):
            raise
        raise _NotStackable from e
    parts = [t for t in probe.iter_tensors(out) if t.is_floating_point()]
    if len(parts) != len(ref_parts):
        raise _NotStackable
    per_copy = [[] for _ in range(n_copies)]
    for t, r in zip(parts, ref_parts, strict=True):
        if t.dim() == 0 or tuple(t.shape) != (n_copies * r.shape[0],) + tuple(r.shape[1:]):
            raise _NotStackable
        for k, chunk in enumerate(t.reshape((n_copies,) + tuple(r.shape))):
            per_copy[k].append(chunk.reshape(-1).double())
    errs = [float((torch.cat(p) - ref_flat).pow(2).sum()) for p in per_copy]
    sig = float(ref_flat.pow(2).sum())
    checks = [e for e, i in zip(errs, order, strict=True) if i is None]
    noises = [e for e, i in zip(errs, order, strict=True) if i is not None]  # in config order
    # the float copies must reproduce the float model far below the smallest quantization noise
    positive = [e for e in noises if e > 0]
    for c in checks:
        if c > 0 and (not positive or c > 1e-3 * min(positive)):
            raise _NotStackable
    return np.array([_db(sig, e) for e in noises])


def _db(signal: float, noise: float) -> float:
    if noise == 0.0:
        return math.inf
    if signal == 0.0:
        return -math.inf
    return 10.0 * math.log10(signal / noise)
