"""SensitivityTable: the SQNR of each layer quantized alone at each bit width, with its grids."""

from __future__ import annotations

import json
import math
import os
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from ..core.grid import UniformGrid
from ..core.token_grid import TokenGrid
from ..model.entries import Coverage
from .files import read_text, write_text
from .granularity import check_granularity, granularity_rows
from .input_granularity import input_grid_of, input_rows
from .plan import Plan
from .synthetic import synthetic_table
from .table_html import table_html, table_rows
from .table_json import table_from_text, table_to_dict
from .table_schema import ESTIMATES
from .uncertainty import uncertain_cells


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
                 coverage: Coverage | None = None, input_bits: Sequence[int] = (),
                 input_layer_sqnr: np.ndarray | None = None, input_model_sqnr: np.ndarray | None = None,
                 estimate: str = "exact", notes: Sequence[str] = (), granularities: Sequence | None = None,
                 granularity_rows: Mapping | None = None, state_digests: Mapping[str, str] | None = None,
                 confirmed: Sequence[tuple[str, str, int]] = (), input_granularities: Sequence[str] | None = None,
                 input_granularity_rows: Mapping | None = None):
        self.notes = tuple(str(n) for n in notes)  #: slower paths the scan took, why (also warned)
        # confirmed: cells (entry, source, bits) measured exactly after a gain estimate (confirm=)
        self.confirmed = frozenset((str(n), str(s), int(b)) for n, s, b in confirmed)
        self.state_digests = None if state_digests is None else dict(state_digests)
        if estimate not in ESTIMATES:
            raise ValueError(f"estimate must be one of {ESTIMATES}, got {estimate!r}")
        self.estimate = estimate  #: model scope "exact" or "gain" (estimated from noise gains)
        self.layers = list(layers)
        self._index = {n: i for i, n in enumerate(self.layers)}
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
        # per entry: its grids, one per width, or None (no weight: an activation; no input rows)
        self._grids = {k: None if g is None else {
            n: None if g.get(n) is None else list(g[n]) for n in self.layers}
            for k, g in (("weight", weight_grids), ("input", input_grids))}
        # quantize="separate": input rows, one column per input width, NaN rows for entries
        # with no input rows (their input_grids entry is None)
        self._input_bits = tuple(int(b) for b in input_bits)
        if (quantize == "separate") != bool(self._input_bits):
            raise ValueError("input_bits must be given exactly for a table scanned with quantize='separate'")
        ishape = (len(self.layers), len(self._input_bits))
        self._input_sqnr = {}
        for scope, arr in (("layer", input_layer_sqnr), ("model", input_model_sqnr)):
            if arr is not None and np.shape(arr) != ishape:
                raise ValueError(f"input_{scope}_sqnr must have shape {ishape} (entries x input bits), "
                                 f"got {np.shape(arr)}")
            if (arr is None) != (self._sqnr[scope] is None) and quantize == "separate":
                raise ValueError(f"input_{scope}_sqnr must be given exactly when {scope}_sqnr is")
            self._input_sqnr[scope] = None if arr is None else np.asarray(arr, dtype=float).copy()
        self._settings: dict = {}
        self._set_granularities(granularities, granularity_rows)
        #: input options measured: ("tensor",), or ("tensor", "token") (a scale per row, at run time)
        self.input_granularities, self._input_more = input_rows(
            input_granularities, input_granularity_rows, self.layers, len(self._input_bits), self._input_sqnr)

    def _set_granularities(self, granularities, rows) -> None:
        """The weight granularity options (the first one is the rows above) and the rows of
        the others: ``rows[option] = {"layer_sqnr", "model_sqnr", "weight_grids"}``."""
        self.granularities = check_granularity(granularities, self.per_channel)  #: options measured
        self._more = granularity_rows(rows, self.granularities, self.layers, len(self.bits), self._sqnr)

    def _weight_rows(self, granularity):
        """(SQNR arrays by scope, weight grids by entry) of one granularity option."""
        if granularity is None or granularity == self.granularities[0]:
            return self._sqnr, self._grids["weight"]
        if granularity not in self._more:
            raise KeyError(f"granularity={granularity!r} was not scanned; scanned: {list(self.granularities)}")
        return self._more[granularity], self._more[granularity]["grids"]

    def _input_option(self, granularity) -> str:
        if granularity not in (None, "tensor") and granularity not in self._input_more:
            raise KeyError(f"input granularity={granularity!r} was not scanned; scanned: "
                           f"{list(self.input_granularities)} (scan with input_granularity=)")
        return granularity or "tensor"

    # ------------------------------------------------------------------ look-ups
    def _row(self, layer: str) -> int:
        try:
            return self._index[layer]
        except (KeyError, TypeError):
            raise KeyError(f"layer {layer!r} is not in the table; layers: {self.layers}") from None

    def _col(self, bits: int, source: str = "weight") -> int:
        widths = self._input_bits if source == "input" and self.quantize == "separate" else self.bits
        try:
            return widths.index(bits)
        except ValueError:
            raise KeyError(f"bits={bits!r} was not scanned for the {source}; scanned widths: "
                           f"{list(widths)}") from None

    @property
    def input_bits(self) -> tuple[int, ...]:
        """The scanned input widths: those of ``quantize="separate"``, the table's ``bits`` when
        inputs were quantized with them ("input", "both"), else empty."""
        if self.quantize == "separate":
            return self._input_bits
        return self.bits if self.quantize in ("input", "both") else ()

    def has_input_rows(self, layer: str) -> bool:
        """Whether ``layer``'s input was scanned (weight-only entries have no input rows)."""
        g = self._grids["input"]
        return g is not None and g[self.layers[self._row(layer)]] is not None

    @property
    def scopes(self) -> tuple[str, ...]:
        """The scopes this table holds: ``"layer"`` and / or ``"model"``."""
        return tuple(s for s in ("layer", "model") if self._sqnr[s] is not None)

    def _source(self, source: str) -> str:
        if source not in ("weight", "input"):
            raise ValueError(f"source must be 'weight' or 'input', got {source!r}")
        if source == "input" and self.quantize == "weight":
            raise ValueError("the table holds no input rows (quantize='weight'); scan with "
                             "quantize='separate' to measure inputs on their own")
        return source

    def sqnr_array(self, scope: str = "model", source: str = "weight",
                   granularity: str | int | None = None) -> np.ndarray | None:
        """SQNR in dB as an (entries x widths) array (a copy), or None when that scope was not
        scanned. ``source="input"`` of a ``quantize="separate"`` table: the input rows, one
        column per input width (NaN for entries with no input rows); on other tables the one
        set of rows, measured with the table's ``quantize``. ``granularity``: the weight rows
        of that option of :attr:`granularities` (None: the first); of input rows, an option of
        :attr:`input_granularities` (``"token"``: a scale per row)."""
        if scope not in ("layer", "model"):
            raise ValueError(f"scope must be 'layer' or 'model', got {scope!r}")
        source = self._source(source)
        if source == "input" and self._input_option(granularity) != "tensor":
            arr = self._input_more[granularity][scope]
        elif source == "input" and self.quantize == "separate":
            arr = self._input_sqnr[scope]
        else:
            arr = self._weight_rows(granularity)[0][scope]
        return None if arr is None else arr.copy()

    def uncertain(self, source: str = "weight") -> np.ndarray:
        """Entries x widths, True where a gain estimate may be far off (see planning/uncertainty.py)."""
        return uncertain_cells(self, self._source(source))

    def sqnr_db(self, layer: str, bits: int, scope: str = "model", source: str = "weight",
                granularity: str | int | None = None) -> float:
        """SQNR (dB) of ``layer``'s output (scope ``"layer"``) or the model's output (``"model"``)
        with only that entry quantized at ``bits``: its weights (``source="weight"``) or its
        input (``"input"``, tables scanned with ``quantize="separate"``; other tables have one
        set of rows, measured with their ``quantize``). ``granularity``: the weight grids of
        that option of :attr:`granularities` (None: the first); NaN where the entry skipped it;
        with ``source="input"``, ``"tensor"`` or ``"token"`` (:attr:`input_granularities`)."""
        arr = self.sqnr_array(scope, source, granularity)
        if arr is None:
            raise ValueError(f"the table holds no {scope}-scope SQNR; scan with scope={scope!r} or 'both'")
        if source == "input" and self.quantize == "separate" and not self.has_input_rows(layer):
            raise ValueError(f"{layer!r} has no input rows (its input was not scanned)")
        return float(arr[self._row(layer), self._col(bits, source)])

    def params(self, layer: str) -> int:
        """Number of weights of ``layer`` (bias not counted; none for an activation)."""
        return 0 if self.kind(layer) == "activation" else math.prod(self.weight_shape(layer))

    def weight_shape(self, layer: str) -> tuple[int, ...]:
        return tuple(self._info[self.layers[self._row(layer)]]["weight_shape"])

    def weight_axis(self, layer: str) -> int:
        """The per-channel axis of ``layer``'s weight grids (1 for transposed convolutions)."""
        return int(self._info[self.layers[self._row(layer)]].get("axis", 0))

    def weight_channels(self, layer: str) -> int:
        """Channels of the weight grids (one scale and zero point each): output channels
        (embedding rows) per channel, else 1."""
        return 0 if self.kind(layer) == "activation" else \
            self.weight_shape(layer)[self.weight_axis(layer)] if self.per_channel else 1

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

    def unplanned_bits(self, planned: Sequence[str] | None = None) -> int:
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
        """layer, attention, recurrent, embedding, product (found by use) or activation."""
        return self._info[self.layers[self._row(layer)]].get("kind", "layer")

    def partner(self, layer: str) -> str | None:
        """An activation's partner: the other operand of its product (None: a float operand)."""
        return self._info[self.layers[self._row(layer)]].get("partner")

    def macs(self, layer: str) -> int:
        """Multiply-accumulates of ``layer`` per sample (from the shapes captured in the scan)."""
        return int(self._info[self.layers[self._row(layer)]]["macs"])

    def layer_type(self, layer: str) -> str:
        return self._info[self.layers[self._row(layer)]]["type"]

    def model_pass(self, layer: str) -> str:
        """How the model scope was measured: ``"stacked"``, ``"per bit width"`` or ``"-"``."""
        return self._info[self.layers[self._row(layer)]].get("model_pass", "-")

    def weight_grid(self, layer: str, bits: int, granularity: str | int | None = None) -> UniformGrid | None:
        """The weight grid fitted for ``layer`` at ``bits`` (None if weights were not scanned, or
        the entry skipped that ``granularity``; None: the first of :attr:`granularities`)."""
        rows = (self._weight_rows(granularity)[1] or {}).get(self.layers[self._row(layer)])
        return None if rows is None else rows[self._col(bits)]

    def input_grid(self, layer: str, bits: int, granularity: str | None = None) -> UniformGrid | TokenGrid | None:
        """The input grid fitted for ``layer`` at ``bits`` (an input width of
        :attr:`input_bits`; None if the entry's input was not scanned); ``granularity="token"``:
        its :class:`TokenGrid` (nothing fitted: a scale per row at run time)."""
        g = self._grids["input"]
        if g is None or g[self.layers[self._row(layer)]] is None:
            return None
        return input_grid_of(self._input_option(granularity), bits, g[self.layers[self._row(layer)]][self._col(bits, "input")])

    # ------------------------------------------------------------------ plans
    def make_plan(self, bits: Mapping[str, int], *,
                  chosen_input_bits: int | Mapping[str, int | None] | None = None,
                  assumed_input_bits: int | None = 8, predicted_sqnr_db: float | None = None,
                  granularity: str | int | Mapping[str, str | int | None] | None = None,
                  scale_bits: int = 16, input_granularity: str | Mapping[str, str | None] | None = None,
                  **renamed: Any) -> Plan:
        """A :class:`Plan` with the scanned grids of the given width per entry.

        ``bits``: entry -> weight width (the input width for a ``quantize="input"`` table).
        ``chosen_input_bits`` (``quantize="separate"`` tables): each entry's input width (a dict;
        entries left out or None stay float) or one width for every entry with input rows (None:
        all float); :attr:`Plan.chosen_input_bits` holds them, :attr:`input_bits` is the menu.
        ``assumed_input_bits``: the input width BOPs count where an input stays float (None:
        float32). ``input_bits``, the previous name of both, warns once. ``granularity``: the
        weight grids' option of :attr:`granularities`, one for every entry or a dict per entry
        (None, or an entry left out: the first option); ``scale_bits``: how the plan costs
        block scales. ``input_granularity``: ``"tensor"`` (the fitted input grid, the
        default) or ``"token"`` (:class:`TokenGrid`, an option of
        :attr:`input_granularities`), one for every entry with a chosen input width or a dict.

        >>> t = SensitivityTable.synthetic(np.array([[12.0, 36.0]]), params=[64], bits=(2, 6))
        >>> t.make_plan({"layer0": 6}).bits
        {'layer0': 6}
        >>> s = SensitivityTable.synthetic(np.array([[12.0, 36.0]]), params=[64], bits=(2, 6),
        ...                                input_sqnr_db=np.array([[30.0, 40.0]]), input_bits=(4, 8))
        >>> p = s.make_plan({"layer0": 2}, chosen_input_bits={"layer0": 8})
        >>> p.bits, p.chosen_input_bits, s.input_bits
        ({'layer0': 2}, {'layer0': 8}, (4, 8))
        """
        from .table_plans import plan_from_table

        return plan_from_table(self, bits, chosen_input_bits, assumed_input_bits, predicted_sqnr_db,
                               renamed, granularity, scale_bits, input_granularity)

    def _entry_info(self, name: str) -> dict:
        """What a plan records of an entry (cached: a front's plans share it; read-only)."""
        key = ("info", name)
        d = self._settings.get(key)
        if d is None:
            d = {"kind": self.kind(name), "has_input": self.has_input(name),
                 "shared_with": self.shared_with(name), "weight_digest": self.weight_digest(name)}
            if self.kind(name) == "activation":
                d["partner"] = self.partner(name)
            self._settings[key] = d
        return d

    # ------------------------------------------------------------------ display
    def to_rows(self) -> list[dict]:
        """One dict per (layer, bit width): layer, type, bits, params, macs, layer / model SQNR
        (``quantize="separate"``: weight rows, then input rows, with a ``source`` key; input rows
        of a table with token rows also say their ``input_granularity``)."""
        return table_rows(self)

    def __repr__(self) -> str:
        extra = f", input bits {list(self._input_bits)}" if self.quantize == "separate" else ""
        return (f"SensitivityTable({len(self.layers)} layers x bits {list(self.bits)}{extra}, "
                f"quantize={self.quantize!r}, scopes={list(self.scopes)}, estimate={self.estimate!r}; "
                f"{self.coverage})")

    def to_html(self) -> str:
        """The table as HTML: model scope (else layer scope), gain-estimated cells that may be far
        off marked "?" (:meth:`uncertain`), cells measured exactly by ``confirm=`` marked "="."""
        return table_html(self)

    _repr_html_ = to_html

    # ------------------------------------------------------------------ JSON
    def to_dict(self) -> dict:
        """The table as JSON-ready data (layout: :mod:`qwidgets.planning.table_schema`)."""
        return table_to_dict(self)

    def save(self, path: str | os.PathLike) -> None:
        """Write the table (SQNRs, shapes, fitted grids) as JSON."""
        write_text(path, json.dumps(self.to_dict(), allow_nan=False), "table")

    @classmethod
    def load(cls, path: str | os.PathLike) -> SensitivityTable:
        """Read a table written by :meth:`save` (JSON only; every field checked)."""
        return table_from_text(cls, read_text(path, "table"))

    # ------------------------------------------------------------------ synthetic
    @classmethod
    def synthetic(cls, model_sqnr_db: ArrayLike, *, params: Sequence[int], bits: Sequence[int],
                  input_sqnr_db: ArrayLike | None = None, input_bits: Sequence[int] = (), macs: Sequence[int] | None = None,
                  names: Sequence[str] | None = None, input_token_sqnr_db: ArrayLike | None = None) -> SensitivityTable:
        """A table from given model-scope SQNRs (for planning experiments, tests and benchmarks).

        ``model_sqnr_db``: (entries x bits) weight rows. With ``input_sqnr_db`` (entries x
        input_bits; a row of NaN: an entry with no input rows) the table is a ``"separate"``
        one (``input_token_sqnr_db``, same shape: its per-token input rows). Each entry gets a
        ``(params, 1)`` weight; every grid is per tensor, of scale 1.

        >>> t = SensitivityTable.synthetic([[10.0, 30.0]], params=[100], bits=(4, 8),
        ...                                input_sqnr_db=[[25.0, 35.0]], input_bits=(6, 8))
        >>> t.quantize, t.input_bits, t.sqnr_db("layer0", 6, source="input")
        ('separate', (6, 8), 25.0)
        """
        return synthetic_table(cls, model_sqnr_db, params=params, bits=bits, input_sqnr_db=input_sqnr_db,
                               input_bits=input_bits, macs=macs, names=names,
                               input_token_sqnr_db=input_token_sqnr_db)
