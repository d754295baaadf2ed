"""ScanFigure: the scan view's heatmap with a row marker for the picked layer and bit width.

It draws on a :class:`~qwidgets.viz.canvas.BlitCanvas` (the widget shows its PNG): the heatmap
is the static background, the two marker rectangles are blitted on top, so picking a layer
redraws only them.

>>> import numpy as np
>>> from qwidgets.viz.canvas import BlitCanvas
>>> fig = ScanFigure(BlitCanvas(400, 200))
>>> fig.show(np.array([[10.0, 30.0], [20.0, 40.0]]), ["a", "b"], (4, 8), "model-output SQNR (dB)",
...          vmin=10.0, vmax=40.0)
>>> fig.mark(1, 0); fig.marked
(1, 0)
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from matplotlib.patches import Rectangle

from .canvas import BlitCanvas
from .heatmap import draw_heatmap

__all__ = ["ScanFigure"]


class ScanFigure:
    """The heatmap of one scope's SQNR and the marker of the picked (layer, bits) cell."""

    def __init__(self, canvas: BlitCanvas):
        self.canvas = canvas
        self.marked: tuple[int, int] | None = None
        self._row = self._cell = None

    def show(self, arr: np.ndarray, layers: Sequence[str], bits: Sequence[int], title: str, *,
             vmin: float, vmax: float, inputs: tuple | None = None) -> None:
        """Draw the heatmap (the whole figure anew) with the colour scale ``vmin`` .. ``vmax``;
        ``inputs``: ``(array, widths, title)`` of the input rows, drawn beside it."""
        fig = self.canvas.figure
        if self._row is not None:
            self.canvas.forget(self._row, self._cell)
        fig.clear()
        self.axes_inputs = None
        if inputs is None:
            ax = fig.add_subplot()
            draw_heatmap(ax, arr, layers, bits, title, vmin=vmin, vmax=vmax)
        else:
            in_arr, in_bits, in_title = inputs
            ax, self.axes_inputs = fig.subplots(1, 2, sharey=True, gridspec_kw={
                "width_ratios": [len(bits) + 1, len(in_bits) + 1.6]})
            draw_heatmap(ax, arr, layers, bits, title, vmin=vmin, vmax=vmax, colorbar=False)
            draw_heatmap(self.axes_inputs, in_arr, layers, in_bits, in_title, vmin=vmin, vmax=vmax,
                         layer_labels=False)
        self._row = Rectangle((-0.5, -0.5), len(bits), 1, fill=False, lw=2.2, ec="#d62728", visible=False)
        self._cell = Rectangle((-0.5, -0.5), 1, 1, fill=False, lw=2.2, ec="white", visible=False)
        ax.add_patch(self._row)
        ax.add_patch(self._cell)
        fig.tight_layout()
        self.canvas.animate(self._row, self._cell)
        self.canvas.invalidate()
        self.mark(*(self.marked or (None, None)))

    def mark(self, row: int | None, col: int | None) -> None:
        """Outline row ``row`` and its cell ``col`` (None: no marker)."""
        if row is None or col is None:
            self.marked = None
            self._row.set_visible(False)
            self._cell.set_visible(False)
            return
        self.marked = (int(row), int(col))
        self._row.set_xy((-0.5, row - 0.5))
        self._cell.set_xy((col - 0.5, row - 0.5))
        self._row.set_visible(True)
        self._cell.set_visible(True)
