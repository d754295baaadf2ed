"""The grid explorer's four plots, built once and updated in place (drawing only, no arithmetic).

:class:`ExplorerFigure` owns the matplotlib artists. The explorer computes every number with
the core functions and hands them over in a :class:`PlotData`; this module only moves artists.
Artists that change with the controls are "animated" (blitted over a cached background); axis
limits change only when the view really has to move (a new source or channel, a grid reaching
outside the view, a new bit width), which is when the background is redrawn.
"""

from __future__ import annotations

from dataclasses import dataclass

import matplotlib
import numpy as np
from matplotlib.gridspec import GridSpec
from matplotlib.patches import PathPatch
from matplotlib.path import Path
from matplotlib.ticker import FuncFormatter, NullFormatter, NullLocator

from .canvas import BlitCanvas
from .pixel_image import PixelImage

_RC = {
    "font.size": 8.5,
    "axes.titlesize": 9,
    "axes.labelsize": 8.5,
    "xtick.labelsize": 8,
    "ytick.labelsize": 8,
    "legend.fontsize": 7.5,
    "axes.spines.top": False,
    "axes.spines.right": False,
    # a fixed title position: placing titles above tick labels measures every label, each draw
    "axes.titley": 1.0,
    "axes.titlepad": 5.0,
    "text.parse_math": False,  # every label literal: layer names may hold $, _ or ^
}
GRID_COLOR = "#333333"  # grid points and clip range (dark, so they stand apart from the clipped mass)
HARD_COLOR = "#1f4e9c"
SOFT_COLOR = "#ff7f0e"
SAMPLE_COLOR = "#2ca02c"
CLIP_FILL = "#d62728"
MAX_TICKS = 65  # grid points drawn as ticks; beyond this, every n-th is drawn


def _count_label(v: float, _pos=None) -> str:
    """Tick labels of the log count axis as plain text: 1, 10, 100, 1k, 10k, 100k, 1M, ...

    >>> [_count_label(v) for v in (1, 10, 1000, 2e6, 0.5)]
    ['1', '10', '1k', '2M', '0.5']
    """
    for unit, name in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
        if v >= unit:
            return f"{v / unit:g}{name}"
    return f"{v:g}"


def _two_boxes(a0: float, a1: float, b0: float, b1: float) -> Path:
    """Two full-height boxes, x from ``a0`` to ``a1`` and from ``b0`` to ``b1`` (y 0..1)."""
    box = [(0, 0), (0, 1), (1, 1), (1, 0), (0, 0)]
    verts = [(a0 + (a1 - a0) * x, y) for x, y in box] + [(b0 + (b1 - b0) * x, y) for x, y in box]
    codes = [Path.MOVETO, Path.LINETO, Path.LINETO, Path.LINETO, Path.CLOSEPOLY] * 2
    return Path(verts, codes)


@dataclass
class PlotData:
    """Everything the four plots show for one state of the controls (numpy arrays, floats)."""

    levels: np.ndarray  # grid values of the shown grid (ascending)
    clip: tuple  # (lowest, highest) grid value
    step: float
    map_image: np.ndarray  # (bins, positions) probabilities
    map_extent: tuple  # (x0, x1, k0 - 0.5, k1 + 0.5) in grid steps / codes
    probe_pos: float  # probe position in grid steps
    probe_codes: np.ndarray  # bins of the bars
    probe_probs: np.ndarray  # their probabilities
    curve_x: np.ndarray  # positions of the relaxed expectation
    curve_hard: tuple  # (x, y) vertices of the hard quantizer's line
    curve_expected: np.ndarray
    curve_samples: list  # (x, y) arrays of relaxed samples
    out_x: np.ndarray | None  # float output sample (or error positions for a tensor)
    out_y: np.ndarray | None  # quantized output sample (or error histogram counts); None:
    # the output plot is left as it is (and given its data by update_out)


class ExplorerFigure:
    """Four panels: values and grid; bin probabilities; transfer curve; output (or error).

    >>> from qwidgets.viz.canvas import BlitCanvas
    >>> fig = ExplorerFigure(BlitCanvas(720, 600), has_layer=True)
    >>> len(fig.canvas.figure.axes)
    5
    """

    def __init__(self, canvas: BlitCanvas, has_layer: bool):
        self.canvas = canvas
        canvas.literal = True  # layer names and numbers drawn as written
        self.has_layer = has_layer
        fig = canvas.figure
        with matplotlib.rc_context(_RC):
            gs = GridSpec(2, 3, figure=fig, width_ratios=[1.0, 0.78, 0.22], height_ratios=[1, 1],
                          left=0.105, right=0.985, bottom=0.085, top=0.905, wspace=0.42, hspace=0.42)
            self.ax_hist = fig.add_subplot(gs[0, 0])
            self.ax_map = fig.add_subplot(gs[0, 1])
            self.ax_bars = fig.add_subplot(gs[0, 2])  # same bins as the map; limits set together
            self.ax_curve = fig.add_subplot(gs[1, 0])
            self.ax_out = fig.add_subplot(gs[1, 1:])
            for ax in fig.axes:
                ax.tick_params(labelsize=8)
            self._build_hist()
            self._build_map()
            self._build_curve()
            self._build_out()
        self._view = None
        self.ticks_every = 1
        self.map_codes = None  # (lowest, highest) code the bin map shows
        self._shown: dict = {}  # artist name -> the data it shows (set again only on a change)

    # ------------------------------------------------------------------ construction
    def _build_hist(self):
        ax = self.ax_hist
        ax.set_yscale("log")
        ax.yaxis.set_major_formatter(FuncFormatter(_count_label))  # plain text, no math text
        ax.yaxis.set_minor_formatter(NullFormatter())
        self.hist_patch = ax.stairs([1.0], [0.0, 1.0], fill=True, color="#9db4d6", baseline=0.7,
                                    label="values")
        self.hist_clipped = ax.stairs([0.7], [0.0, 1.0], fill=True, color=CLIP_FILL, alpha=0.7,
                                      baseline=0.7, label="clipped values")
        xform = ax.get_xaxis_transform()
        (self.grid_ticks,) = ax.plot([], [], color=GRID_COLOR, lw=0.8, transform=xform,
                                     label="grid points")
        # the shaded ranges below and above the grid, one patch of two rectangles (one draw)
        self.clip_shade = PathPatch(_two_boxes(0, 0, 0, 0), transform=xform, color=CLIP_FILL,
                                    alpha=0.08, lw=0)
        ax.add_patch(self.clip_shade)
        (self.clip_lines,) = ax.plot([], [], color=GRID_COLOR, lw=1.0, ls="--", transform=xform)
        ax.set_ylabel("count (log scale)")
        self._hist_legend()
        # Numbers live in the readout panel beside the figure: text is the slowest thing to
        # blit (several ms a label), so the plots carry no changing text.
        self.canvas.animate(self.hist_clipped, self.grid_ticks, self.clip_shade, self.clip_lines)

    def _hist_legend(self):
        with matplotlib.rc_context(_RC):
            self._legend()

    def _legend(self):
        self.ax_hist.legend(handles=[self.hist_patch, self.hist_clipped, self.grid_ticks],
                            loc="upper right", frameon=False, handlelength=1.2, fontsize=7.5)

    def _build_map(self):
        ax = self.ax_map
        # Fixed axes limits (0..1 both ways): the bins shown are stretched over the axes, so a
        # new bit width moves no tick and repaints no background; the readout names the codes.
        # drawn by lookup into the pixels, not resampled (see PixelImage): ms less per new map
        self.map_img = PixelImage(ax, origin="lower", cmap="viridis", interpolation="nearest",
                                  extent=(0, 1, 0, 1))
        self.map_img.set_data(np.zeros((2, 2)))
        self.map_img.set_clim(0.0, 1.0)
        self.map_img.set_clip_path(ax.patch)  # (a rectangle: becomes the clip box, as imshow's)
        ax.add_image(self.map_img)
        ax.set_aspect("auto")
        self._map_colours = matplotlib.colormaps["viridis"]  # probabilities 0..1 -> RGBA
        self.map_values = np.zeros((2, 2))
        self.probe_line = ax.axvline(0.0, color="white", lw=1.2, ls="--")
        ax.set_title("Bin probabilities under noise")
        ax.set_xlim(0, 1)
        ax.set_ylim(0, 1)
        ax.xaxis.set_major_locator(NullLocator())
        ax.yaxis.set_major_locator(NullLocator())
        ax.set_xlabel("input position across the grid (dashed: probe)")
        ax.set_ylabel("grid bin, lowest to highest")
        bars = self.ax_bars
        bars.set_ylim(0, 1)
        self.bars = bars.stairs([0.0], [0.0, 1.0], orientation="horizontal", fill=True,
                                color="#3b75af")
        bars.set_xlim(0, 1.05)
        bars.set_xticks([0, 0.5, 1])
        bars.set_xlabel("probability")
        bars.set_title("at probe", fontsize=8)
        bars.yaxis.set_major_locator(NullLocator())  # the map beside it labels the bins
        self.canvas.animate(self.map_img, self.probe_line, self.bars)

    def _build_curve(self):
        ax = self.ax_curve
        (self.identity,) = ax.plot([0, 1], [0, 1], color="#bbbbbb", lw=0.8, label="no quantization")
        # the relaxed samples, one after another in one artist (one marker draw, not three)
        (self.sample_points,) = ax.plot([], [], ls="none", marker=".", ms=2.5, color=SAMPLE_COLOR,
                                        alpha=0.6, label="relaxed samples")
        (self.hard_line,) = ax.plot([], [], color=HARD_COLOR, lw=1.4, label="hard (round to nearest)")
        (self.soft_line,) = ax.plot([], [], color=SOFT_COLOR, lw=1.3, ls="--",
                                    label="relaxed expectation")
        ax.set_title("Transfer curve")
        ax.set_ylabel("quantized value")
        ax.legend(loc="upper left", frameon=False, handlelength=1.6)
        self.canvas.animate(self.sample_points, self.hard_line, self.soft_line)

    def _build_out(self):
        ax = self.ax_out
        if self.has_layer:
            (self.out_identity,) = ax.plot([0, 1], [0, 1], color="#bbbbbb", lw=0.8)
            (self.out_points,) = ax.plot([], [], ls="none", marker=".", ms=2.0, color=HARD_COLOR,
                                         alpha=0.5)
            ax.set_title("Layer output: quantized vs float")
            ax.set_xlabel("float output")
            ax.set_ylabel("output with quantization")
            self.canvas.animate(self.out_points)
        else:
            self.out_points = ax.stairs([0.0], [0.0, 1.0], fill=True, color="#9db4d6")
            ax.set_title("Quantization error of the values")
            ax.set_xlabel("error in grid steps, (quantized - value) / step")
            ax.set_ylabel("share of values")
            ax.set_xlim(-2.5, 2.5)
            self.canvas.animate(self.out_points)
        self.caption = self.canvas.figure.text(0.01, 0.995, "", ha="left", va="top", fontsize=7.0,
                                               color="#333333")

    # ------------------------------------------------------------------ static parts
    def set_values(self, counts: np.ndarray, edges: np.ndarray, what: str, unit_label: str) -> None:
        """The histogram of the shown values (static until the source or channel changes)."""
        self.hist_patch.set_data(np.maximum(counts, 0.7), edges)
        self._counts, self._edges = counts, edges
        ax = self.ax_hist
        ax.set_title(what, fontsize=9)
        ax.set_xlabel(unit_label)
        ax.set_ylim(0.7, max(2.0, float(counts.max())) * 3.0)
        self.ax_curve.set_xlabel(unit_label)
        self.canvas.invalidate(self.ax_hist, self.ax_curve)

    def set_view(self, lo: float, hi: float) -> None:
        """The value range shown by the histogram and the transfer curve."""
        if self._view == (lo, hi):
            return
        self._view = (lo, hi)
        self.ax_hist.set_xlim(lo, hi)
        self.ax_curve.set_xlim(lo, hi)
        self.ax_curve.set_ylim(lo, hi)
        self.identity.set_data([lo, hi], [lo, hi])

    def set_output_range(self, lo: float, hi: float) -> None:
        """Axes of the layer-output scatter (the float output's range; static)."""
        if self.has_layer:
            self.ax_out.set_xlim(lo, hi)
            self.ax_out.set_ylim(lo, hi)
            self.out_identity.set_data([lo, hi], [lo, hi])

    @property
    def view(self):
        return self._view

    def reset_view(self) -> None:
        """Forget the value range shown: the next :meth:`set_view` applies whatever it gets."""
        self._view = None

    # ------------------------------------------------------------------ updates
    def _new(self, name: str, *values) -> bool:
        """Whether ``values`` differ from what artist ``name`` shows; if so they are recorded.

        Artists are given data only when it changed: an unchanged artist stays un-stale, so
        the canvas keeps its pixels (a noise move leaves the histogram and the output alone)."""
        old = self._shown.get(name)
        if old is not None and len(old) == len(values) and all(
                np.array_equal(a, b, equal_nan=True) for a, b in zip(old, values, strict=True)):
            return False
        self._shown[name] = tuple(np.array(v, dtype=float, copy=True) for v in values)
        return True

    def update(self, d: PlotData) -> None:
        """Move every animated artist to the state in ``d`` (those whose data changed)."""
        self._update_hist(d)
        self._update_map(d)
        self._update_curve(d)
        if d.out_x is not None:
            self.update_out(d.out_x, d.out_y)

    def _update_hist(self, d: PlotData):
        lo, hi = d.clip
        v0, v1 = self._view
        centres = 0.5 * (self._edges[:-1] + self._edges[1:])
        outside = (centres < lo - 0.5 * d.step) | (centres > hi + 0.5 * d.step)
        clipped = np.where(outside, np.maximum(self._counts, 0.7), 0.7)
        if self._new("clipped", clipped, self._edges):
            self.hist_clipped.set_data(clipped, self._edges)
        levels = d.levels[(d.levels >= v0) & (d.levels <= v1)]
        every = max(1, int(np.ceil(levels.size / MAX_TICKS)))
        shown = levels[::every]
        xs = np.repeat(shown, 3)
        ys = np.tile([0.0, 0.07, np.nan], shown.size)
        if self._new("ticks", xs, ys):
            self.grid_ticks.set_data(xs, ys)
        if self._new("clip", [v0, v1, lo, hi]):
            self.clip_shade.set_path(_two_boxes(v0, max(v0, lo), min(v1, hi), v1))
            self.clip_lines.set_data([lo, lo, np.nan, hi, hi], [0, 1, np.nan, 0, 1])
        self.ticks_every = every  # 1 in ``every`` grid points drawn (the readout says so)

    def _update_map(self, d: PlotData):
        x0, x1, y0, y1 = d.map_extent  # in grid steps and codes; drawn stretched over 0..1
        self.map_codes = (int(round(y0 + 0.5)), int(round(y1 - 0.5)))
        if self._new("map", d.map_image):
            # coloured here, once per new map: an RGBA image is drawn without the colour
            # mapping matplotlib would repeat on every draw (the map is redrawn under a probe move)
            self.map_values = d.map_image  # the probabilities shown, (bins, positions)
            self.map_img.set_data(self._map_colours(d.map_image, bytes=True))
        px = (d.probe_pos - x0) / (x1 - x0)
        if self._new("probe", [px]):
            self.probe_line.set_xdata([px, px])
        edges = np.append(d.probe_codes - 0.5, d.probe_codes[-1] + 0.5)
        edges = (edges - y0) / (y1 - y0)
        if self._new("bars", d.probe_probs, edges):
            self.bars.set_data(d.probe_probs, edges)

    def _update_curve(self, d: PlotData):
        if self._new("hard", *d.curve_hard):
            self.hard_line.set_data(*d.curve_hard)
        if self._new("soft", d.curve_x, d.curve_expected):
            self.soft_line.set_data(d.curve_x, d.curve_expected)
        xs = np.concatenate([x for x, _ in d.curve_samples]) if d.curve_samples else np.zeros(0)
        ys = np.concatenate([y for _, y in d.curve_samples]) if d.curve_samples else np.zeros(0)
        if self._new("samples", xs, ys):
            self.sample_points.set_data(xs, ys)

    def update_out(self, out_x: np.ndarray, out_y: np.ndarray) -> None:
        """Move the output plot (the layer-output scatter, or the error histogram) only."""
        if not self._new("out", out_x, out_y):
            return
        if self.has_layer:
            self.out_points.set_data(out_x, out_y)
        else:
            self.out_points.set_data(out_y, out_x)
            top = float(out_y.max()) if out_y.size else 1.0
            if self.ax_out.get_ylim()[1] < top or self.ax_out.get_ylim()[1] > 3 * top:
                self.ax_out.set_ylim(0, 1.25 * top)

    def set_caption(self, text: str) -> None:
        """A line of text above the plots (used for saved figures, which have no readout panel)."""
        if self.caption.get_text() != text:
            self.caption.set_text(text)
            self.canvas.invalidate()
