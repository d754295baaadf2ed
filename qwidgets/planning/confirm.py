"""``scan(..., confirm=k)``: the k gain-estimated cells with the largest possible error
(:func:`.uncertainty.most_uncertain`), measured exactly by the exact model scope
(:func:`.model_scope.model_scope` with ``estimate="exact"``) on the scan's own grids and data;
their values replace the estimates and the table lists them in ``confirmed``."""

from __future__ import annotations

import warnings
from numbers import Integral

from ..model.batching import cut_batches
from ..model.entries import find_entries
from ..model.fastpath import attention_fastpath_off
from ..model.sources import data_source
from .model_scope import model_scope
from .survey import survey
from .table import SensitivityTable
from .threads import pass_threads, threads
from .uncertainty import most_uncertain

__all__ = ["check_confirm", "confirm_cells", "scanned_table", "noted", "ScanNote"]


def noted(table: SensitivityTable) -> SensitivityTable:
    """The table, with a warning for each slower path the scan took (``table.notes``)."""
    for note in table.notes:
        warnings.warn(f"scan: {note}", ScanNote, stacklevel=3)
    return table


class ScanNote(UserWarning):
    """A scan took a slower path than it could have (the reason is in ``table.notes`` too)."""


def check_confirm(confirm, estimate: str, scope: str) -> int:
    """``scan``'s ``confirm``: an int >= 0, and > 0 only for a gain estimate of the model scope."""
    if isinstance(confirm, bool) or not isinstance(confirm, Integral):
        raise TypeError(f"confirm must be an int >= 0 (cells to measure exactly), got {confirm!r}")
    if confirm < 0:
        raise ValueError(f"confirm must be an int >= 0 (cells to measure exactly), got {confirm}")
    if confirm and (estimate != "gain" or scope == "layer"):
        raise ValueError(f"confirm={confirm} measures gain-estimated model-scope cells exactly; it needs "
                         f"estimate='gain' and scope 'model' or 'both' (got estimate={estimate!r}, "
                         f"scope={scope!r})")
    return int(confirm)


def scanned_table(model, data, parts: dict, options: dict) -> SensitivityTable:
    """The scan's table from its fields ``parts``, with the state digests of ``options``; with
    ``options["confirm"]`` = k, its k most uncertain cells measured exactly (``confirmed``)."""
    k, digests = options["confirm"], options["digests"]
    table = SensitivityTable(**parts, state_digests=digests)
    if not k:
        return table
    exact = confirm_cells(model, data, table, k, options)
    for (name, source, b), v in exact.items():
        i = parts["layers"].index(name)
        if source == "input" and parts["quantize"] == "separate":
            parts["input_model_sqnr"][i, tuple(parts["input_bits"]).index(b)] = v
        else:
            parts["model_sqnr"][i, tuple(parts["bits"]).index(b)] = v
    return SensitivityTable(**parts, state_digests=digests, confirmed=list(exact))


def confirm_cells(model, data, table, k: int, options: dict) -> dict:
    """``{(entry, source, bits): exact model-scope SQNR (dB)}`` of the ``k`` most uncertain
    cells of ``table`` (a scan of ``model`` on ``data`` with ``options``)."""
    cells = most_uncertain(table, k)
    if not cells:
        return {}
    source = data_source(model, cut_batches(data, options["batch_size"]), options["max_samples"])
    by_name = {e.name: e for e in find_entries(model)}  # probed entries are known modules'
    wanted = [n for n in table.layers if any(c[0] == n for c in cells)]
    with attention_fastpath_off():  # as the scan's passes ran (the attention fast path off)
        return _measure(model, source, table, cells, wanted, by_name, options)


def _measure(model, source, table, cells, wanted, by_name, options) -> dict:
    n_threads = pass_threads(model)  # the scan's passes' thread count
    out = {}
    with threads(n_threads):  # the reference outputs on the passes' threads, as the scan does
        found = survey(model, source, [by_name[n] for n in wanted], want_inputs=False, keep_refs=True,
                       output=options["output"], inputs_checked=True)
        facts = {f.entry.name: f for f in found.facts}
        for name in wanted:
            mine = [c for c in cells if c[0] == name]
            configs = {name: [_config(table, c) for c in mine]}
            sq = model_scope(model, source, found, [facts[name]], configs, len(mine), {name: {}},
                             estimate="exact", output=options["output"], progress=False)
            out.update({c: float(v) for c, v in zip(mine, sq[0], strict=True)})
    return out


def _config(table, cell) -> tuple:
    """The (weight grid, input grid) the scan measured for ``cell``."""
    name, source, b = cell
    q = table.quantize
    if q == "separate":
        return (table.weight_grid(name, b), None) if source == "weight" else (None, table.input_grid(name, b))
    w = table.weight_grid(name, b) if q in ("weight", "both") else None
    x = table.input_grid(name, b) if q in ("input", "both") else None
    return w, x
