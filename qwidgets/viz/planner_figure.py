"""PlannerFigure: the budget planner's figure, the Pareto front and the bits per layer.

Drawn on a :class:`~qwidgets.viz.canvas.BlitCanvas` (the widget shows its PNG). The front, axes
and labels are the static background; the budget line, the chosen-plan dot, the measured
diamond and the bars are blitted on top, so moving the budget redraws only them. The limits
always leave room for a whole marker, so no marker is cut at the plot's edge.

>>> from qwidgets.viz.canvas import BlitCanvas
>>> f = PlannerFigure(BlitCanvas(600, 300), ["a", "b"], (2, 4, 8))
>>> f.show_front([1.0, 2.0, 3.0], [10.0, 20.0, 30.0], "weight storage (KiB)")
>>> f.show_choice(2.0, 2.0, 20.0, measured_db=18.5, weight_bits=[4, 8])
>>> [b.get_width() for b in f.weight_bars], f.marker_positions()
([4, 8], {'chosen': (2.0, 20.0), 'measured': (2.0, 18.5)})
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from .canvas import BlitCanvas
from .labels import literal

__all__ = ["PlannerFigure"]

FRONT_COLOR = "#1f77b4"
CHOSEN_COLOR = "#d62728"
MEASURED_COLOR = "#2ca02c"
WEIGHT_COLOR = "#4c72b0"
INPUT_COLOR = "#dd8452"
X_PAD = 0.06  # of the cost span, each side: more than a marker's radius at the widget's size
Y_PAD = 0.10  # of the SQNR span (at least 1 dB), each side
MAX_LABELS = 45  # layer names on the bar axis at most (every k-th beyond: they would overlap)


class PlannerFigure:
    """The Pareto front (cost against predicted SQNR) beside a bar chart of bits per layer.

    ``layers``: the table's layers, top to bottom; ``bits``: the widths on the bar axis;
    ``inputs``: draw an input-width bar beside each weight bar (tables with both); ``curve``:
    a second plot under the front for the user's metric along it (:meth:`show_curve`).
    """

    def __init__(self, canvas: BlitCanvas, layers: Sequence[str], bits: Sequence[int], *,
                 inputs: bool = False, curve: bool = False):
        self.canvas = canvas
        self.layers = list(layers)
        fig = canvas.figure
        if curve:  # front on top, the metric curve under it on the same cost axis
            self.ax_front = fig.add_axes((0.09, 0.50, 0.50, 0.44))
            self.ax_curve = fig.add_axes((0.09, 0.09, 0.50, 0.30), sharex=self.ax_front)
            self.ax_bits = fig.add_axes((0.72, 0.09, 0.25, 0.78 if inputs else 0.85))
            self._curve_placeholder()
        else:
            self.ax_front = fig.add_axes((0.09, 0.15, 0.50, 0.74))
            # with inputs, a legend row between the bars and the title: the bars start lower
            self.ax_bits = fig.add_axes((0.72, 0.15, 0.25, 0.66 if inputs else 0.74))
            self.ax_curve = None
        ax = self.ax_front
        (self.front_line,) = ax.plot([], [], drawstyle="steps-post", color=FRONT_COLOR, lw=1.4,
                                     label="Pareto front")
        (self.front_dots,) = ax.plot([], [], ".", color=FRONT_COLOR, ms=3)
        self.budget_line = ax.axvline(0.0, color="#888888", ls="--", lw=1, label="budget")
        (self.chosen,) = ax.plot([], [], "o", color=CHOSEN_COLOR, ms=10, label="chosen plan",
                                 clip_on=False)
        (self.measured,) = ax.plot([], [], "D", color=MEASURED_COLOR, ms=6, label="measured",
                                   clip_on=False)
        ax.set_ylabel("predicted model-output SQNR (dB)")
        ax.set_title("best predicted SQNR for each budget", fontsize=10)
        ax.grid(alpha=0.3)
        ax.legend(loc="lower right", fontsize=8)
        axb = self.ax_bits
        y = np.arange(len(self.layers), dtype=float)
        h = 0.38 if inputs else 0.7
        self.weight_bars = list(axb.barh(y - (h / 2 if inputs else 0), np.zeros(len(y)), color=WEIGHT_COLOR,
                                         height=h, label="weight"))
        self.input_bars = list(axb.barh(y + h / 2, np.zeros(len(y)), color=INPUT_COLOR, height=h,
                                        label="input")) if inputs else []
        step = max(1, math.ceil(len(y) / MAX_LABELS))  # at most MAX_LABELS names on the axis
        axb.set_yticks(y[::step], [literal(n) for n in self.layers[::step]],
                       fontsize=8 if len(y) <= 30 else 6)
        axb.invert_yaxis()
        axb.set_xlim(0, max(bits) + 0.5)
        axb.set_xticks(list(bits))
        axb.set_xlabel("bits")
        axb.grid(axis="x", alpha=0.3)
        if inputs:  # above the bars (which are drawn over anything inside the axes)
            axb.set_title("bits per layer", fontsize=10, pad=20)
            axb.legend(loc="lower center", bbox_to_anchor=(0.5, 1.0), ncol=2, fontsize=7, frameon=False,
                       handlelength=1.0, borderaxespad=0.1)
        else:
            axb.set_title("bits per layer", fontsize=10)
        self._fit_names()
        self._front_limits = (0.0, 1.0, 0.0, 1.0)
        self._xlabel = ""
        canvas.animate(self.budget_line, self.chosen, self.measured, *self.weight_bars, *self.input_bars)

    def _fit_names(self) -> None:
        """Room for the layer names left of the bars: the front narrows to make it (to 0.36 of
        the figure at least); longer names drop the dotted prefix all names share, then
        characters from their middle."""
        fig, axb = self.canvas.figure, self.ax_bits
        renderer = fig.canvas.get_renderer()
        fig_w = fig.get_size_inches()[0] * fig.dpi
        left = axb.get_position().x0
        room = (left - 0.03 - (0.09 + 0.36)) * fig_w - 6  # pixels the names may take
        labels = axb.get_yticklabels()
        texts = [t.get_text() for t in labels]

        def width(t, text) -> float:
            t.set_text(text)
            return t.get_window_extent(renderer).width

        if any(width(t, text) > room for t, text in zip(labels, texts, strict=True)):
            cut = len(_common_path(self.layers))  # drop what every name shares ("encoder.layers.")
            texts = [("\u2026" + text[cut:]) if cut else text for text in texts]
        for k, t in enumerate(labels):
            name, keep = texts[k], len(texts[k])
            while keep > 4 and width(t, texts[k]) > room:
                keep -= 1
                texts[k] = _elide(name, keep)
        axb.set_yticks(axb.get_yticks(), texts, fontsize=labels[0].get_fontsize() if labels else 8)
        widest = max((width(t, text) for t, text in zip(axb.get_yticklabels(), texts, strict=True)),
                     default=0.0)
        right = min(0.59, left - (widest + 6) / fig_w - 0.03)
        for ax in (self.ax_front, self.ax_curve):
            if ax is not None:
                box = ax.get_position()
                ax.set_position((box.x0, box.y0, right - box.x0, box.height))

    def show_front(self, costs: Sequence[float], sqnr_db: Sequence[float], xlabel: str) -> None:
        """Draw the front's points (infinite SQNR is left out of the line)."""
        xs = np.asarray(costs, dtype=float)
        ys = np.asarray(sqnr_db, dtype=float)
        finite = np.isfinite(ys)
        self.front_line.set_data(xs[finite], ys[finite])
        self.front_dots.set_data(xs[finite], ys[finite])
        self._xlabel = xlabel
        (self.ax_curve or self.ax_front).set_xlabel(xlabel, parse_math=False)
        ylo, yhi = (float(ys[finite].min()), float(ys[finite].max())) if finite.any() else (0.0, 1.0)
        self._front_limits = (float(xs.min()), float(xs.max()), ylo, yhi)
        self._set_limits([], [])
        self.canvas.invalidate()

    def _set_limits(self, px: list, py: list) -> None:
        """Limits covering the front and the given points, each padded by more than a marker."""
        x0, x1, y0, y1 = self._front_limits
        x0, x1 = min([x0, *px]), max([x1, *px])
        y0, y1 = min([y0, *py]), max([y1, *py])
        xpad = X_PAD * (x1 - x0) or max(abs(x0) * 0.05, 0.5)
        ypad = max(1.0, Y_PAD * (y1 - y0))
        self.ax_front.set_xlim(x0 - xpad, x1 + xpad)
        self.ax_front.set_ylim(y0 - ypad, y1 + ypad)

    def show_choice(self, budget: float, cost: float, predicted_db: float | None, *,
                    measured_db: float | None = None, weight_bits: Sequence[int | None] = (),
                    input_bits: Sequence[int | None] | None = None) -> None:
        """The budget line, the chosen plan at (cost, predicted), the measurement, the bars.

        ``predicted_db`` None (a plan with edited grids has no prediction): no dot; +inf: at
        the top of the plot. Widths of None draw no bar (float).
        """
        self.budget_line.set_xdata([budget, budget])
        px, py = [budget, cost], []
        if measured_db is not None and math.isfinite(measured_db):
            py.append(measured_db)
        if predicted_db is not None and math.isfinite(predicted_db):
            py.append(predicted_db)
        self._set_limits(px, py)
        if predicted_db is None or math.isnan(predicted_db):
            self.chosen.set_data([], [])
        else:
            y = predicted_db if math.isfinite(predicted_db) else self.ax_front.get_ylim()[1] - 0.5 * max(
                1.0, Y_PAD * (self._front_limits[3] - self._front_limits[2]))
            self.chosen.set_data([cost], [y])
        if measured_db is None:
            self.measured.set_data([], [])
        else:
            y = measured_db if math.isfinite(measured_db) else self.ax_front.get_ylim()[1]
            self.measured.set_data([cost], [y])
        for bar, b in zip(self.weight_bars, weight_bits, strict=True):
            bar.set_width(b or 0)
        if self.input_bars:
            for bar, b in zip(self.input_bars, input_bits or [None] * len(self.input_bars), strict=True):
                bar.set_width(b or 0)

    def _curve_placeholder(self) -> None:
        ax = self.ax_curve
        ax.set_ylabel("metric")
        ax.set_title("metric along the front: press \"metric curve\"", fontsize=9, parse_math=False)
        ax.grid(alpha=0.3)

    def show_curve(self, costs: Sequence[float], planned: Sequence[float], low: Sequence[float],
                   high: Sequence[float], float_value: float | None, *, label: str = "metric",
                   xlabel: str = "") -> None:
        """The user's metric of the planned model at points along the front, with interval bars
        from ``low`` to ``high``, and the float model's value as a dashed line."""
        if self.ax_curve is None:
            raise ValueError("this figure was made without a curve plot (curve=False)")
        ax = self.ax_curve
        ax.cla()
        x = np.asarray(costs, dtype=float)
        y = np.asarray(planned, dtype=float)
        lo, hi = np.asarray(low, dtype=float), np.asarray(high, dtype=float)
        if len(x):
            err = np.vstack([np.clip(y - lo, 0, None), np.clip(hi - y, 0, None)])
            ax.errorbar(x, y, yerr=err, fmt="o-", color=CHOSEN_COLOR, ms=4, lw=1.2, capsize=3,
                        label="planned (interval)")
        if float_value is not None:
            ax.axhline(float_value, color="#555555", ls="--", lw=1, label="float model")
        ax.set_ylabel(label)
        ax.set_title("metric along the front, on the measurement data", fontsize=9, parse_math=False)
        ax.grid(alpha=0.3)
        if len(x) or float_value is not None:
            ax.legend(loc="lower right", fontsize=7)
        vals = [v for v in [*lo, *hi, *([] if float_value is None else [float_value])] if math.isfinite(v)]
        if vals:
            pad = max(0.1 * (max(vals) - min(vals)), 1e-3 * max(1.0, abs(max(vals))))
            ax.set_ylim(min(vals) - pad, max(vals) + pad)
        self.ax_front.set_xlabel("")
        ax.set_xlabel(xlabel or self._xlabel, parse_math=False)
        self.canvas.invalidate()

    def marker_positions(self) -> dict:
        """Where the chosen-plan dot and the measured diamond are drawn (data units; tests)."""
        out = {}
        for name, line in (("chosen", self.chosen), ("measured", self.measured)):
            xs, ys = line.get_data()
            if len(xs):
                out[name] = (float(xs[0]), float(ys[0]))
        return out

    def marker_boxes_inside(self) -> bool:
        """Whether every shown marker lies wholly inside the front's axes (in pixels)."""
        self.canvas.draw()
        box = self.ax_front.get_window_extent()
        for line in (self.chosen, self.measured):
            xs, ys = line.get_data()
            if not len(xs):
                continue
            cx, cy = self.ax_front.transData.transform((xs[0], ys[0]))
            r = line.get_markersize() / 72 * self.canvas.dpi / 2 + line.get_markeredgewidth()
            if not (box.x0 <= cx - r and cx + r <= box.x1 and box.y0 <= cy - r and cy + r <= box.y1):
                return False
        return True


def _elide(name: str, keep: int) -> str:
    """``name`` cut to ``keep`` characters around an ellipsis in its middle (both ends kept:
    the start and the end of a dotted module path tell layers apart).

    >>> _elide("encoder.layers.3.attention.out_proj", 20)
    'encoder.la….out_proj'
    """
    if len(name) <= keep:
        return name
    head = keep // 2
    return name[:head] + "\u2026" + name[len(name) - (keep - 1 - head):]


def _common_path(names) -> str:
    """The dotted prefix every name shares, up to and including its last dot.

    >>> _common_path(["enc.layers.0.fc", "enc.layers.1.fc"]), _common_path(["a.x", "b.x"])
    ('enc.layers.', '')
    """
    names = [str(n) for n in names]
    if len(names) < 2:
        return ""
    first, last = min(names), max(names)
    k = 0
    while k < min(len(first), len(last)) and first[k] == last[k]:
        k += 1
    return first[:first.rfind(".", 0, k) + 1]
