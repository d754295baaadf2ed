"""The notebook view of a SensitivityTable (HTML, no drawing library)."""

from __future__ import annotations

import html

import numpy as np


def table_html(table) -> str:
    """The table as HTML: model-scope SQNR (else layer scope) per entry and width, shaded; a
    table scanned with ``quantize="separate"`` shows its weight rows, then its input rows."""
    scope = "model" if "model" in table.scopes else "layer"
    blocks = [("weight", table.bits, None)]
    if table.quantize == "separate":
        blocks += [("input", table.input_bits, g) for g in table.input_granularities]
    out = []
    for source, widths, gran in blocks:
        arr = table.sqnr_array(scope, source, None if gran == "tensor" else gran)
        marks = cell_marks(table, scope, source) if gran != "token" else [[""] * len(widths)] * len(arr)
        head = "".join(f"<th>{b} bits</th>" for b in widths)
        ok = np.isfinite(arr)
        lo, hi = (float(arr[ok].min()), float(arr[ok].max())) if ok.any() else (0.0, 1.0)
        body = []
        for i, name in enumerate(table.layers):
            if source == "input" and not table.has_input_rows(name):
                continue
            cells = []
            for j, v in enumerate(arr[i]):
                shade = 0.0 if not np.isfinite(v) or hi == lo else (v - lo) / (hi - lo)
                bg = f"rgba(46,134,193,{0.08 + 0.5 * shade:.2f})"
                cells.append(f'<td style="background:{bg};text-align:right">{fmt_db(v)}'
                             f"{marks[i][j]}</td>")
            shared = table.shared_with(name)
            label = html.escape(name) + (f" <small>(also {html.escape(', '.join(shared))})</small>"
                                         if shared else "")
            body.append(f"<tr><td>{label}</td><td>{html.escape(table.layer_type(name))}</td>"
                        f"<td>{'yes' if table.has_input(name) else 'weight only'}</td>"
                        f'<td style="text-align:right">{table.params(name):,}</td>'
                        f'<td style="text-align:right">{table.macs(name):,}</td>' + "".join(cells) + "</tr>")
        what = (f"{table.quantize} quantized" if table.quantize != "separate"
                else f"{source}s quantized on their own" + (", a scale per token (row), computed at run time"
                                                            if gran == "token" else ""))
        how = f" ({how_measured(table, scope)})" if how_measured(table, scope) else ""
        out.append(f"<div><b>{scope.capitalize()}-output SQNR (dB)</b>{how}, {what}, "
                   f"one layer at a time ({table.n_samples} samples)<table>"
                   f"<tr><th>layer</th><th>type</th><th>input</th><th>weights</th><th>MACs / sample</th>"
                   f"{head}</tr>" + "".join(body) + "</table></div>")
    return "".join(out) + marks_legend(table, scope) + \
        f"<div><small>{html.escape(str(table.coverage))}</small></div>"


UNCERTAIN_MARK = '<sup title="gain estimate; its first-order error may be large">?</sup>'
CONFIRMED_MARK = '<sup title="measured exactly after the gain estimate (confirm=)">=</sup>'


def cell_marks(table, scope: str, source: str = "weight") -> list[list[str]]:
    """The HTML mark after each cell's value: :data:`UNCERTAIN_MARK` where the gain estimate may
    be far off (:meth:`SensitivityTable.uncertain`), :data:`CONFIRMED_MARK` where ``confirm=``
    measured it exactly, else ""."""
    widths = table.input_bits if source == "input" and table.quantize == "separate" else table.bits
    if scope != "model" or table.estimate != "gain":
        return [[""] * len(widths) for _ in table.layers]
    unsure = table.uncertain(source)
    return [[UNCERTAIN_MARK if unsure[i, j] else CONFIRMED_MARK if (name, source, b) in table.confirmed
             else "" for j, b in enumerate(widths)] for i, name in enumerate(table.layers)]


def marks_legend(table, scope: str) -> str:
    """A line explaining the marks (empty when the table has none in ``scope``)."""
    if scope != "model" or table.estimate != "gain":
        return ""
    from .uncertainty import UNCERTAIN_BITS, UNCERTAIN_LAYER_DB

    rule = (f"the layer's own output SQNR is below {UNCERTAIN_LAYER_DB:g} dB" if "layer" in table.scopes
            else f"the width is {UNCERTAIN_BITS} bits or fewer")
    n = sum(int(table.uncertain(s).sum()) for s in (("weight", "input") if table.quantize == "separate"
                                                    else ("weight",)))
    done = f"; = measured exactly ({len(table.confirmed)} cells, confirm=)" if table.confirmed else ""
    return (f"<div><small>? gain estimate whose first-order error may be large ({n} cells: {rule}); "
            f"scan(..., confirm=k) measures the k most uncertain exactly{done}</small></div>")


def how_measured(table, scope: str) -> str:
    """"" for measured numbers; a short note where the model scope was estimated."""
    if scope == "model" and table.estimate == "gain":
        return "estimated to first order by back-propagated probes"
    return ""


def fmt_db(v: float) -> str:
    if not np.isfinite(v):
        return "exact" if v > 0 else "-inf"
    return f"{v:.1f}"




def table_rows(table) -> list[dict]:
    """:meth:`SensitivityTable.to_rows`: one dict per (entry, width)."""
    sources = [("weight", table.bits, None)]
    if table.quantize == "separate":
        sources += [("input", table.input_bits, g) for g in table.input_granularities]
    arrays = {(source, g): {scope: table.sqnr_array(scope, source, None if g == "tensor" else g)
                            for scope in ("layer", "model")} for source, _, g in sources}
    rows = []
    for i, name in enumerate(table.layers):
        for source, widths, gran in sources:
            if source == "input" and not table.has_input_rows(name):
                continue
            arrs = arrays[(source, gran)]
            for j, b in enumerate(widths):
                row = {
                    "layer": name,
                    "type": table.layer_type(name),
                    "bits": b,
                    "params": table.params(name),
                    "macs": table.macs(name),
                    "layer_sqnr_db": None if arrs["layer"] is None else float(arrs["layer"][i, j]),
                    "model_sqnr_db": None if arrs["model"] is None else float(arrs["model"][i, j]),
                }
                if table.quantize == "separate":
                    row["source"] = source
                if gran is not None and len(table.input_granularities) > 1:
                    row["input_granularity"] = gran  # the input rows of a table with token rows
                rows.append(row)
    return rows
