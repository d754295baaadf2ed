"""Plan: the bit width and grids chosen for each layer, its costs, and its JSON form."""

from __future__ import annotations

import json
import math
import os
from collections.abc import Mapping
from dataclasses import dataclass, replace

from ..core.blocks import SCALE_BITS, check_block_fit
from ..core.checks import check_bits
from ..core.renamed import warn_renamed
from ..core.setting import LayerSetting
from .costs import FLOAT_BITS, grid_storage_bits, layer_bops
from .fields import FieldError, NonFinite, grid_to_dict
from .files import read_text, write_text
from .fingerprint import model_fingerprint  # noqa: F401 (imported from here by others)
from .schema import FORMAT, VERSION, check_figures, plan_fields, plan_figures

CAUTION = (
    "These figures are estimates on the data given: they screen a plan, they do not certify "
    "the quantized model. For safety-relevant use (vehicles, medical devices) validate the "
    "deployed model on its target hardware with the full test procedure."
)


@dataclass(frozen=True, eq=False)
class Plan:
    """The grids chosen for each planned layer, with what is needed to cost and check them.

    ``layers``: name -> :class:`LayerSetting`; ``bits``: name -> chosen bit width;
    ``fingerprint``: :func:`model_fingerprint` of the model planned for; ``weight_shapes`` and
    ``macs`` (per sample) per layer; ``assumed_input_bits``: input width counted in BOPs for
    layers without an input grid (None: float); :attr:`chosen_input_bits`: each entry's own
    input width, from its input grid (``bits`` and ``chosen_input_bits`` are dicts of chosen
    widths; the tuples named ``bits`` / ``input_bits`` on a table, a scan and device rules are
    menus); ``predicted_sqnr_db``: the allocator's
    prediction of the model-output SQNR (None when not predicted).

    >>> from torch import nn
    >>> from qwidgets import LayerSetting, Plan, UniformGrid
    >>> from qwidgets.planning.plan import model_fingerprint
    >>> lin = nn.Linear(4, 2)
    >>> p = Plan({"": LayerSetting(weight=UniformGrid(4, 0.1))}, {"": 4},
    ...          fingerprint=model_fingerprint(lin), weight_shapes={"": (2, 4)}, macs={"": 8})
    >>> p.planned_kib * 8192, p.mean_bits, p.bops  # 8 weights x 4 bits + one scale and zero point
    (96.0, 12.0, 256)
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
    entries: dict | None = None
    other_weight_bits: int | None = None
    scale_bits: int = 16  # how block grids' scales are stored (DeviceRules.scale_bits)
    state_digests: dict | None = None  # state_dict name -> digest of every float weight / buffer

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
        info = {} if self.entries is None else dict(self.entries)
        unknown = [n for n in info if n not in layers]
        if unknown:
            raise ValueError(f"entries names layer(s) {unknown} that the plan does not hold")
        object.__setattr__(self, "entries", {n: dict(info.get(n, {})) for n in layers})
        if self.other_weight_bits is not None:
            if isinstance(self.other_weight_bits, bool) or int(self.other_weight_bits) < 0:
                raise ValueError(f"other_weight_bits must be None or an int >= 0, got {self.other_weight_bits!r}")
            object.__setattr__(self, "other_weight_bits", int(self.other_weight_bits))
        if self.predicted_sqnr_db is not None:
            object.__setattr__(self, "predicted_sqnr_db", float(self.predicted_sqnr_db))
        if self.scale_bits not in SCALE_BITS or isinstance(self.scale_bits, bool):
            raise ValueError(f"scale_bits must be one of {SCALE_BITS}, got {self.scale_bits!r}")
        for n, s in layers.items():
            check_block_fit(s.weight, shapes[n], f"layers[{n!r}]")

    @classmethod
    def unchecked(cls, layers: dict, bits: dict, *, fingerprint: str, weight_shapes: dict, macs: dict,
                  assumed_input_bits: int | None = 8, predicted_sqnr_db: float | None = None,
                  entries: dict, other_weight_bits: int | None = None, scale_bits: int = 16, state_digests: dict | None = None) -> Plan:
        """A Plan from fields already checked (by :class:`SensitivityTable`, which builds them
        from its own validated grids): skips the per-entry checks, so a Pareto front's hundreds
        of plans of hundreds of entries cost milliseconds. Everyone else: use ``Plan(...)``."""
        plan = object.__new__(cls)
        for k, v in (("layers", layers), ("bits", bits), ("fingerprint", fingerprint),
                     ("weight_shapes", weight_shapes), ("macs", macs),
                     ("assumed_input_bits", assumed_input_bits),
                     ("predicted_sqnr_db", None if predicted_sqnr_db is None else float(predicted_sqnr_db)),
                     ("entries", entries),
                     ("other_weight_bits", None if other_weight_bits is None else int(other_weight_bits)),
                     ("scale_bits", scale_bits), ("state_digests", state_digests)):
            object.__setattr__(plan, k, v)
        return plan

    @property
    def chosen_input_bits(self) -> dict:
        """Each entry's chosen input width (None where its input stays float)."""
        return {n: None if s.input is None else s.input.bits for n, s in self.layers.items()}

    @property
    def input_bits(self) -> dict:
        """Deprecated: :attr:`chosen_input_bits` (``input_bits`` names menus of widths)."""
        warn_renamed("input_bits", "chosen_input_bits", "Plan")
        return self.chosen_input_bits

    @property
    def granularity(self) -> dict:
        """Each entry's weight granularity: ``"tensor"``, ``"channel"`` or the block size (None
        where its weight stays float)."""
        return {n: None if s.weight is None else s.weight.granularity for n, s in self.layers.items()}

    @property
    def input_granularity(self) -> dict:
        """Each entry's input granularity: ``"tensor"`` (a fitted grid), ``"token"`` (a scale
        per row at run time, :class:`qwidgets.TokenGrid`), None where its input stays float."""
        return {n: s.input_granularity for n, s in self.layers.items()}

    # ------------------------------------------------------------------ edits
    def with_setting(self, layer_name: str, setting: LayerSetting) -> Plan:
        """A new plan with ``layer_name``'s grids replaced by ``setting``'s (a learned grid, say).

        The setting's grids replace the plan's (one it leaves None keeps the plan's grid); the
        layer's bit width follows the new weight grid. The allocator's prediction was made for
        the old grids, so the new plan's ``predicted_sqnr_db`` is None (no longer valid):
        measure it with :func:`qwidgets.evaluate_plan`. The plan itself is unchanged.

        >>> from qwidgets import LayerSetting, Plan, UniformGrid
        >>> p = Plan({"fc": LayerSetting(weight=UniformGrid(4, 0.1))}, {"fc": 4}, fingerprint="-",
        ...          weight_shapes={"fc": (2, 4)}, macs={"fc": 8}, predicted_sqnr_db=20.0)
        >>> q = p.with_setting("fc", LayerSetting(weight=UniformGrid(6, 0.02)))
        >>> q.bits, q.layers["fc"].weight.scale, q.predicted_sqnr_db, p.bits
        ({'fc': 6}, 0.02, None, {'fc': 4})
        """
        if not isinstance(layer_name, str):
            raise TypeError(f"layer_name must be a str, got {type(layer_name).__name__}")
        if layer_name not in self.layers:
            raise ValueError(f"layer_name {layer_name!r} is not in the plan; planned layers: {list(self.layers)}")
        if not isinstance(setting, LayerSetting):
            raise TypeError(f"setting must be a LayerSetting, got {type(setting).__name__}")
        if setting.is_empty:
            raise ValueError("setting has neither a weight nor an input grid")
        old = self.layers[layer_name]
        weight = old.weight if setting.weight is None else setting.weight.detached()
        inp = old.input if setting.input is None else setting.input.detached()
        shape = self.weight_shapes[layer_name]
        if setting.weight is not None and weight.blocked:
            check_block_fit(weight, shape, "setting.weight")
        elif setting.weight is not None and weight.axis is not None:
            if not -len(shape) <= weight.axis < len(shape):
                raise ValueError(f"setting.weight.axis {weight.axis} does not fit layer {layer_name!r}'s "
                                 f"weight shape {shape}")
            if weight.n_channels not in (None, 1, shape[weight.axis]):
                raise ValueError(f"setting.weight has {weight.n_channels} channels on axis {weight.axis}, "
                                 f"layer {layer_name!r}'s weight has {shape[weight.axis]} (shape {shape})")
        bits = dict(self.bits)
        bits[layer_name] = (weight if weight is not None else inp).bits
        layers = dict(self.layers)
        layers[layer_name] = LayerSetting(weight=weight, input=inp)
        return replace(self, layers=layers, bits=bits, predicted_sqnr_db=None)

    # ------------------------------------------------------------------ costs
    def _params(self, name: str) -> int:
        if self._activation(name):
            return 0
        return math.prod(self.weight_shapes[name])

    def _activation(self, name: str) -> bool:
        return (self.entries or {}).get(name, {}).get("kind") == "activation"

    def _storage(self, name: str) -> int:
        if self._activation(name):  # no weight stored
            return 0
        return grid_storage_bits(self.layers[name].weight, self.weight_shapes[name], self.scale_bits)

    def _weight_bits(self, name: str) -> int | None:
        g = self.layers[name].weight
        return None if g is None else g.bits

    def _input_bits(self, name: str) -> int | None:
        g = self.layers[name].input
        return self.assumed_input_bits if g is None else g.bits

    @property
    def planned_kib(self) -> float:
        """Weight storage of the planned entries in KiB (codes, float32 scales, int32 zero
        points; block grids: a scale per block at ``scale_bits``, a zero point per block at the
        code width where asymmetric); what ``plan_budget(planned_kib=...)`` limits."""
        return sum(self._storage(n) for n in self.layers) / 8192

    @property
    def model_kib(self) -> float | None:
        """Weight storage of the whole model in KiB: the planned entries as planned, every other
        floating-point weight at its stored width; what ``plan_budget(model_kib=...)`` limits
        (None for a plan that does not record the other weights).
        """
        if self.other_weight_bits is None:
            return None
        return self.planned_kib + self.other_weight_bits / 8192

    def has_input(self, name: str) -> bool:
        """False for weight-only entries (attention, recurrent, embedding, ...)."""
        return bool(self.entries[name].get("has_input", True))

    def weight_digest(self, name: str) -> str | None:
        """Digest of the entry's weight values in the model planned for (None if not recorded)."""
        return self.entries[name].get("weight_digest")

    @property
    def float_planned_kib(self) -> float:
        """The planned entries' weights in float32, KiB (compare with :attr:`planned_kib`)."""
        return sum(FLOAT_BITS * self._params(n) for n in self.layers) / 8192

    @property
    def mean_bits(self) -> float:
        """Stored bits per weight of the planned entries: codes plus scales and zero points
        (float weights count 32), the usual "bits per weight"; what ``plan_budget(mean_bits=...)``
        limits."""
        total = sum(self._params(n) for n in self.layers)
        if total == 0:
            return 0.0
        return sum(self._storage(n) for n in self.layers) / total

    # the previous release's names (one release, each warns once)
    @property
    def weight_kib(self) -> float:
        """Deprecated: :attr:`planned_kib` (the planned entries only; see :attr:`model_kib`)."""
        warn_renamed("weight_kib", "planned_kib (or model_kib for the whole model)", "Plan")
        return self.planned_kib

    @property
    def float_weight_kib(self) -> float:
        """Deprecated: :attr:`float_planned_kib`."""
        warn_renamed("float_weight_kib", "float_planned_kib", "Plan")
        return self.float_planned_kib

    @property
    def mean_weight_bits(self) -> float:
        """Deprecated: :attr:`mean_bits`."""
        warn_renamed("mean_weight_bits", "mean_bits", "Plan")
        return self.mean_bits

    @property
    def bops(self) -> int:
        """Bit operations per sample: sum of MACs x weight bits x input bits, each entry with
        its own input width (``assumed_input_bits`` where its input stays float); attention's
        products of two activations count MACs x the two activations' widths, once per pair;
        what ``plan_budget(bops=...)`` limits."""
        return sum(self._bops(n) for n in self.layers)

    @property
    def float_bops(self) -> int:
        """Bit operations per sample of the same layers in float32."""
        return sum(self._bops(n, float_=True) for n in self.layers)

    def _bops(self, n: str, float_: bool = False) -> int:
        if not self._activation(n):
            if float_:
                return layer_bops(self.macs[n], None, None)
            return layer_bops(self.macs[n], self._weight_bits(n), self._input_bits(n))
        partner = self.entries[n].get("partner")
        if partner in self.layers and self._activation(partner):
            order = list(self.layers)
            if order.index(partner) < order.index(n):
                return 0  # counted with its partner
            if float_:
                return layer_bops(self.macs[n], None, None)
            return layer_bops(self.macs[n], self._input_bits(n), self._input_bits(partner))
        if float_:
            return layer_bops(self.macs[n], None, None)
        return layer_bops(self.macs[n], self._input_bits(n), self.assumed_input_bits)

    def to_rows(self) -> list[dict]:
        """One dict per layer: bits, weight storage (bits, KiB) and BOPs, with float32 figures.

        Keys: layer, bits, weight_bits, granularity (:attr:`granularity`), input_bits (None:
        float), input_granularity (:attr:`input_granularity`), params, storage_bits, kib (its share of :attr:`planned_kib`), float_kib, bops,
        float_bops.
        """
        rows = []
        for n, s in self.layers.items():
            stored = self._storage(n)
            rows.append({
                "layer": n,
                "bits": self.bits[n],
                "weight_bits": self._weight_bits(n),
                "granularity": None if s.weight is None else s.weight.granularity,
                "input_bits": None if s.input is None else s.input.bits,
                "input_granularity": s.input_granularity,
                "params": self._params(n),
                "storage_bits": stored,
                "kib": stored / 8192,
                "float_kib": FLOAT_BITS * self._params(n) / 8192,
                "bops": self._bops(n), "float_bops": self._bops(n, float_=True),
            })
        return rows

    def __repr__(self) -> str:
        pred = "" if self.predicted_sqnr_db is None else f", predicted {self.predicted_sqnr_db:.2f} dB"
        whole = "" if self.model_kib is None else f", model_kib {self.model_kib:.2f}"
        return (f"Plan({len(self.layers)} layers, planned_kib {self.planned_kib:.2f}{whole}, "
                f"mean_bits {self.mean_bits:.2f}{pred})")

    # ------------------------------------------------------------------ JSON
    def to_dict(self) -> dict:
        """The plan as plain JSON-ready data (see the module docstring for the layout)."""
        pred = self.predicted_sqnr_db
        extra = {} if self.other_weight_bits is None else {"other_weight_bits": self.other_weight_bits}
        if self.scale_bits != 16:
            extra["scale_bits"] = self.scale_bits
        extra.update({} if self.state_digests is None else {"state_digests": dict(self.state_digests)})
        return {
            **extra,
            "format": FORMAT,
            "version": VERSION,
            "fingerprint": self.fingerprint,
            "predicted_sqnr_db": pred if pred is not None and math.isfinite(pred) else None,
            "assumed_input_bits": self.assumed_input_bits,
            "figures": plan_figures(self),
            "layers": {
                n: {
                    "bits": self.bits[n],
                    "weight_shape": list(self.weight_shapes[n]),
                    "macs": self.macs[n],
                    "weight": grid_to_dict(s.weight),
                    "input": grid_to_dict(s.input),
                    **self.entries[n],
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
            data = json.loads(text, parse_constant=NonFinite)
        except json.JSONDecodeError as e:
            raise ValueError(f"the plan is not valid JSON (truncated or damaged?): {e}") from None
        try:
            fields = plan_fields(data)
            figures, version = fields.pop("figures"), fields.pop("figures_version")
            plan = cls(**fields)
            check_figures(plan, figures, version)
            return plan
        except FieldError as e:
            raise ValueError(f"invalid plan: {e}") from None

    def save(self, path: str | os.PathLike) -> None:
        """Write the plan's JSON to ``path`` (atomically: a failed write leaves no partial file)."""
        write_text(path, self.to_json(), "plan")

    @classmethod
    def load(cls, path: str | os.PathLike) -> Plan:
        """Read a plan written by :meth:`save` (or by hand, following the same layout)."""
        return cls.from_json(read_text(path, "plan"))
