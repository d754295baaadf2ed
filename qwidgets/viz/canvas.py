"""Figures drawn with Agg into PNG bytes, updated in place by blitting (no pyplot, no front end).

``BlitCanvas(width_px, height_px, dpi=100)``
    ``.figure``  a matplotlib ``Figure`` made without pyplot (it never shows itself);
    ``.animate(*artists)``  artists that change on updates: they are drawn over a cached
                 background (blitting) instead of redrawing the whole figure;
    ``.forget(*artists)``  stop drawing artists given to ``animate`` (after ``figure.clear()``);
    ``.invalidate(*axes)``  repaint the background of those axes (of the whole figure when none
                 is given) on the next render, after changing a title, ticks, a legend or other
                 non-animated artists; a change of an axes' limits is noticed by itself
                 and repaints only that axes (and any whose labels reach into it);
    ``.render()``  draw and return a PNG (also kept as ``.last_png``);
    ``.save(path)``  a full-quality PNG or SVG, by the file's extension;
    ``.renders`` / ``.full_draws`` / ``.partial_draws`` / ``.kept_draws``  counters (tests,
                 benchmarks); the last counts backgrounds reused for limits seen before.
With ``.literal = True`` every text is drawn as written (``parse_math`` off, tick labels made
during a draw included): layer names and numbers may hold ``$``, ``_`` or ``^``, which math
text would try to parse (and fail on).
``encode_png(rgba, compress_level=1) -> bytes``
    Low compression: at notebook sizes it encodes several times faster than the default level
    for a few kilobytes more.

>>> canvas = BlitCanvas(320, 200)
>>> ax = canvas.figure.add_subplot()
>>> (line,) = ax.plot([0, 1], [0, 1])
>>> canvas.animate(line)
>>> png = canvas.render()
>>> png[:4] == b"\\x89PNG", canvas.full_draws
(True, 1)
>>> line.set_ydata([1, 0]); png = canvas.render(); canvas.full_draws  # blitted, no full draw
1
"""

from __future__ import annotations

import math
import os
import struct
import zlib
from collections import OrderedDict

import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.patches import Rectangle
from matplotlib.text import Text
from matplotlib.transforms import Bbox, IdentityTransform

__all__ = ["BlitCanvas", "encode_png"]


_LITERAL = {"text.parse_math": False}
BACKGROUNDS_KEPT = 8  # drawn backgrounds kept by axes limits (about 1.7 MB each at 720x600)


def encode_png(rgba: np.ndarray, compress_level: int = 1) -> bytes:
    """PNG bytes of an ``(H, W, 4)`` uint8 RGBA buffer (alpha dropped: the figures are opaque).

    Written directly (no row filters, zlib at a low level): for mostly white plots this is
    several times faster than a general-purpose encoder at its default settings.

    >>> encode_png(np.zeros((2, 3, 4), np.uint8))[:4] == b"\\x89PNG"
    True
    """
    arr = np.asarray(rgba)
    if arr.ndim != 3 or arr.shape[2] not in (3, 4) or arr.dtype != np.uint8:
        raise ValueError(f"rgba must be an (H, W, 3 or 4) uint8 array, got {arr.shape} {arr.dtype}")
    if not 0 <= int(compress_level) <= 9:
        raise ValueError(f"compress_level must be in 0..9, got {compress_level}")
    h, w = arr.shape[:2]
    rows = np.empty((h, 1 + 3 * w), np.uint8)
    rows[:, 0] = 0  # filter type "none" for every row
    rows[:, 1:] = arr[..., :3].reshape(h, 3 * w)
    header = struct.pack(">IIBBBBB", w, h, 8, 2, 0, 0, 0)  # 8-bit RGB, no interlace
    return b"".join((
        b"\x89PNG\r\n\x1a\n",
        _png_chunk(b"IHDR", header),
        _png_chunk(b"IDAT", zlib.compress(rows.tobytes(), int(compress_level))),
        _png_chunk(b"IEND", b""),
    ))


def _png_chunk(tag: bytes, data: bytes) -> bytes:
    crc = zlib.crc32(tag + data) & 0xFFFFFFFF
    return struct.pack(">I", len(data)) + tag + data + struct.pack(">I", crc)


class BlitCanvas:
    """A figure rendered with Agg to PNG bytes, updated in place by blitting.

    >>> c = BlitCanvas(200, 100, dpi=100)
    >>> c.size_px, c.figure.get_size_inches().tolist()
    ((200, 100), [2.0, 1.0])
    """

    def __init__(self, width_px: int, height_px: int, dpi: int = 100):
        if int(width_px) < 50 or int(height_px) < 50:
            raise ValueError(f"the figure must be at least 50x50 px, got {width_px}x{height_px}")
        self.dpi = int(dpi)
        self.figure = Figure(figsize=(width_px / dpi, height_px / dpi), dpi=dpi, facecolor="white")
        self._canvas = FigureCanvasAgg(self.figure)
        self.size_px = (int(width_px), int(height_px))
        self._animated: list = []
        self._background = None
        self._drawn_axes: dict = {}
        self._drawn_version = -1
        self._dirty: set = set()
        self._boxes: dict = {}
        self._kept: OrderedDict = OrderedDict()  # axes limits -> (background, label boxes)
        self.kept_draws = 0
        self._version = 0
        self.renders = 0
        self.full_draws = 0
        self.partial_draws = 0
        self.last_png: bytes = b""

    def animate(self, *artists) -> None:
        """Mark artists as changing: they are left out of the cached background, drawn on top."""
        for a in artists:
            a.set_animated(True)
            if a not in self._animated:
                self._animated.append(a)

    def forget(self, *artists) -> None:
        """Stop drawing artists marked by :meth:`animate` (for example after ``figure.clear()``)."""
        self._animated = [a for a in self._animated if a not in artists]

    def invalidate(self, *axes) -> None:
        """Repaint the background on the next :meth:`render`: of the given axes, or of all."""
        if axes:
            self._dirty.update(axes)
        else:
            self._version += 1
        self._kept.clear()  # every kept background holds the old static content

    def _axes_signature(self) -> dict:
        return {ax: tuple(np.round(ax.viewLim.bounds, 12)) for ax in self.figure.axes}

    def draw(self) -> np.ndarray:
        """Bring the Agg buffer up to date and return it as an ``(H, W, 4)`` uint8 array.

        The background (everything not animated: axes, ticks, labels, static artists) is
        cached. When some axes' limits changed, only those axes (and any whose labels overlap
        them) are repainted into it; an :meth:`invalidate` or a new axes repaints everything.
        The last few backgrounds are kept by their axes limits, so going back to a view seen
        before (a slider scrubbed back and forth) costs no drawing at all.
        """
        sig = self._axes_signature()
        if (self._background is None or self._version != self._drawn_version
                or sig.keys() != self._drawn_axes.keys()):
            self._full_draw()
        else:
            changed = [ax for ax, s in sig.items() if self._drawn_axes[ax] != s or ax in self._dirty]
            kept = self._kept.get(tuple(sig.values())) if changed and not self._dirty else None
            if kept is not None:
                self._background, boxes = kept
                self._boxes = dict(boxes)
                self._drawn_axes = sig
                self._kept.move_to_end(tuple(sig.values()))
                self.kept_draws += 1
            self._canvas.restore_region(self._background)
            if changed and kept is None and not self._redraw_axes(changed):
                self._full_draw()
        renderer = self._canvas.get_renderer()
        for a in self._animated:
            if a.get_visible():
                a.draw(renderer)
        return np.asarray(self._canvas.buffer_rgba())

    literal = False  # True: every text drawn as written (no math text)

    def _rc(self):
        return matplotlib.rc_context(_LITERAL if self.literal else {})

    def literal_text(self) -> None:
        """Draw every text of the figure as it is written (no math text), when :attr:`literal`."""
        if not self.literal:
            return
        for t in self.figure.findobj(Text):
            if t.get_parse_math():
                t.set_parse_math(False)

    def _full_draw(self) -> None:
        self.literal_text()
        with self._rc():  # tick labels made during the draw, too
            self._canvas.draw()  # animated artists are skipped here
        renderer = self._canvas.get_renderer()
        # where each axes' labels are now: a later partial repaint must blank these pixels
        self._boxes = {ax: ax.get_tightbbox(renderer) for ax in self.figure.axes}
        self._save_background()
        self.full_draws += 1

    def _save_background(self) -> None:
        self._background = self._canvas.copy_from_bbox(self.figure.bbox)
        self._drawn_axes = self._axes_signature()  # drawing may settle the limits
        self._drawn_version = self._version
        self._dirty.clear()
        self._kept[tuple(self._drawn_axes.values())] = (self._background, dict(self._boxes))
        while len(self._kept) > BACKGROUNDS_KEPT:
            self._kept.popitem(last=False)

    def _redraw_axes(self, changed: list) -> bool:
        """Repaint a few axes into the background; False when that would be the whole figure."""
        with self._rc():
            self.literal_text()
            return self._redraw_axes_literal(changed)

    def _redraw_axes_literal(self, changed: list) -> bool:
        fig = self.figure
        renderer = self._canvas.get_renderer()
        # extents with labels as last drawn (measured once per draw: text is slow)
        old = [self._boxes[ax] for ax in changed]  # where their old labels were drawn
        for ax in changed:
            self._boxes[ax] = ax.get_tightbbox(renderer)  # where the new ones will be
        region = Bbox.union(old + [self._boxes[ax] for ax in changed])
        todo = set(changed)
        while True:  # grow the region until no other axes comes near it (antialiasing spills)
            near = region.padded(5)
            more = {a for a in fig.axes if a not in todo and self._boxes[a].overlaps(near)}
            if not more:
                break
            todo |= more
            region = Bbox.union([region] + [self._boxes[a] for a in more])
        if len(todo) == len(fig.axes):
            return False
        region = region.padded(1)
        x0, y0 = math.floor(region.x0), math.floor(region.y0)
        blank = Rectangle((x0, y0), math.ceil(region.x1) - x0, math.ceil(region.y1) - y0,
                          transform=IdentityTransform(), facecolor=fig.get_facecolor(),
                          edgecolor="none", linewidth=0)
        blank.set_figure(fig)
        blank.draw(renderer)
        for ax in fig.axes:  # in the figure's order, so overlaps stack as in a full draw
            if ax in todo:
                ax.draw(renderer)
        for t in fig.texts:
            if t.get_visible() and not t.get_animated() and t.get_window_extent(renderer).overlaps(region):
                t.draw(renderer)
        self._save_background()
        self.partial_draws += 1
        return True

    def render(self) -> bytes:
        """Draw and encode as PNG; returns the PNG bytes (also kept in :attr:`last_png`)."""
        png = encode_png(self.draw())
        self.renders += 1
        self.last_png = png
        return png

    def save(self, path: str | os.PathLike) -> None:
        """Write the figure as PNG or SVG (by ``path``'s extension), animated artists included."""
        ext = os.path.splitext(os.fspath(path))[1].lower()
        if ext not in (".png", ".svg"):
            raise ValueError(f"path must end in .png or .svg, got {os.fspath(path)!r}")
        for a in self._animated:
            a.set_animated(False)  # a saved figure must contain everything
        self.literal_text()
        try:
            with self._rc():
                self.figure.savefig(path, dpi=self.dpi, facecolor="white")
        finally:
            for a in self._animated:
                a.set_animated(True)
            self._background = None  # saving re-drew the buffer
