"""An opaque image drawn by nearest-neighbour lookup straight into the Agg buffer.

matplotlib draws an ``AxesImage`` by resampling it with its general (affine, filtered)
resampler, then blending the result: about 1-3 ms for the explorer's bin map at 200x200
pixels, every time the map changes. :class:`PixelImage` looks each output pixel's cell up
(32-bit RGBA words: the columns of each cell row, then whole rows; the lookup kept while
the image's shape and place stay) and writes the pixels into the renderer's buffer: about
0.2 ms in all. It does so only where that equals a draw (an Agg renderer, opaque pixels, no
transparency set, nearest interpolation); otherwise, and for other renderers (SVG, PDF), it
draws as matplotlib does. A pixel takes the cell under its centre, as matplotlib's nearest
interpolation does up to ties at cell edges (a pixel row or column there may take the
neighbouring cell).

>>> from qwidgets.viz.canvas import BlitCanvas
>>> c = BlitCanvas(100, 80)
>>> ax = c.figure.add_axes([0, 0, 1, 1])
>>> im = PixelImage(ax, extent=(0, 1, 0, 1), origin="lower", interpolation="nearest")
>>> im.set_data(np.array([[[255, 0, 0, 255], [0, 0, 255, 255]]], np.uint8)); _ = ax.add_image(im)
>>> frame = c.draw()
>>> frame[40, 10].tolist(), frame[40, 90].tolist()  # left half red, right half blue
([255, 0, 0, 255], [0, 0, 255, 255])
"""

from __future__ import annotations

import math

import numpy as np
from matplotlib.image import AxesImage
from matplotlib.transforms import Bbox, TransformedBbox

__all__ = ["PixelImage"]


class PixelImage(AxesImage):
    """An ``AxesImage`` of RGBA uint8 pixels written without resampling on Agg renderers."""

    _lookups: tuple | None = None  # (key, rows, cols) of the last draw

    def _lookup(self, shape: tuple, pixels: tuple, bounds: tuple) -> tuple:
        """(rows, cols): the cell under each pixel's centre of the pixel box ``pixels`` =
        (col0, col1, row0, row1) (rows from the bottom) for an image of ``shape`` cells drawn
        over the display box ``bounds`` (x0, y0, width, height); rows top first, as in the
        buffer. Kept for the next draw at the same place."""
        key = (shape, pixels, bounds, self.origin)
        if self._lookups is not None and self._lookups[0] == key:
            return self._lookups[1:]
        (n_rows, n_cols), (c0, c1, r0, r1), (x0, y0, width, height) = shape, pixels, bounds
        cols = ((np.arange(c0, c1) + 0.5 - x0) / width * n_cols).astype(np.intp)
        rows = ((np.arange(r0, r1) + 0.5 - y0) / height * n_rows).astype(np.intp)
        np.clip(cols, 0, n_cols - 1, out=cols)
        np.clip(rows, 0, n_rows - 1, out=rows)
        if self.origin != "lower":
            rows = n_rows - 1 - rows
        rows = np.ascontiguousarray(rows[::-1])  # the buffer's first row is the top
        self._lookups = (key, rows, cols)
        return rows, cols

    def draw(self, renderer):
        buffer = getattr(renderer, "buffer_rgba", None)
        a = self.get_array()
        if (buffer is None or not self.get_visible() or self.get_alpha() not in (None, 1)
                or self.get_interpolation() not in ("nearest", "none") or a is None
                or a.ndim != 3 or a.shape[2] != 4 or a.dtype != np.uint8 or a.size == 0
                or not self.get_clip_on() or self.get_clip_path() is not None):
            return super().draw(renderer)
        words = np.ascontiguousarray(a).view(np.uint32)[..., 0]  # one RGBA pixel per word
        if not bool((a[..., 3] == 255).all()):  # transparency: blended by matplotlib
            return super().draw(renderer)
        x0, x1, y0, y1 = self.get_extent()
        box = TransformedBbox(Bbox([[x0, y0], [x1, y1]]), self.get_transform())
        clip = self.get_clip_box() or self.axes.bbox
        left, right = max(box.x0, clip.x0), min(box.x1, clip.x1)
        bottom, top = max(box.y0, clip.y0), min(box.y1, clip.y1)
        buf = np.asarray(buffer())
        height = buf.shape[0]
        c0, c1 = max(0, math.floor(left)), min(buf.shape[1], math.ceil(right))
        r0, r1 = max(0, math.floor(bottom)), min(height, math.ceil(top))  # from the bottom
        if c1 <= c0 or r1 <= r0 or box.width <= 0 or box.height <= 0:
            self.stale = False
            return None
        if not buf.flags.c_contiguous:
            return super().draw(renderer)
        rows, cols = self._lookup(words.shape, (c0, c1, r0, r1), box.bounds)
        # columns of each cell row first, then whole rows repeated: two gathers of contiguous
        # runs (an outer-product index would look up every pixel on its own, 10x slower)
        pixels = words.take(cols, axis=1).take(rows, axis=0)
        buf.view(np.uint32)[height - r1:height - r0, c0:c1, 0] = pixels
        self.stale = False
        return None
