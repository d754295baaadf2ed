"""Which gain-estimated cells of a table may be far off, and which of them to measure exactly.

The gain estimate (:mod:`.gain_probes`) is first order: it pulls a layer's output error through
the rest of the model as if that rest were linear. It departs from the exact model scope where
the error is large enough to switch ReLUs and saturations, i.e. where the layer's own output
error is large against its output. A cell is *uncertain* when its model-scope value came from
the probes and that layer's own output SQNR (the table's layer scope, same entry and width) is
below :data:`UNCERTAIN_LAYER_DB`; without a layer scope, when its width is at most
:data:`UNCERTAIN_BITS`. Measured on a residual network of five 3x3 convolutions and a linear
head, 2 to 8 bits: every cell off by more than 0.5 dB had a layer-scope SQNR under 25 dB (the
largest, -5.0 dB at 2 bits, had 10.7 dB), and no cell above it was off by more than 0.1 dB.

The *possible error* of an uncertain cell is the relative error power of the layer's output,
``10 ** (-layer SQNR / 10)`` (without a layer scope, ``4 ** -bits``): ``scan(..., confirm=k)``
measures exactly the k uncertain cells where it is largest, and the table lists them in
:attr:`SensitivityTable.confirmed`.
"""

from __future__ import annotations

import numpy as np

__all__ = ["UNCERTAIN_LAYER_DB", "UNCERTAIN_BITS", "uncertain_cells", "possible_error", "most_uncertain"]

UNCERTAIN_LAYER_DB = 25.0  # layer-scope SQNR under which a gain-estimated cell is marked
UNCERTAIN_BITS = 4  # without a layer scope: gain-estimated cells at this width or narrower


def _sources(table) -> list[str]:
    return ["weight", "input"] if table.quantize == "separate" else ["weight"]


def _widths(table, source: str) -> tuple:
    return table.input_bits if source == "input" and table.quantize == "separate" else table.bits


def possible_error(table, source: str = "weight") -> np.ndarray:
    """Relative error power of each gain-estimated cell's layer output (entries x widths);
    NaN where the cell was measured exactly (or confirmed)."""
    widths = _widths(table, source)
    out = np.full((len(table.layers), len(widths)), np.nan)
    if table.estimate != "gain" or "model" not in table.scopes:
        return out
    layer = table.sqnr_array("layer", source) if "layer" in table.scopes else None
    for i, name in enumerate(table.layers):
        if table.model_pass(name) != "probes":
            continue
        for j, b in enumerate(widths):
            if (name, source, b) in table.confirmed:
                continue
            out[i, j] = 4.0 ** -b if layer is None else 10.0 ** (-layer[i, j] / 10.0)
    return out


def uncertain_cells(table, source: str = "weight") -> np.ndarray:
    """Boolean (entries x widths): gain-estimated cells whose first-order error may be large."""
    err = possible_error(table, source)
    with np.errstate(invalid="ignore"):
        if "layer" in table.scopes:
            return err > 10.0 ** (-UNCERTAIN_LAYER_DB / 10.0)
        return err >= 4.0 ** -UNCERTAIN_BITS


def most_uncertain(table, k: int) -> list[tuple[str, str, int]]:
    """The ``k`` uncertain cells ``(entry, source, bits)`` with the largest possible error
    (fewer when fewer are uncertain); ties: narrower width, then table order."""
    cells = []
    for source in _sources(table):
        err, mark = possible_error(table, source), uncertain_cells(table, source)
        widths = _widths(table, source)
        for i, j in zip(*np.nonzero(mark), strict=True):
            cells.append((-err[i, j], widths[j], i, (table.layers[i], source, int(widths[j]))))
    return [c[-1] for c in sorted(cells)[:k]]
