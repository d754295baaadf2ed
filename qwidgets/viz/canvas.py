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
    ``.encode_ahead(*axes)``  draw, and compress the rows no given axes reaches (theirs wait
                 for new data); the next render compresses only the rest;
    ``.render()``  draw and return a PNG (also kept as ``.last_png``); only the bands of
                 rows that changed are compressed again (:class:`~qwidgets.viz.png.FrameEncoder`);
    ``.save(path)``  a full-quality PNG or SVG, by the file's extension;
    ``.renders`` / ``.full_draws`` / ``.partial_draws`` / ``.kept_draws`` / ``.blits``  counters
                 (tests, benchmarks): ``kept_draws`` counts groups of axes whose background
                 was reused for limits seen before, ``blits`` the axes whose animated artists
                 were drawn again.

Each axes is blitted on its own: an axes none of whose animated artists changed (matplotlib's
``stale`` flag, set by every setter) keeps its pixels; one whose first few animated artists
are unchanged (the bin map under a moving probe line) restores a snapshot taken after drawing
them, and draws only the rest. Animated artists must stay inside their axes (clipped to it,
matplotlib's default); any other animated artist makes every frame a whole-figure blit.
Backgrounds are kept per group of axes (an axes with the axes whose labels reach near it), by
their limits: going back to limits seen before restores that group's pixels without drawing.
With ``.literal = True`` every text is drawn as written (``parse_math`` off, tick labels made
during a draw included): layer names and numbers may hold ``$``, ``_`` or ``^``, which math
text would try to parse (and fail on).
``encode_png(rgba, compress_level=1) -> bytes``  (from :mod:`qwidgets.viz.png`)
    Low compression: at notebook sizes it encodes several times faster than the default level
    for a few kilobytes more.

>>> canvas = BlitCanvas(320, 200)
>>> ax = canvas.figure.add_subplot()
>>> (line,) = ax.plot([0, 1], [0, 1])
>>> canvas.animate(line)
>>> png = canvas.render()
>>> png[:4] == b"\\x89PNG", canvas.full_draws
(True, 1)
>>> line.set_ydata([1, 0]); png = canvas.render(); canvas.full_draws, canvas.blits  # blitted
(1, 2)
>>> png = canvas.render(); canvas.blits  # nothing changed: nothing drawn
2
"""

from __future__ import annotations

import math
import os
from collections import OrderedDict

import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import to_rgba
from matplotlib.figure import Figure
from matplotlib.patches import Rectangle
from matplotlib.text import Text
from matplotlib.transforms import Bbox, IdentityTransform

from .png import FrameEncoder, encode_png

__all__ = ["BlitCanvas", "encode_png"]


_LITERAL = {"text.parse_math": False}
BACKGROUNDS_KEPT = 24  # drawn backgrounds of groups of axes kept by their limits (a part of the
# figure each: at most 1.7 MB at 720x600)


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
        self._background = None  # the static pixels (an (H, W, 4) array)
        self._frame_ok = False  # the Agg buffer holds the last frame drawn by draw()
        self._snaps: dict = {}  # axes -> (artists drawn, their pixels over the background)
        self._drawn_axes: dict = {}
        self._drawn_version = -1
        self._dirty: set = set()
        self._boxes: dict = {}
        self._box_at: dict = {}  # (axes, limits) -> label extent drawn with those limits
        self._kept: OrderedDict = OrderedDict()  # group of (axes, limits) -> (rows, cols, pixels)
        self._encoder = FrameEncoder()
        self.kept_draws = 0
        self._version = 0
        self.renders = 0
        self.full_draws = 0
        self.partial_draws = 0
        self.blits = 0
        self.last_png: bytes = b""

    def animate(self, *artists) -> None:
        """Mark artists as changing: they are left out of the cached background, drawn on top."""
        for a in artists:
            a.set_animated(True)
            if a not in self._animated:
                self._animated.append(a)
        self._frame_ok = False

    def forget(self, *artists) -> None:
        """Stop drawing artists marked by :meth:`animate` (for example after ``figure.clear()``)."""
        self._animated = [a for a in self._animated if a not in artists]
        self._frame_ok = False

    def invalidate(self, *axes) -> None:
        """Repaint the background on the next :meth:`render`: of the given axes, or of all."""
        if axes:
            self._dirty.update(axes)
        else:
            self._version += 1
        self._kept.clear()  # every kept background holds the old static content
        self._box_at.clear()

    def _axes_signature(self) -> dict:
        return {ax: tuple(np.round(ax.viewLim.bounds, 12)) for ax in self.figure.axes}

    def _buffer(self) -> np.ndarray:
        return np.asarray(self._canvas.buffer_rgba())

    def draw(self, wait: tuple = ()) -> np.ndarray:
        """Bring the Agg buffer up to date and return it as an ``(H, W, 4)`` uint8 array.

        The background (everything not animated: axes, ticks, labels, static artists) is
        cached. When some axes' limits changed, only those axes (and any whose labels overlap
        them) are repainted into it, or restored from the pixels kept for those limits; an
        :meth:`invalidate` or a new axes repaints everything. Then each axes whose animated
        artists changed is blitted (see the module's notes); the others keep their pixels.
        The animated artists of the axes in ``wait`` are left for the next draw (they are
        about to change).
        """
        sig = self._axes_signature()
        fresh = True  # the buffer holds the background alone
        if (self._background is None or self._version != self._drawn_version
                or sig.keys() != self._drawn_axes.keys()):
            self._full_draw()
        else:
            changed = [ax for ax, s in sig.items() if self._drawn_axes[ax] != s or ax in self._dirty]
            if changed:
                np.copyto(self._buffer(), self._background)
                if not self._redraw_axes(changed, sig):
                    self._full_draw()
            else:
                fresh = False
        if fresh or not self._frame_ok or not self._blit_axes(wait):
            if not fresh:
                np.copyto(self._buffer(), self._background)
            self._snaps.clear()
            renderer = self._canvas.get_renderer()
            for a in self._animated:
                if a.axes in wait:
                    a.stale = True  # drawn by the next draw
                    continue
                if a.get_visible():
                    a.draw(renderer)
                a.stale = False
            self.blits += len({a.axes for a in self._animated if a.axes not in wait})
            self._frame_ok = True
        return self._buffer()

    # ------------------------------------------------------------------ per-axes blitting
    def _groups(self):
        """Animated artists by axes, with each axes' pixel box (rows, cols); None when an
        animated artist is not confined to an axes, or when two axes' boxes touch."""
        groups: dict = {}
        for a in self._animated:
            if a.axes is None or not a.get_clip_on() or a.get_clip_box() is None:
                return None
            groups.setdefault(a.axes, []).append(a)
        h, w = self._background.shape[:2]
        boxes = {}
        for ax in groups:
            x0, y0, x1, y1 = ax.bbox.extents
            c0, c1 = max(0, math.floor(x0) - 1), min(w, math.ceil(x1) + 1)
            r0, r1 = max(0, h - math.ceil(y1) - 1), min(h, h - math.floor(y0) + 1)
            boxes[ax] = (r0, r1, c0, c1)
        spans = sorted(boxes.values())
        for i, (r0, r1, c0, c1) in enumerate(spans):
            for q0, q1, d0, d1 in spans[i + 1:]:
                if q0 < r1 and r0 < q1 and d0 < c1 and c0 < d1:
                    return None
        return groups, boxes

    def _blit_axes(self, wait: tuple = ()) -> bool:
        """Redraw the animated artists of the axes where one changed (but those in ``wait``);
        False: not possible here."""
        found = self._groups()
        if found is None:
            return False
        groups, boxes = found
        renderer = self._canvas.get_renderer()
        buf = self._buffer()
        for ax, arts in groups.items():
            stale = [a.stale for a in arts]
            if not any(stale) or ax in wait:
                continue  # its pixels are those of the last frame
            first = stale.index(True)
            r0, r1, c0, c1 = boxes[ax]
            snap = self._snaps.pop(ax, None)  # kept below only while its artists stay unchanged
            start = 0
            if snap is not None and snap[0] <= first and snap[1].shape == (r1 - r0, c1 - c0, 4):
                start = snap[0]
                buf[r0:r1, c0:c1] = snap[1]
                self._snaps[ax] = snap
            else:
                buf[r0:r1, c0:c1] = self._background[r0:r1, c0:c1]
            # keep the pixels of the unchanged artists; when all are drawn, those of the first
            # (the bin map under a probe line): a move of the later ones starts from them
            keep_at = first if first > start else (1 if start == 0 < len(arts) - 1 else None)
            for i, a in enumerate(arts[start:], start):
                if i == keep_at:
                    self._snaps[ax] = (i, buf[r0:r1, c0:c1].copy())
                if a.get_visible():
                    a.draw(renderer)
                a.stale = False
            self.blits += 1
        return True

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
        self._background = self._buffer().copy()
        self._drawn_axes = self._axes_signature()  # drawing may settle the limits
        self._drawn_version = self._version
        self._dirty.clear()
        self._frame_ok = False
        for ax, box in self._boxes.items():
            self._box_at[(ax, self._drawn_axes[ax])] = box

    def _redraw_axes(self, changed: list, sig: dict) -> bool:
        """Repaint a few axes into the background; False when that would be the whole figure."""
        with self._rc():
            self.literal_text()
            return self._redraw_axes_literal(changed, sig)

    def _redraw_axes_literal(self, changed: list, sig: dict) -> bool:
        fig = self.figure
        renderer = self._canvas.get_renderer()
        # extents with labels as last drawn (measured once per draw: text is slow)
        old = [self._boxes[ax] for ax in changed]  # where their old labels were drawn
        for ax in changed:  # where the new ones will be (known for limits drawn before)
            box = None if ax in self._dirty else self._box_at.get((ax, sig[ax]))
            self._boxes[ax] = box if box is not None else ax.get_tightbbox(renderer)
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
        key = tuple((i, sig[a]) for i, a in enumerate(fig.axes) if a in todo)
        if not self._dirty and self._restore_kept(key, region, todo):
            self._save_background()
            self.kept_draws += 1
            return True
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
        self._keep(key, todo)
        self._save_background()
        self.partial_draws += 1
        return True

    def _pixels(self, box: Bbox) -> tuple:
        """(row0, row1, col0, col1) of a display box, rounded outward, inside the figure."""
        h, w = self._background.shape[:2]
        return (max(0, h - math.ceil(box.y1)), min(h, h - math.floor(box.y0)),
                max(0, math.floor(box.x0)), min(w, math.ceil(box.x1)))

    def _keep(self, key: tuple, todo: set) -> None:
        """Keep the pixels the axes in ``todo`` cover now (labels and antialiasing included)."""
        box = Bbox.union([self._boxes[a] for a in todo]).padded(6)
        r0, r1, c0, c1 = self._pixels(box)
        self._kept[key] = (box, self._buffer()[r0:r1, c0:c1].copy())
        self._kept.move_to_end(key)
        while len(self._kept) > BACKGROUNDS_KEPT:
            self._kept.popitem(last=False)

    def _restore_kept(self, key: tuple, region: Bbox, todo: set) -> bool:
        """Put back the kept pixels of these axes at these limits, if no other axes or figure
        text comes near them now. The old labels' pixels around them are blanked."""
        hit = self._kept.get(key)
        if hit is None:
            return False
        box, pixels = hit
        whole = Bbox.union([box, region.padded(1)])
        near = whole.padded(5)
        renderer = self._canvas.get_renderer()
        if any(self._boxes[a].overlaps(near) for a in self.figure.axes if a not in todo):
            return False
        if any(t.get_visible() and not t.get_animated() and t.get_window_extent(renderer).overlaps(near)
               for t in self.figure.texts):
            return False
        buf = self._buffer()
        r0, r1, c0, c1 = self._pixels(whole)
        buf[r0:r1, c0:c1] = np.round(np.array(to_rgba(self.figure.get_facecolor())) * 255).astype(np.uint8)
        r0, r1, c0, c1 = self._pixels(box)
        buf[r0:r1, c0:c1] = pixels
        self._kept.move_to_end(key)
        return True

    def encode_ahead(self, *axes) -> None:
        """Draw now and compress the rows of the frame that none of ``axes`` reaches: while
        their artists wait for data, the next :meth:`render` compresses only their rows."""
        buf = self.draw(wait=axes)
        h = buf.shape[0]
        spans = []
        for ax in axes:
            y0, y1 = ax.bbox.extents[1], ax.bbox.extents[3]
            spans.append((max(0, h - math.ceil(y1) - 1), min(h, h - math.floor(y0) + 1)))
        if spans:
            self._encoder.prepare(buf, (min(a for a, _ in spans), max(b for _, b in spans)))

    def render(self) -> bytes:
        """Draw and encode as PNG; returns the PNG bytes (also kept in :attr:`last_png`)."""
        png = self._encoder.encode(self.draw())
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
            self._frame_ok = False
