"""PlotCanvas: a :class:`~qwidgets.viz.canvas.BlitCanvas` shown in an ``ipywidgets.Image``."""

from __future__ import annotations

import ipywidgets as widgets

from ..viz.canvas import BlitCanvas

__all__ = ["PlotCanvas"]


class PlotCanvas(BlitCanvas):
    """A blitted figure whose every render is pushed to :attr:`image`.

    The image's layout width is fixed to the pixel width so the browser does not stretch
    (blur) it.

    >>> c = PlotCanvas(200, 100, dpi=100)
    >>> c.image.layout.width, c.figure.get_size_inches().tolist()
    ('200px', [2.0, 1.0])
    """

    def __init__(self, width_px: int, height_px: int, dpi: int = 100):
        super().__init__(width_px, height_px, dpi)
        self.image = widgets.Image(
            format="png",
            layout=widgets.Layout(width=f"{int(width_px)}px", height=f"{int(height_px)}px",
                                  flex="0 0 auto"),
        )

    def render(self) -> bytes:
        """Draw, encode as PNG and show it in :attr:`image`; returns the PNG bytes."""
        png = super().render()
        self.image.value = png
        return png
