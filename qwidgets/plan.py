"""Plan: the bit width and grids chosen for each layer; JSON I/O, applying and exporting it.

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
                    "scale": 0.02, "offset": 0.0, "zero_point": 0}            # or null
        }
      }
    }

Per-channel grids (``axis`` set) hold one scale / offset / zero point per channel; a grid
whose offset is not an integer multiple of its scale has ``"zero_point": null``.
"""

from __future__ import annotations

import copy
import hashlib
import json
import math
import os
import tempfile
import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass

import torch
from torch import nn

from .budget import FLOAT_BITS, layer_bops, weight_storage_bits
from .grid import MAX_BITS, UniformGrid, check_bits
from .metrics import ErrorStats, error_stats
from .quantize import quantize, to_codes
from .setting import LayerSetting

__all__ = [
    "CAUTION",
    "FORMAT",
    "VERSION",
    "LayerSetting",
    "Plan",
    "PlanReport",
    "apply_plan",
    "evaluate_plan",
    "export_codes",
    "model_fingerprint",
]

FORMAT = "qwidgets plan"
VERSION = 1
CAUTION = (
    "These figures are estimates on the data given: they screen a plan, they do not certify "
    "the quantized model. For safety-relevant use (vehicles, medical devices) validate the "
    "deployed model on its target hardware with the full test procedure."
)


def model_fingerprint(model: nn.Module) -> str:
    """SHA-256 of the model's ordered parameter names and shapes (values do not matter).

    >>> a, b = nn.Linear(3, 2), nn.Linear(3, 2)
    >>> model_fingerprint(a) == model_fingerprint(b), model_fingerprint(a) == model_fingerprint(nn.Linear(2, 2))
    (True, False)
    """
    if not isinstance(model, nn.Module):
        raise TypeError(f"model must be a torch.nn.Module, got {type(model).__name__}")
    h = hashlib.sha256()
    for name, p in model.named_parameters():
        h.update(f"{name}:{tuple(p.shape)}\n".encode())
    return h.hexdigest()


# ---------------------------------------------------------------------------- Plan
@dataclass(frozen=True, eq=False)
class Plan:
    """The grids chosen for each planned layer, with what is needed to cost and check them.

    ``layers``: name -> :class:`LayerSetting`; ``bits``: name -> chosen bit width;
    ``fingerprint``: :func:`model_fingerprint` of the model planned for; ``weight_shapes`` and
    ``macs`` (per sample) per layer; ``assumed_input_bits``: input width counted in BOPs for
    layers without an input grid (None: float); ``predicted_sqnr_db``: the allocator's
    prediction of the model-output SQNR (None when not predicted).

    >>> lin = nn.Linear(4, 2)
    >>> p = Plan({"": LayerSetting(weight=UniformGrid(4, 0.1))}, {"": 4},
    ...          fingerprint=model_fingerprint(lin), weight_shapes={"": (2, 4)}, macs={"": 8})
    >>> p.weight_kib * 8192, p.mean_weight_bits, p.bops  # 8 weights x 4 bits + one scale and zero point
    (96.0, 4.0, 256)
    >>> Plan.from_json(p.to_json()).bits
    {'': 4}
    """

    layers: dict
    bits: dict
    fingerprint: str
    weight_shapes: dict
    macs: dict
    assumed_input_bits: int | None = 8
    predicted_sqnr_db: float | None = None

    def __post_init__(self):
        if not isinstance(self.layers, Mapping) or not self.layers:
            raise ValueError("a Plan needs at least one layer (layers: name -> LayerSetting)")
        layers = dict(self.layers)
        for name, s in layers.items():
            if not isinstance(s, LayerSetting):
                raise TypeError(f"layers[{name!r}] must be a LayerSetting, got {type(s).__name__}")
            if s.is_empty:
                raise ValueError(f"layers[{name!r}] has neither a weight nor an input grid")
        if not isinstance(self.bits, Mapping) or set(self.bits) != set(layers):
            raise ValueError(f"bits must name the same layers as layers; got "
                             f"{sorted(self.bits) if isinstance(self.bits, Mapping) else self.bits!r} "
                             f"and {sorted(layers)}")
        bits = {n: check_bits(self.bits[n], f"bits[{n!r}]") for n in layers}
        for what, m in (("weight_shapes", self.weight_shapes), ("macs", self.macs)):
            missing = [n for n in layers if n not in m]
            if missing:
                raise ValueError(f"{what} has no entry for layer(s) {missing}")
        shapes = {n: tuple(int(d) for d in self.weight_shapes[n]) for n in layers}
        macs = {n: int(self.macs[n]) for n in layers}
        object.__setattr__(self, "layers", layers)
        object.__setattr__(self, "bits", bits)
        object.__setattr__(self, "weight_shapes", shapes)
        object.__setattr__(self, "macs", macs)
        if self.predicted_sqnr_db is not None:
            object.__setattr__(self, "predicted_sqnr_db", float(self.predicted_sqnr_db))

    # ------------------------------------------------------------------ costs
    def _params(self, name: str) -> int:
        return math.prod(self.weight_shapes[name])

    def _channels(self, name: str) -> int:
        g = self.layers[name].weight
        if g is None or g.axis is None:
            return 1
        return self.weight_shapes[name][g.axis]

    def _weight_bits(self, name: str) -> int | None:
        g = self.layers[name].weight
        return None if g is None else g.bits

    def _input_bits(self, name: str) -> int | None:
        g = self.layers[name].input
        return self.assumed_input_bits if g is None else g.bits

    @property
    def weight_kib(self) -> float:
        """Weight storage of the planned layers in KiB (codes, float32 scales, int32 zero points)."""
        return sum(weight_storage_bits(self._params(n), self._weight_bits(n), self._channels(n))
                   for n in self.layers) / 8192

    @property
    def float_weight_kib(self) -> float:
        """The same layers' weights in float32, KiB."""
        return sum(FLOAT_BITS * self._params(n) for n in self.layers) / 8192

    @property
    def mean_weight_bits(self) -> float:
        """Mean bits per weight of the planned layers (codes only; float weights count 32)."""
        total = sum(self._params(n) for n in self.layers)
        return sum(self._params(n) * (self._weight_bits(n) or FLOAT_BITS) for n in self.layers) / total

    @property
    def bops(self) -> int:
        """Bit operations per sample: sum of MACs x weight bits x input bits."""
        return sum(layer_bops(self.macs[n], self._weight_bits(n), self._input_bits(n)) for n in self.layers)

    @property
    def float_bops(self) -> int:
        """Bit operations per sample of the same layers in float32."""
        return sum(layer_bops(self.macs[n], None, None) for n in self.layers)

    def to_rows(self) -> list[dict]:
        """One dict per layer: bits, weight storage (bits, KiB) and BOPs, with float32 figures.

        Keys: layer, bits, weight_bits, input_bits (None: float), params, storage_bits,
        weight_kib, float_weight_kib, bops, float_bops.
        """
        rows = []
        for n, s in self.layers.items():
            stored = weight_storage_bits(self._params(n), self._weight_bits(n), self._channels(n))
            rows.append({
                "layer": n,
                "bits": self.bits[n],
                "weight_bits": self._weight_bits(n),
                "input_bits": None if s.input is None else s.input.bits,
                "params": self._params(n),
                "storage_bits": stored,
                "weight_kib": stored / 8192,
                "float_weight_kib": FLOAT_BITS * self._params(n) / 8192,
                "bops": layer_bops(self.macs[n], self._weight_bits(n), self._input_bits(n)),
                "float_bops": layer_bops(self.macs[n], None, None),
            })
        return rows

    def __repr__(self) -> str:
        pred = "" if self.predicted_sqnr_db is None else f", predicted {self.predicted_sqnr_db:.2f} dB"
        return (f"Plan({len(self.layers)} layers, {self.weight_kib:.2f} KiB of weights, "
                f"{self.mean_weight_bits:.2f} mean bits{pred})")

    # ------------------------------------------------------------------ JSON
    def to_dict(self) -> dict:
        """The plan as plain JSON-ready data (see the module docstring for the layout)."""
        pred = self.predicted_sqnr_db
        return {
            "format": FORMAT,
            "version": VERSION,
            "fingerprint": self.fingerprint,
            "predicted_sqnr_db": pred if pred is not None and math.isfinite(pred) else None,
            "assumed_input_bits": self.assumed_input_bits,
            "layers": {
                n: {
                    "bits": self.bits[n],
                    "weight_shape": list(self.weight_shapes[n]),
                    "macs": self.macs[n],
                    "weight": _grid_to_dict(s.weight),
                    "input": _grid_to_dict(s.input),
                }
                for n, s in self.layers.items()
            },
        }

    def to_json(self, indent: int | None = 1) -> str:
        """The plan as JSON text (strict JSON: no NaN or Infinity)."""
        return json.dumps(self.to_dict(), indent=indent, allow_nan=False)

    @classmethod
    def from_json(cls, text: str) -> Plan:
        """Read a plan from JSON text, checking every field (clear errors name the field)."""
        if not isinstance(text, (str, bytes, bytearray)):
            raise TypeError(f"text must be JSON text (str), got {type(text).__name__}")
        try:
            data = json.loads(text, parse_constant=_NonFinite)
        except json.JSONDecodeError as e:
            raise ValueError(f"the plan is not valid JSON (truncated or damaged?): {e}") from None
        try:
            return _plan_from_dict(data)
        except _FieldError as e:
            raise ValueError(f"invalid plan: {e}") from None

    def save(self, path: str | os.PathLike) -> None:
        """Write the plan's JSON to ``path`` (atomically: a failed write leaves no partial file)."""
        _write_text(path, self.to_json(), "plan")

    @classmethod
    def load(cls, path: str | os.PathLike) -> Plan:
        """Read a plan written by :meth:`save` (or by hand, following the same layout)."""
        return cls.from_json(_read_text(path, "plan"))


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _read_text(path, what: str) -> str:
    try:
        with open(path, encoding="utf-8") as f:
            return f.read()
    except OSError as e:
        raise OSError(f"cannot read the {what} from {os.fspath(path)!r}: {e.strerror or e}") from e
    except UnicodeDecodeError as e:
        raise ValueError(f"{os.fspath(path)!r} is not a UTF-8 text file: {e}") from None


def _write_text(path, text: str, what: str) -> None:
    if not isinstance(path, (str, os.PathLike)) or not os.fspath(path):
        raise ValueError(f"path must be a non-empty file path, got {path!r}")
    path = os.fspath(path)
    folder = os.path.dirname(os.path.abspath(path))
    if os.path.isdir(path):
        raise IsADirectoryError(f"cannot write the {what} to {path!r}: it is a folder; give a file name")
    if not os.path.isdir(folder):
        raise FileNotFoundError(f"cannot write the {what} to {path!r}: folder {folder!r} does not exist")
    try:
        fd, tmp = tempfile.mkstemp(prefix=".qwidgets-", suffix=".tmp", dir=folder)
    except OSError as e:
        raise PermissionError(f"cannot write the {what} to {path!r}: {e.strerror or e}") from e
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            f.write(text)
        os.chmod(tmp, 0o666 & ~_umask())  # a temporary file is private; the result is not
        os.replace(tmp, path)
    except OSError as e:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise OSError(f"cannot write the {what} to {path!r}: {e.strerror or e}") from e


# ---------------------------------------------------------------------------- JSON details
def _grid_to_dict(g: UniformGrid | None) -> dict | None:
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


class _FieldError(ValueError):
    """A malformed field; the reader adds what kind of file it was reading."""


class _NonFinite:
    """Stands for a NaN / Infinity literal in the JSON, so the check can name its field."""

    def __init__(self, literal: str):
        self.literal = literal


_TOP = ("format", "version", "fingerprint", "predicted_sqnr_db", "assumed_input_bits", "layers")
_LAYER = ("bits", "weight_shape", "macs", "weight", "input")
_GRID = ("bits", "signed", "axis", "scale", "offset", "zero_point")


def _fields(obj, keys, where: str) -> None:
    if not isinstance(obj, dict):
        raise _FieldError(f"{where} must be a JSON object, got {_kind(obj)}")
    missing = [k for k in keys if k not in obj]
    extra = [k for k in obj if k not in keys]
    if missing:
        raise _FieldError(f"{where} is missing field(s) {missing}")
    if extra:
        raise _FieldError(f"{where} has unknown field(s) {extra}; expected {list(keys)}")


def _kind(v) -> str:
    if isinstance(v, _NonFinite):
        return v.literal
    if v is None:
        return "null"
    return {bool: "a boolean", int: "an integer", float: "a number", str: "a string",
            list: "a list", dict: "an object"}.get(type(v), type(v).__name__) + f" ({v!r})"[:60]


def _int(v, where: str, lo: int | None = None, hi: int | None = None) -> int:
    if isinstance(v, bool) or not isinstance(v, int):
        raise _FieldError(f"{where} must be an integer, got {_kind(v)}")
    if (lo is not None and v < lo) or (hi is not None and v > hi):
        rng = f"in {lo}..{hi}" if hi is not None else f">= {lo}"
        raise _FieldError(f"{where} must be {rng}, got {v}")
    return v


def _num(v, where: str, positive: bool = False) -> float:
    if isinstance(v, _NonFinite):
        raise _FieldError(f"{where} must be a finite number, got {v.literal}")
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise _FieldError(f"{where} must be a number, got {_kind(v)}")
    if not math.isfinite(v):
        raise _FieldError(f"{where} must be a finite number, got {v}")
    if positive and v <= 0:
        raise _FieldError(f"{where} must be > 0, got {v}")
    return float(v)


def _grid_from_dict(d, where: str, channels: int | None) -> UniformGrid | None:
    if d is None:
        return None
    _fields(d, _GRID, where)
    bits = _int(d["bits"], f"{where}.bits", 1, MAX_BITS)
    if not isinstance(d["signed"], bool):
        raise _FieldError(f"{where}.signed must be true or false, got {_kind(d['signed'])}")
    axis = d["axis"]
    if axis is not None:
        axis = _int(axis, f"{where}.axis")
    if axis is None:
        scale = _num(d["scale"], f"{where}.scale", positive=True)
        offset = _num(d["offset"], f"{where}.offset")
        zp = None if d["zero_point"] is None else _int(d["zero_point"], f"{where}.zero_point")
        if zp is not None and not _zp_matches(zp, scale, offset):
            raise _FieldError(f"{where}.zero_point {zp} does not match offset / scale "
                             f"(offset must equal -zero_point * scale, got offset {offset}, scale {scale})")
        return UniformGrid(bits, scale, offset, signed=d["signed"])
    lists = {}
    for k in ("scale", "offset") + (("zero_point",) if d["zero_point"] is not None else ()):
        v = d[k]
        if not isinstance(v, list) or not v:
            raise _FieldError(f"{where}.{k} must be a non-empty list (one value per "
                             f"channel, axis={axis}), got {_kind(v)}")
        lists[k] = v
    lengths = {k: len(v) for k, v in lists.items()}
    if len(set(lengths.values())) != 1:
        raise _FieldError(f"{where} per-channel lists differ in length: {lengths}")
    n = next(iter(lengths.values()))
    if channels is not None and n != channels:
        raise _FieldError(f"{where}.scale has {n} values but the weight has {channels} "
                         f"channels along axis {axis}")
    scale = [_num(v, f"{where}.scale[{i}]", positive=True) for i, v in enumerate(lists["scale"])]
    offset = [_num(v, f"{where}.offset[{i}]") for i, v in enumerate(lists["offset"])]
    if "zero_point" in lists:
        for i, z in enumerate(lists["zero_point"]):
            z = _int(z, f"{where}.zero_point[{i}]")
            if not _zp_matches(z, scale[i], offset[i]):
                raise _FieldError(f"{where}.zero_point[{i}] = {z} does not match "
                                 f"offset / scale (offset {offset[i]}, scale {scale[i]})")
    return UniformGrid(bits, torch.tensor(scale, dtype=torch.float32),
                       torch.tensor(offset, dtype=torch.float32), signed=d["signed"], axis=axis)


def _zp_matches(z: int, scale: float, offset: float) -> bool:
    return abs(offset + z * scale) <= 1e-4 * scale * max(1.0, abs(z))


def _plan_from_dict(data) -> Plan:
    _fields(data, _TOP, "the top level")
    if data["format"] != FORMAT:
        raise _FieldError(f"format must be {FORMAT!r}, got {_kind(data['format'])}")
    version = data["version"]
    if version != VERSION or isinstance(version, bool):
        raise _FieldError(f"version {_kind(version)} is not supported; this qwidgets "
                         f"reads version {VERSION}")
    fp = data["fingerprint"]
    if not isinstance(fp, str) or len(fp) != 64 or any(c not in "0123456789abcdef" for c in fp):
        raise _FieldError(f"fingerprint must be 64 lowercase hex digits, got {_kind(fp)}")
    pred = data["predicted_sqnr_db"]
    pred = None if pred is None else _num(pred, "predicted_sqnr_db")
    aib = data["assumed_input_bits"]
    aib = None if aib is None else _int(aib, "assumed_input_bits", 1, MAX_BITS)
    layers_d = data["layers"]
    if not isinstance(layers_d, dict) or not layers_d:
        raise _FieldError(f"layers must be a non-empty object, got {_kind(layers_d)}")
    layers, bits, shapes, macs = {}, {}, {}, {}
    for name, entry in layers_d.items():
        where = f"layers[{name!r}]"
        _fields(entry, _LAYER, where)
        b = _int(entry["bits"], f"{where}.bits", 1, MAX_BITS)
        shape = entry["weight_shape"]
        if not isinstance(shape, list) or len(shape) < 2:
            raise _FieldError(f"{where}.weight_shape must be a list of >= 2 sizes, got {_kind(shape)}")
        shape = tuple(_int(s, f"{where}.weight_shape[{i}]", 1) for i, s in enumerate(shape))
        m = _int(entry["macs"], f"{where}.macs", 0)
        wd = entry["weight"]
        channels = None
        if isinstance(wd, dict) and isinstance(wd.get("axis"), int) and not isinstance(wd["axis"], bool):
            if not -len(shape) <= wd["axis"] < len(shape):
                raise _FieldError(f"{where}.weight.axis {wd['axis']} is out of range for "
                                 f"weight_shape {list(shape)}")
            channels = shape[wd["axis"]]
        w = _grid_from_dict(wd, f"{where}.weight", channels)
        x = _grid_from_dict(entry["input"], f"{where}.input", None)
        if w is None and x is None:
            raise _FieldError(f"{where} has neither a weight nor an input grid")
        main = w if w is not None else x
        if main.bits != b:
            raise _FieldError(f"{where}.bits is {b} but its "
                             f"{'weight' if w is not None else 'input'} grid has {main.bits} bits")
        layers[name] = LayerSetting(weight=w, input=x)
        bits[name], shapes[name], macs[name] = b, shape, m
    return Plan(layers, bits, fingerprint=fp, weight_shapes=shapes, macs=macs,
                assumed_input_bits=aib, predicted_sqnr_db=pred)


# ---------------------------------------------------------------------------- matching a model
def _match(model: nn.Module, plan: Plan, strict: bool) -> tuple[dict, list[str]]:
    """Planned layers found in ``model`` (name -> module) and the skipped ones, with reasons."""
    if not isinstance(model, nn.Module):
        raise TypeError(f"model must be a torch.nn.Module, got {type(model).__name__}")
    if not isinstance(plan, Plan):
        raise TypeError(f"plan must be a Plan, got {type(plan).__name__}")
    if not isinstance(strict, bool):
        raise TypeError(f"strict must be True or False, got {strict!r}")
    from .probe import is_quantizable

    modules = dict(model.named_modules())
    found, skipped = {}, []
    for name in plan.layers:
        m = modules.get(name)
        if m is None:
            skipped.append(f"{name!r} (not in the model)")
        elif not is_quantizable(m):
            skipped.append(f"{name!r} (a {type(m).__name__}, not a Linear / Conv layer)")
        elif tuple(m.weight.shape) != plan.weight_shapes[name]:
            skipped.append(f"{name!r} (weight shape {tuple(m.weight.shape)} in the model, "
                           f"{plan.weight_shapes[name]} in the plan)")
        else:
            found[name] = m
    if strict and model_fingerprint(model) != plan.fingerprint:
        if skipped:
            first = ", ".join(skipped[:3]) + (", ..." if len(skipped) > 3 else "")
            detail = f"first mismatching layers: {first}"
        else:
            detail = ("every planned layer matches by name and shape, but other parameters of the "
                      "model differ (added, removed, renamed or reshaped)")
        raise ValueError(f"the plan was made for another model (fingerprint {plan.fingerprint[:12]}..., "
                         f"this model {model_fingerprint(model)[:12]}...); {detail}. Pass strict=False "
                         "to apply the layers that match by name and shape")
    if not found:
        raise ValueError(f"no planned layer matches the model by name and shape: {', '.join(skipped)}")
    return found, skipped


class _QuantizeInput:
    """Forward pre-hook of a planned copy: fake-quantizes the layer's first input."""

    def __init__(self, grid: UniformGrid):
        self.grid = grid

    def __call__(self, module, args):
        if not args or not isinstance(args[0], torch.Tensor):
            return None
        return (quantize(args[0], self.grid),) + tuple(args[1:])


def apply_plan(model: nn.Module, plan: Plan, *, strict: bool = True) -> nn.Module:
    """A deep copy of ``model`` with the plan's layers fake-quantized; ``model`` is untouched.

    In the copy each planned layer's weight holds its fake-quantized values and, where the
    plan has an input grid, a forward pre-hook quantizes the layer's input on every call.
    ``strict=True`` refuses a plan made for a model with other parameter names or shapes
    (naming the first mismatching layers); ``strict=False`` applies the layers that match by
    name and weight shape, warns about the rest and lists them in the copy's
    ``qwidgets_skipped`` attribute (``qwidgets_applied`` lists the applied ones).

    >>> lin = nn.Linear(3, 2)
    >>> p = Plan({"": LayerSetting(weight=UniformGrid(2, 0.5))}, {"": 2},
    ...          fingerprint=model_fingerprint(lin), weight_shapes={"": (2, 3)}, macs={"": 6})
    >>> q = apply_plan(lin, p)
    >>> set((q.weight.detach() / 0.5).flatten().tolist()) <= {-2.0, -1.0, 0.0, 1.0}, q is lin
    (True, False)
    """
    found, skipped = _match(model, plan, strict)
    new = copy.deepcopy(model)
    new_modules = dict(new.named_modules())
    with torch.no_grad():
        for name in found:
            layer, setting = new_modules[name], plan.layers[name]
            if setting.weight is not None:
                layer.weight.copy_(quantize(layer.weight.detach(), setting.weight))
            if setting.input is not None:
                layer.register_forward_pre_hook(_QuantizeInput(setting.input))
    if skipped:
        warnings.warn(f"apply_plan skipped {len(skipped)} planned layer(s): {', '.join(skipped)}",
                      stacklevel=2)
    new.qwidgets_applied = tuple(found)
    new.qwidgets_skipped = tuple(skipped)
    return new


def _code_dtype(grid: UniformGrid) -> torch.dtype:
    for dt in (torch.int8, torch.uint8, torch.int16, torch.int32):
        info = torch.iinfo(dt)
        if info.min <= grid.qmin and grid.qmax <= info.max:
            return dt
    return torch.int64  # not reached for bits <= 16


def export_codes(model: nn.Module, plan: Plan, *, strict: bool = True) -> dict:
    """Integer weight codes of each planned layer, with what is needed to decode them.

    Per layer: ``codes`` (smallest integer dtype holding the grid's range: int8 / uint8 up to
    8 bits, int16 up to 16 signed or 15 unsigned, else int32), ``scale`` and ``offset``
    (float32 tensors, per channel when ``axis`` is set), ``zero_point`` (int32 tensor, or None
    when the offset is not an integer multiple of the scale), ``axis``, ``bits``, ``signed``,
    and ``input`` (the input grid as a dict of the same fields, or None). Decoding with
    :func:`qwidgets.from_codes` gives exactly the weights of :func:`apply_plan`'s model.

    >>> lin = nn.Linear(3, 2)
    >>> p = Plan({"": LayerSetting(weight=UniformGrid(4, 0.05))}, {"": 4},
    ...          fingerprint=model_fingerprint(lin), weight_shapes={"": (2, 3)}, macs={"": 6})
    >>> out = export_codes(lin, p)[""]
    >>> out["codes"].dtype, out["bits"], out["zero_point"].tolist()
    (torch.int8, 4, 0)
    """
    found, skipped = _match(model, plan, strict)
    out = {}
    for name, layer in found.items():
        s = plan.layers[name]
        entry = {"codes": None, **_grid_fields(s.weight)} if s.weight is not None else {
            "codes": None, "scale": None, "offset": None, "zero_point": None, "axis": None,
            "bits": None, "signed": None}
        if s.weight is not None:
            codes = to_codes(layer.weight.detach(), s.weight)
            entry["codes"] = codes.to(_code_dtype(s.weight))
        entry["input"] = None if s.input is None else _grid_fields(s.input)
        out[name] = entry
    if skipped:
        warnings.warn(f"export_codes skipped {len(skipped)} planned layer(s): {', '.join(skipped)}",
                      stacklevel=2)
    return out


def _grid_fields(g: UniformGrid) -> dict:
    g = g.detached()
    scale = g.scale_tensor().to(torch.float32).clone()
    offset = g.offset_tensor().to(torch.float32).clone()
    zp = None
    if g.has_zero_point():
        z = g.zero_point
        zp = torch.as_tensor(z, dtype=torch.int32).clone()
    return {"scale": scale, "offset": offset, "zero_point": zp, "axis": g.axis, "bits": g.bits,
            "signed": g.signed}


# ---------------------------------------------------------------------------- evaluating
@dataclass(frozen=True)
class PlanReport:
    """A plan checked end to end on data: measured versus predicted, float versus planned.

    ``output``: :class:`ErrorStats` of the planned model's output against the float model's;
    ``measured_sqnr_db`` is its SQNR; ``metric_float`` / ``metric_planned``: the user's
    metric on each (None without one); ``skipped``: planned layers not applied (strict=False).
    """

    measured_sqnr_db: float
    predicted_sqnr_db: float | None
    output: ErrorStats
    metric_float: float | None
    metric_planned: float | None
    weight_kib: float
    float_weight_kib: float
    mean_weight_bits: float
    bops: int
    float_bops: int
    skipped: tuple = ()
    caution: str = CAUTION

    @property
    def metric_change(self) -> float | None:
        if self.metric_float is None or self.metric_planned is None:
            return None
        return self.metric_planned - self.metric_float

    def to_dict(self) -> dict:
        d = {k: getattr(self, k) for k in self.__dataclass_fields__}
        d["output"] = self.output.to_dict()
        return d

    def __str__(self) -> str:
        pred = "-" if self.predicted_sqnr_db is None else f"{self.predicted_sqnr_db:.2f} dB"
        lines = [
            f"model-output SQNR: measured {self.measured_sqnr_db:.2f} dB, predicted {pred}",
            f"weights: {self.weight_kib:.2f} KiB (float32: {self.float_weight_kib:.2f} KiB), "
            f"{self.mean_weight_bits:.2f} mean bits",
            f"BOPs per sample: {self.bops:,} (float32: {self.float_bops:,})",
        ]
        if self.metric_float is not None:
            lines.append(f"metric: float {self.metric_float:.6g}, planned {self.metric_planned:.6g}")
        if self.skipped:
            lines.append(f"skipped layers: {', '.join(self.skipped)}")
        lines.append(self.caution)
        return "\n".join(lines)


def evaluate_plan(model: nn.Module, data, plan: Plan, *, metric: Callable | None = None,
                  target=None, strict: bool = True) -> PlanReport:
    """Run the float model and :func:`apply_plan`'s model on ``data`` and compare.

    ``metric(output, target) -> float`` (for example accuracy) is computed for both when given.
    ``model`` is untouched.

    >>> _ = torch.manual_seed(0)
    >>> lin = nn.Linear(8, 4)
    >>> p = Plan({"": LayerSetting(weight=UniformGrid(8, float(lin.weight.detach().abs().max()) / 127))},
    ...          {"": 8}, fingerprint=model_fingerprint(lin), weight_shapes={"": (4, 8)}, macs={"": 32})
    >>> evaluate_plan(lin, torch.randn(16, 8), p).measured_sqnr_db > 35
    True
    """
    from .probe import call_metric, flat_output, forward_float

    if metric is not None and not callable(metric):
        raise TypeError(f"metric must be a callable metric(output, target) -> float, got {type(metric).__name__}")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the skipped layers are reported in the result
        planned = apply_plan(model, plan, strict=strict)
    ref = forward_float(model, data)
    out = forward_float(planned, data)
    stats = error_stats(flat_output(ref, "float"), flat_output(out, "planned"))
    mf = mp = None
    if metric is not None:
        mf, mp = call_metric(metric, ref, target), call_metric(metric, out, target)
    applied = set(planned.qwidgets_applied)
    sub = Plan({n: plan.layers[n] for n in plan.layers if n in applied},
               {n: plan.bits[n] for n in plan.layers if n in applied}, fingerprint=plan.fingerprint,
               weight_shapes=plan.weight_shapes, macs=plan.macs,
               assumed_input_bits=plan.assumed_input_bits)
    return PlanReport(
        measured_sqnr_db=stats.sqnr_db,
        predicted_sqnr_db=plan.predicted_sqnr_db,
        output=stats,
        metric_float=mf,
        metric_planned=mp,
        weight_kib=sub.weight_kib,
        float_weight_kib=sub.float_weight_kib,
        mean_weight_bits=sub.mean_weight_bits,
        bops=sub.bops,
        float_bops=sub.float_bops,
        skipped=tuple(planned.qwidgets_skipped),
    )

