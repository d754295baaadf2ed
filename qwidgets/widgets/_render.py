"""Shared rendering for the notebook widgets: matplotlib drawn with Agg into an ``ipywidgets.Image``.

Nothing here needs a front-end extension beyond ipywidgets (no ipympl), so the widgets look the
same in JupyterLab, Notebook 7 and VS Code. The API is small:

``PlotCanvas(width_px, height_px, dpi=100)``
    ``.figure``  a matplotlib ``Figure`` made without pyplot (it never shows itself);
    ``.image``   the ``ipywidgets.Image`` that displays it, its layout width fixed to the pixel
                 width so the browser does not stretch (blur) it;
    ``.animate(*artists)``  artists that change on updates: they are drawn over a cached
                 background (blitting) instead of redrawing the whole figure;
    ``.invalidate(*axes)``  repaint the background of those axes (of the whole figure when none
                 is given) on the next render, after changing a title, ticks, a legend or other
                 non-animated artists; a change of an axes' limits is noticed by itself
                 and repaints only that axes (and any whose labels reach into it);
    ``.render()``  draw and push a PNG to ``.image`` (returns the PNG bytes);
    ``.save(path)``  a full-quality PNG or SVG, by the file's extension;
    ``.renders`` / ``.full_draws`` / ``.partial_draws`` / ``.kept_draws``  counters (tests,
                 benchmarks); the last counts backgrounds reused for limits seen before.
``Coalescer(callback, delay=0.03, on_error=None)``
    ``.request()`` records that an update is due and schedules one ``callback`` call on the
    running event loop (the kernel's); more requests before it runs add nothing, so a burst of
    slider events costs one update and the update sees the latest values. ``.flush()`` runs a
    pending call now. With no running loop (a script, a test) requests wait for ``flush()``.
``MessageLine()``
    ``.widget`` (an ``ipywidgets.HTML``), ``.text``, ``.error(exc, context)``, ``.info(text)``,
    ``.clear()``, ``.run(context, fn)`` and ``.guard(context)``: a context manager that shows an exception raised inside
    it on the line instead of losing it in the kernel's log.
``observe_value(widget, handler)``
    Call ``handler(change)`` when a control's value changes, except when the change is the
    front end echoing, rounded to the control's step, a value the kernel set (see below).
``torch_threads(n)``
    A context manager running torch with ``n`` intra-op threads (None: unchanged), restored
    after: a widget update is many cache-sized slices, which a second thread hardly speeds up
    on an idle machine and stalls several-fold when another process holds the other core.
``encode_png(rgba, compress_level=1) -> bytes``
    Low compression: at notebook sizes it encodes several times faster than the default level
    for a few kilobytes more.

>>> canvas = PlotCanvas(320, 200)
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

import asyncio
import html
import math
import os
import struct
import traceback
import zlib
from collections import OrderedDict
from collections.abc import Callable
from contextlib import contextmanager

import ipywidgets as widgets
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.patches import Rectangle
from matplotlib.transforms import Bbox, IdentityTransform

__all__ = ["PlotCanvas", "Coalescer", "MessageLine", "encode_png", "torch_threads"]

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


class PlotCanvas:
    """A figure rendered with Agg into an ``ipywidgets.Image``, updated in place by blitting.

    >>> c = PlotCanvas(200, 100, dpi=100)
    >>> c.image.layout.width, c.figure.get_size_inches().tolist()
    ('200px', [2.0, 1.0])
    """

    def __init__(self, width_px: int, height_px: int, dpi: int = 100):
        if int(width_px) < 50 or int(height_px) < 50:
            raise ValueError(f"the figure must be at least 50x50 px, got {width_px}x{height_px}")
        self.dpi = int(dpi)
        self.figure = Figure(figsize=(width_px / dpi, height_px / dpi), dpi=dpi, facecolor="white")
        self._canvas = FigureCanvasAgg(self.figure)
        self.image = widgets.Image(
            format="png",
            layout=widgets.Layout(width=f"{int(width_px)}px", height=f"{int(height_px)}px",
                                  flex="0 0 auto"),
        )
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

    def _full_draw(self) -> None:
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

    def _box(self, ax, renderer):
        """An axes' extent with its labels, as last drawn (measured once: text is slow)."""
        return self._boxes[ax]

    def _redraw_axes(self, changed: list) -> bool:
        """Repaint a few axes into the background; False when that would be the whole figure."""
        fig = self.figure
        renderer = self._canvas.get_renderer()
        old = [self._box(ax, renderer) for ax in changed]  # where their old labels were drawn
        for ax in changed:
            self._boxes[ax] = ax.get_tightbbox(renderer)  # where the new ones will be
        region = Bbox.union(old + [self._boxes[ax] for ax in changed])
        todo = set(changed)
        while True:  # grow the region until no other axes comes near it (antialiasing spills)
            near = region.padded(5)
            more = {a for a in fig.axes if a not in todo and self._box(a, renderer).overlaps(near)}
            if not more:
                break
            todo |= more
            region = Bbox.union([region] + [self._box(a, renderer) for a in more])
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
        """Draw, encode as PNG and show it in :attr:`image`; returns the PNG bytes."""
        png = encode_png(self.draw())
        self.renders += 1
        self.last_png = png
        self.image.value = png
        return png

    def save(self, path: str | os.PathLike) -> None:
        """Write the figure as PNG or SVG (by ``path``'s extension), animated artists included."""
        ext = os.path.splitext(os.fspath(path))[1].lower()
        if ext not in (".png", ".svg"):
            raise ValueError(f"path must end in .png or .svg, got {os.fspath(path)!r}")
        for a in self._animated:
            a.set_animated(False)  # a saved figure must contain everything
        try:
            self.figure.savefig(path, dpi=self.dpi, facecolor="white")
        finally:
            for a in self._animated:
                a.set_animated(True)
            self._background = None  # saving re-drew the buffer


@contextmanager
def torch_threads(n: int | None):
    """Run the block with ``torch.set_num_threads(n)``; the previous count is restored after.

    >>> import torch
    >>> before = torch.get_num_threads()
    >>> with torch_threads(1):
    ...     torch.get_num_threads()
    1
    >>> torch.get_num_threads() == before
    True
    """
    if n is None:
        yield
        return
    import torch

    before = torch.get_num_threads()
    if before == n:
        yield
        return
    torch.set_num_threads(n)
    try:
        yield
    finally:
        torch.set_num_threads(before)


def _running_loop():
    try:
        return asyncio.get_running_loop()
    except RuntimeError:
        return None


class Coalescer:
    """Turn many update requests into one call: the latest state wins, no backlog builds.

    >>> calls = []
    >>> c = Coalescer(lambda: calls.append(1))
    >>> for _ in range(200):
    ...     c.request()
    >>> c.flush(), c.flush(), len(calls)
    (True, False, 1)
    """

    def __init__(self, callback: Callable[[], object], delay: float = 0.03,
                 on_error: Callable[[BaseException], object] | None = None):
        if not callable(callback):
            raise TypeError(f"callback must be callable, got {type(callback).__name__}")
        if not delay >= 0:
            raise ValueError(f"delay must be >= 0 seconds, got {delay}")
        self.callback = callback
        self.delay = float(delay)
        self.on_error = on_error
        self.pending = False
        self.requests = 0
        self.calls = 0
        self._handle = None

    def request(self) -> None:
        """Record that an update is due; schedule it once on the running event loop, if any."""
        self.requests += 1
        self.pending = True
        if self._handle is None:
            loop = _running_loop()
            if loop is not None:
                self._handle = loop.call_later(self.delay, self._fire)

    def _fire(self) -> None:
        self._handle = None
        self.flush()

    def cancel(self) -> None:
        """Drop a pending update without running it."""
        if self._handle is not None:
            self._handle.cancel()
            self._handle = None
        self.pending = False

    def flush(self) -> bool:
        """Run the pending update now; return whether one ran."""
        if self._handle is not None:
            self._handle.cancel()
            self._handle = None
        if not self.pending:
            return False
        self.pending = False
        self.calls += 1
        try:
            self.callback()
        except Exception as exc:  # a scheduled call has no caller to raise to
            if self.on_error is None:
                raise
            self.on_error(exc)
        return True


class MessageLine:
    """One line of text under a widget for errors and short notes (``.text`` is the plain text).

    >>> m = MessageLine()
    >>> with m.guard("fit"):
    ...     raise ValueError("bits must be in 1..16, got 0")
    >>> m.text
    'fit failed: ValueError: bits must be in 1..16, got 0'
    """

    def __init__(self):
        self.widget = widgets.HTML(value="", layout=widgets.Layout(min_height="1.5em"))
        self.widget.add_class("qw-message")
        self.text = ""
        self.is_error = False
        self.last_traceback = ""

    def _show(self, text: str, color: str) -> None:
        self.text = text
        self.widget.value = (
            f'<span style="color:{color};font-family:monospace;white-space:pre-wrap">'
            f"{html.escape(text)}</span>"
        )

    def error(self, exc: BaseException, context: str = "update") -> None:
        """Show ``exc`` as ``"<context> failed: <type>: <message>"`` in red."""
        self.is_error = True
        self.last_traceback = "".join(traceback.format_exception(type(exc), exc, exc.__traceback__))
        self._show(f"{context} failed: {type(exc).__name__}: {exc}", "#b00020")

    def info(self, text: str) -> None:
        """Show a short note in a neutral colour."""
        self.is_error = False
        self._show(str(text), "#333333")

    def clear(self) -> None:
        self.is_error = False
        self.text = ""
        self.widget.value = ""

    def run(self, context: str, fn: Callable[[], object]) -> None:
        """Call ``fn()``; an exception is shown on the line (a widget callback has no caller)."""
        with self.guard(context):
            fn()

    @contextmanager
    def guard(self, context: str = "update"):
        """Run a block; an exception inside is shown on the line (and not raised)."""
        try:
            yield
        except Exception as exc:
            self.error(exc, context)


# ------------------------------------------------------------------ slider echoes
_ECHO_HISTORY = 64  # kernel-set values remembered since the last real move
_ECHO_TOL = 1e-3  # in steps: how close an echo is to the front end's rounding of a kernel value


def observe_value(widget, handler: Callable[[dict], object]) -> None:
    """Observe ``widget.value``, ignoring the front end's echoes of values the kernel set.

    A browser shows a slider at its step: given a value between two steps it rounds it and
    sends the rounded value back, often after the kernel has moved on (the sliders follow a
    learning run; a planner has been measured). Taken as a person's move, that echo would
    replace what the kernel computed with a rounded or stale value. A value set exactly on the
    step grid draws no echo, so an echo is recognised as the step rounding of a recent
    *off-grid* value the kernel set: it is ignored (and if it was stale, the control is put back
    to the kernel's latest value). Anything else from the front end is a person's move and
    reaches ``handler``; values set in the kernel (by the widget or a script) always do.
    """
    echoes: list = []  # the front end's roundings of recent off-grid values the kernel set
    latest = [widget.value]  # the kernel's latest value
    restoring = [False]

    def remember(value) -> None:
        snapped = _on_step_grid(widget, value)
        if snapped is not None and not _same_position(widget, value, snapped):
            echoes.append(snapped)
            del echoes[:-_ECHO_HISTORY]

    remember(widget.value)  # the value it was made with echoes too, when first drawn

    def observe(change):
        new = change["new"]
        if restoring[0]:
            return None
        if "value" not in getattr(widget, "_property_lock", {}):  # set in the kernel
            latest[0] = new
            remember(new)
            return handler(change)
        # (no time limit: while a notebook runs all its cells, the kernel reads the front end's
        # messages only after the last cell, long after it set the values they echo)
        if any(_same_position(widget, new, v) for v in echoes):
            if not _same_position(widget, new, _on_step_grid(widget, latest[0])):
                restoring[0] = True  # a stale echo: show the kernel's current value again
                try:
                    widget.value = latest[0]
                finally:
                    restoring[0] = False
            return None
        echoes.clear()  # a person moved it: earlier kernel values can no longer echo
        latest[0] = new
        return handler(change)

    widget.observe(observe, names="value")


def _on_step_grid(widget, v):
    """The value a front end shows for ``v``: rounded to the slider's step (None: no step)."""
    step = getattr(widget, "step", None)
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not step:
        return None
    lo = getattr(widget, "min", 0) or 0
    base = getattr(widget, "base", None)
    if base is not None:  # a log slider steps in the exponent
        if v <= 0:
            return None
        e = math.log(v, base)
        return base ** (lo + round((e - lo) / step) * step)
    return lo + round((v - lo) / step) * step


def _same_position(widget, a, b) -> bool:
    if a is None or b is None:
        return False
    step = widget.step
    base = getattr(widget, "base", None)
    if base is not None:
        if a <= 0 or b <= 0:
            return a == b
        return abs(math.log(a, base) - math.log(b, base)) <= _ECHO_TOL * step
    return abs(a - b) <= _ECHO_TOL * step
