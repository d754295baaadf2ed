"""The layers x bit widths SQNR heatmap, drawn with matplotlib (shared by ScanView and
:func:`plot_sensitivity`; the scan itself never imports matplotlib)."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from ..planning.table import SensitivityTable
from ..planning.table_html import fmt_db

__all__ = ["draw_heatmap", "plot_sensitivity"]


def draw_heatmap(ax, arr: np.ndarray, layers: Sequence[str], bits: Sequence[int], label: str) -> object:
    """Draw a layers x bits SQNR heatmap with values in the cells into ``ax``; returns the image.

    >>> from matplotlib.figure import Figure
    >>> ax = Figure().add_subplot()
    >>> _ = draw_heatmap(ax, np.array([[10.0, 30.0]]), ["fc"], (4, 8), "model-output SQNR (dB)")
    >>> [t.get_text() for t in ax.texts]
    ['10.0', '30.0']
    """
    finite = arr[np.isfinite(arr)]
    vmin, vmax = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
    if vmax == vmin:
        vmax = vmin + 1.0
    shown = np.where(np.isfinite(arr), arr, vmax)
    im = ax.imshow(shown, aspect="auto", cmap="viridis", vmin=vmin, vmax=vmax, interpolation="nearest")
    ax.set_xticks(range(len(bits)), [str(b) for b in bits])
    ax.set_yticks(range(len(layers)), list(layers))
    ax.set_xlabel("bit width")
    ax.set_ylabel("layer (execution order)")
    ax.set_title(label, fontsize=10)
    fs = 8 if len(layers) <= 24 else 6
    for i in range(arr.shape[0]):
        for j in range(arr.shape[1]):
            v = arr[i, j]
            frac = 1.0 if not np.isfinite(v) else (v - vmin) / (vmax - vmin)
            ax.text(j, i, fmt_db(v), ha="center", va="center", fontsize=fs,
                    color="black" if frac > 0.55 else "white")
    ax.figure.colorbar(im, ax=ax, label="SQNR (dB)", fraction=0.05, pad=0.02)
    return im


def plot_sensitivity(table: SensitivityTable, scope: str = "model", ax=None):
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
    draw_heatmap(ax, arr, table.layers, table.bits, f"{scope}-output SQNR (dB)")
    fig.tight_layout()
    return fig
