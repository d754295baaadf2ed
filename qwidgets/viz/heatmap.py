"""The layers x bit widths SQNR heatmap, drawn with matplotlib, and the same colours for an HTML
table (shared by ScanView and :func:`plot_sensitivity`; the scan itself never imports matplotlib).

One colour scale serves the figure and the table: :func:`sqnr_limits` picks it from one or more
arrays (ScanView passes both scopes, so toggling the scope keeps the scale), and
:func:`draw_heatmap` and :func:`cell_colors` both map a value to the same colour with it.
"""

from __future__ import annotations

import html
from collections.abc import Sequence

import numpy as np
from matplotlib import colormaps
from matplotlib.axes import Axes
from matplotlib.colors import to_hex
from matplotlib.figure import Figure

from ..planning.table import SensitivityTable
from ..planning.table_html import cell_marks, fmt_db, how_measured, marks_legend
from .labels import literal

__all__ = ["CMAP", "cell_colors", "draw_heatmap", "plot_sensitivity", "sqnr_limits", "sqnr_table_html"]

CMAP = "viridis"
TEXT_DARK_ABOVE = 0.55  # fraction of the scale above which cell text is black (viridis is light there)


def sqnr_limits(*arrays: np.ndarray | None) -> tuple[float, float]:
    """The colour scale ``(vmin, vmax)`` covering every finite value of the given arrays.

    >>> sqnr_limits(np.array([[10.0, np.inf]]), np.array([[30.0]]), None)
    (10.0, 30.0)
    >>> sqnr_limits(np.array([[5.0]]))  # one value: a 1 dB wide scale
    (5.0, 6.0)
    """
    finite = [a[np.isfinite(a)] for a in arrays if a is not None]
    finite = np.concatenate(finite) if finite else np.zeros(0)
    if not finite.size:
        return 0.0, 1.0
    vmin, vmax = float(finite.min()), float(finite.max())
    return (vmin, vmax) if vmax > vmin else (vmin, vmin + 1.0)


def _fractions(arr: np.ndarray, vmin: float, vmax: float) -> np.ndarray:
    """Position of each value on the scale, 0..1; +inf ("exact") at the top, -inf at the bottom."""
    a = np.where(np.isposinf(arr), vmax, np.where(np.isneginf(arr), vmin, arr))
    a = np.where(np.isnan(a), vmin, a)
    return np.clip((a - vmin) / (vmax - vmin), 0.0, 1.0)


def cell_colors(arr: np.ndarray, vmin: float, vmax: float) -> tuple[list[list[str]], list[list[str]]]:
    """Background and text colours (hex) of each cell, as :func:`draw_heatmap` paints them.

    >>> bg, fg = cell_colors(np.array([[10.0, 30.0]]), 10.0, 30.0)
    >>> bg, fg
    ([['#440154', '#fde725']], [['#ffffff', '#000000']])
    """
    cmap = colormaps[CMAP]
    frac = _fractions(np.asarray(arr, dtype=float), vmin, vmax)
    bg = [[to_hex(cmap(float(f))) for f in row] for row in frac]
    fg = [["#000000" if f > TEXT_DARK_ABOVE else "#ffffff" for f in row] for row in frac]
    return bg, fg


def draw_heatmap(ax, arr: np.ndarray, layers: Sequence[str], bits: Sequence[int], label: str, *,
                 vmin: float | None = None, vmax: float | None = None, colorbar: bool = True,
                 layer_labels: bool = True) -> object:
    """Draw a layers x bits SQNR heatmap with values in the cells into ``ax``; returns the image.

    ``vmin`` / ``vmax``: the colour scale (default: :func:`sqnr_limits` of ``arr``). Every label
    is literal text (a layer named ``$x$`` is not read as math). NaN cells (nothing measured,
    e.g. an entry with no input rows) are grey and empty.

    >>> from matplotlib.figure import Figure
    >>> ax = Figure().add_subplot()
    >>> _ = draw_heatmap(ax, np.array([[10.0, 30.0]]), ["fc"], (4, 8), "model-output SQNR (dB)")
    >>> [t.get_text() for t in ax.texts]
    ['10.0', '30.0']
    """
    arr = np.asarray(arr, dtype=float)
    if vmin is None or vmax is None:
        vmin, vmax = sqnr_limits(arr)
    frac = _fractions(arr, vmin, vmax)
    shown = np.ma.masked_invalid(np.where(np.isnan(arr), np.nan, vmin + frac * (vmax - vmin)))
    cmap = colormaps[CMAP].with_extremes(bad="#e4e4e4")
    im = ax.imshow(shown, aspect="auto", cmap=cmap, vmin=vmin, vmax=vmax, interpolation="nearest")
    ax.set_xticks(range(len(bits)), [str(b) for b in bits])
    if layer_labels:
        ax.set_yticks(range(len(layers)), [literal(n) for n in layers])
        ax.set_ylabel("layer (execution order)")
    else:  # beside another panel that names the layers (the ticks may be shared with it)
        ax.tick_params(labelleft=False)
    ax.set_xlabel("bit width")
    ax.set_title(label, fontsize=10, parse_math=False)
    fs = 8 if len(layers) <= 24 else 6
    for i in range(arr.shape[0]):
        for j in range(arr.shape[1]):
            if np.isnan(arr[i, j]):
                continue
            ax.text(j, i, fmt_db(arr[i, j]), ha="center", va="center", fontsize=fs, parse_math=False,
                    color="black" if frac[i, j] > TEXT_DARK_ABOVE else "white")
    if colorbar:
        ax.figure.colorbar(im, ax=ax, label="SQNR (dB)", fraction=0.05, pad=0.02)
    return im


def sqnr_table_html(table: SensitivityTable, scope: str, vmin: float | None = None,
                    vmax: float | None = None, source: str = "weight", granularity=None) -> str:
    """The table's SQNR for one scope as an HTML table, cells in the heatmap's colours;
    ``source="input"``: the input rows of a ``quantize="separate"`` table (one column per
    input width; "-" where an entry's input was not scanned); ``granularity``: the rows of
    that option (weights: ``"tensor"``, ``"channel"`` or a block size, "-" where an entry
    skipped it; inputs: ``"tensor"`` or ``"token"``; None: the table's first).

    >>> t = SensitivityTable.synthetic(np.array([[12.0, 36.0]]), params=[64], bits=(2, 6))
    >>> "#440154" in sqnr_table_html(t, "model") and "Model-output SQNR" in sqnr_table_html(t, "model")
    True
    """
    arr = table.sqnr_array(scope, source, None if granularity == "tensor" and source == "input" else granularity)
    if arr is None:
        raise ValueError(f"the table holds no {scope}-scope SQNR; it holds {list(table.scopes)}")
    if vmin is None or vmax is None:
        vmin, vmax = sqnr_limits(arr)
    bg, fg = cell_colors(arr, vmin, vmax)
    widths = table.input_bits if source == "input" and table.quantize == "separate" else table.bits
    head = "".join(f"<th>{b} bits</th>" for b in widths)
    first = table.granularities[0] if source == "weight" else "tensor"
    body, marks = [], cell_marks(table, scope, source) if granularity in (None, first) else \
        [[""] * len(widths)] * len(table.layers)  # the gain marks are of the first option's rows
    for i, name in enumerate(table.layers):
        cells = "".join(f'<td style="background:{bg[i][j]};color:{fg[i][j]};text-align:right">'
                        f"{'-' if np.isnan(v) else fmt_db(v)}{marks[i][j]}</td>" for j, v in enumerate(arr[i]))
        body.append(f"<tr><td>{html.escape(name)}</td><td>{html.escape(table.layer_type(name))}</td>"
                    f'<td style="text-align:right">{table.params(name):,}</td>'
                    f'<td style="text-align:right">{table.macs(name):,}</td>{cells}</tr>')
    how = f" ({html.escape(how_measured(table, scope))})" if how_measured(table, scope) else ""
    what = f"{table.quantize} quantized"
    if table.quantize == "separate":
        what = "layer inputs quantized" if source == "input" else "weights quantized"
    if granularity not in (None, "tensor") or (source == "weight" and len(table.granularities) > 1):
        g = granularity or table.granularities[0]
        what += " per token" if g == "token" else f", {'per ' + g if isinstance(g, str) else f'blocks of {g}'}"
    return (f"<div><b>{scope.capitalize()}-output SQNR (dB)</b>{how}, {html.escape(what)}, "
            f"one layer at a time ({table.n_samples} samples)<table>"
            f"<tr><th>layer</th><th>type</th><th>weights</th><th>MACs / sample</th>{head}</tr>"
            + "".join(body) + "</table></div>" + marks_legend(table, scope))


def plot_sensitivity(table: SensitivityTable, scope: str = "model", ax: Axes | None = None) -> Figure:
    """A heatmap of a table's SQNR (dB), layers x bit widths, values written in the cells.

    Returns the matplotlib Figure (a new one, made without pyplot, unless ``ax`` is given).

    >>> t = SensitivityTable.synthetic(np.array([[12.0, 36.0]]), params=[64], bits=(2, 6))
    >>> fig = plot_sensitivity(t)
    >>> [x.get_text() for x in fig.axes[0].texts]
    ['12.0', '36.0']
    """
    from matplotlib.figure import Figure

    if not isinstance(table, SensitivityTable):
        raise TypeError(f"table must be a SensitivityTable, got {type(table).__name__}")
    arr = table.sqnr_array(scope)
    if arr is None:
        raise ValueError(f"the table holds no {scope}-scope SQNR; scan with scope={scope!r} or 'both'")
    if ax is None:
        fig = Figure(figsize=(1.2 + 0.75 * len(table.bits) + 0.08 * max(map(len, table.layers)),
                              1.4 + 0.32 * len(table.layers)), dpi=100)
        ax = fig.add_subplot()
    else:
        fig = ax.figure
    how = ", estimated" if how_measured(table, scope) else ""
    draw_heatmap(ax, arr, table.layers, table.bits, f"{scope}-output SQNR (dB{how})")
    fig.tight_layout()
    return fig
