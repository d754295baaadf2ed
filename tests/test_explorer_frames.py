"""The explorer's blitted frames: each axes redrawn on its own, kept backgrounds, band-encoded
PNGs, all equal to a whole redraw of the same state."""

from __future__ import annotations

import io

import numpy as np
import pytest
import torch
from matplotlib.backends.backend_agg import FigureCanvasAgg
from PIL import Image
from torch import nn

from qwidgets import GridExplorer


@pytest.fixture(scope="module")
def subject():
    torch.manual_seed(0)
    layer = nn.Conv2d(3, 8, 3)
    with torch.no_grad():
        layer.weight.normal_(0.0, 0.1)
    x = torch.randn(6, 3, 10, 10)
    return layer, x


def redrawn(ex) -> np.ndarray:
    """Reference: a whole redraw (background and every animated artist drawn afresh), on a
    second explorer given the same moves, so the explorer under test keeps its caches."""
    ex.refresh()
    ex.canvas.invalidate()
    return ex.canvas.draw().copy()


def plain_matplotlib(ex) -> np.ndarray:
    """Reference: matplotlib's ordinary draw of the figure, every artist in the draw (no
    blitting at all), on a separate Agg canvas of the same figure."""
    fig = ex.canvas.figure
    animated = fig.findobj(lambda a: a.get_animated())
    own = fig.canvas
    for a in animated:
        a.set_animated(False)
    try:
        agg = FigureCanvasAgg(fig)
        agg.draw()
        out = np.asarray(agg.buffer_rgba()).copy()
    finally:
        fig.set_canvas(own)
        for a in animated:
            a.set_animated(True)
    assert animated  # the explorer's changing artists were among those drawn
    return out


def decoded(png: bytes) -> np.ndarray:
    with Image.open(io.BytesIO(png)) as im:
        return np.asarray(im.convert("RGB"))


MOVES = [
    ("noise", 0.6), ("scale", 1.1), ("offset", 0.3), ("bits", 6), ("temperature", 0.2),
    ("probe", 0.5), ("scale", 0.5), ("bits", 3), ("scale", 7.0), ("scale", 1.0), ("scale", 7.0),
    ("scale", 1.0), ("noise", 0.2), ("bits", 8),
    ("source", "input"), ("bits", 5), ("source", "weight"), ("per_channel", True),
    ("channel", 3), ("scale", 1.2), ("noise", 0.4), ("per_channel", False), ("bits", 4),
]


def move(ex, name, value):
    c = ex.controls
    if name == "scale":
        ex.state.scale = ex.state.fitted_step() * value
    elif name == "offset":
        ex.state.offset = value * float(ex.state.shown_grid().scale)
    elif name == "probe":
        p = c["probe"].positions
        ex.state.probe = p.lo + value * (p.hi - p.lo)
    elif name in ("noise", "temperature"):
        setattr(ex.state, "noise_steps" if name == "noise" else name, value)
    else:
        c[name].value = value


def test_every_blitted_frame_equals_a_whole_redraw_and_its_png(subject):
    """After each control move the frame drawn by blitting (only the changed axes, snapshots
    under moving artists, kept backgrounds) equals, pixel for pixel, a whole redraw of the same
    state; the PNG sent to the browser decodes (Pillow) to exactly that frame; and it is close
    to matplotlib's ordinary draw of the figure (the animated artists drawn on top instead of
    among the static ones: a few pixels where lines cross spines or legends)."""
    layer, x = subject
    ex = GridExplorer(layer, x, bits=4)
    ref = GridExplorer(layer, x, bits=4)
    canvas = ex.canvas
    for name, value in MOVES:
        move(ex, name, value)
        ex.refresh()
        png = canvas.last_png
        frame = canvas.draw().copy()  # nothing changed since the render: the same pixels
        np.testing.assert_array_equal(decoded(png), frame[..., :3], err_msg=name)
        move(ref, name, value)
        np.testing.assert_array_equal(frame, redrawn(ref), err_msg=f"{name} -> {value}")
        plain = plain_matplotlib(ex)
        differ = np.abs(plain.astype(int) - frame.astype(int)).max(axis=2) > 32
        assert differ.mean() < 0.01, (name, differ.mean())
    assert canvas.full_draws == 1 and canvas.partial_draws > 0 and canvas.kept_draws > 0
    assert canvas.blits < 5 * len(MOVES)  # some axes kept their pixels


def test_a_noise_move_redraws_only_the_axes_that_show_noise(subject):
    """Counts of axes blitted (the canvas's counter): noise changes the bin map, the bars at
    the probe and the transfer curve, not the histogram or the layer output; a scale move
    changes all five; a refresh with nothing changed draws nothing and sends the same PNG."""
    layer, x = subject
    ex = GridExplorer(layer, x, bits=4)
    canvas = ex.canvas
    ex.refresh()
    before, png = canvas.blits, canvas.last_png
    ex.refresh()
    assert canvas.blits == before and canvas.last_png == png
    ex.state.noise_steps = 0.7
    ex.refresh()
    assert canvas.blits - before == 3
    before = canvas.blits
    ex.state.scale = ex.grid.scale * 1.05
    ex.refresh()
    assert canvas.blits - before == 5
    assert canvas.full_draws == 1


BACK_AND_FORTH = [
    ("bits", 5), ("bits", 4), ("scale", 1.1), ("bits", 5), ("bits", 4), ("signed", False),
    ("bits", 5), ("signed", True), ("bits", 4), ("offset", 0.3), ("source", "input"), ("bits", 3),
    ("source", "weight"), ("per_channel", True), ("channel", 2), ("bits", 5), ("per_channel", False),
    ("scale", 1.1), ("noise", 0.5), ("bits", 5), ("noise", 0.3), ("bits", 4), ("scale", 1.0),
]


def test_figures_kept_per_grid_equal_a_fresh_measurement_after_moves_back_and_forth(subject):
    """The explorer keeps the figures and plot parts of the grids it showed (moving back to
    a width brings back its grid). After every move of a sequence that returns to grids shown
    before, its readout and its PNG bytes equal those of a second explorer given the same
    moves whose kept numbers are all dropped before each refresh (everything measured
    afresh), and its layer readout equals qwidgets.layer_error for the grid."""
    from qwidgets import layer_error

    layer, x = subject
    ex = GridExplorer(layer, x, bits=4)
    ref = GridExplorer(layer, x, bits=4)
    hits = 0
    for name, value in BACK_AND_FORTH:
        move(ex, name, value)
        kept = len(ex.numbers._caches.get("layer", {}))
        ex.refresh()
        hits += len(ex.numbers._caches.get("layer", {})) == kept  # nothing new measured
        move(ref, name, value)
        ref.numbers._caches.clear()
        ref.numbers._sorted.clear()
        ref.refresh()
        assert ex.readout.value == ref.readout.value, (name, value)
        assert ex.canvas.last_png == ref.canvas.last_png, (name, value)
        kw = {"weight_grid": ex.grid} if ex.source == "weight" else {"input_grid": ex.grid}
        assert ex.layer_stats == layer_error(layer, x, **kw), (name, value)
    assert hits >= 5  # the sequence did go back to grids measured before
