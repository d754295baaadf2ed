"""The budget planner's figure keeps every layer name readable and clear of the front.

Reference: the pixel boxes matplotlib itself reports for the drawn tick labels and axes
(``Text.get_window_extent``, ``Axes.get_window_extent``).
"""

from __future__ import annotations

import pytest

from qwidgets.viz.canvas import BlitCanvas
from qwidgets.viz.planner_figure import MAX_LABELS, PlannerFigure


def _labels_clear_of_the_front(fig: PlannerFigure) -> bool:
    fig.canvas.draw()
    renderer = fig.canvas.figure.canvas.get_renderer()
    front = fig.ax_front.get_window_extent(renderer)
    return all(t.get_window_extent(renderer).x0 > front.x1
               for t in fig.ax_bits.get_yticklabels() if t.get_text())


@pytest.mark.parametrize("curve", [False, True])
@pytest.mark.parametrize("name_length", [4, 22, 60])
def test_layer_names_never_overlap_the_front(name_length, curve):
    names = [f"{i:02d}" + "x" * (name_length - 2) for i in range(12)]
    _check_names(names, curve, name_length <= 22)


def test_long_names_that_differ_in_the_middle_stay_distinct():
    names = [f"encoder.layers.{i}.self_attention.output_projection.linear" for i in range(12)]
    _check_names(names, False, False)


def _check_names(names, curve, whole):
    fig = PlannerFigure(BlitCanvas(760, 330), names, (2, 4, 8), curve=curve)
    fig.show_front([1.0, 2.0, 3.0], [10.0, 20.0, 30.0], "weight storage (KiB)")
    assert _labels_clear_of_the_front(fig)
    shown = [t.get_text() for t in fig.ax_bits.get_yticklabels()]
    if whole:  # names of this length are shown whole
        assert shown == names
    else:  # longer ones: shortened, every piece shown is in the name in order, still distinct
        for s, n in zip(shown, names, strict=True):
            assert len(s) < len(n)
            at = 0
            for piece in filter(None, s.split("\u2026")):
                at = n.index(piece, at) + len(piece)
        assert len(set(shown)) == len(names)
    # the front keeps at least a third of the figure
    assert fig.ax_front.get_position().width >= 0.33


def test_many_layers_show_every_kth_name():
    names = [f"block{i}.conv" for i in range(120)]
    fig = PlannerFigure(BlitCanvas(760, 330), names, (2, 4, 8))
    shown = [t.get_text() for t in fig.ax_bits.get_yticklabels()]
    assert len(shown) <= MAX_LABELS and shown[0] == names[0]
    assert len(fig.weight_bars) == 120  # every layer keeps its bar


@pytest.mark.parametrize("curve", [False, True])
def test_the_weight_input_legend_leaves_the_title_readable(curve):
    # rendered extents (matplotlib's own layout): legend and title apart, both inside the figure
    canvas = BlitCanvas(760, 490 if curve else 350)
    fig = PlannerFigure(canvas, ["a", "b", "c"], (2, 4, 8), inputs=True, curve=curve)
    canvas.render()
    renderer = canvas.figure.canvas.get_renderer()
    title = fig.ax_bits.title.get_window_extent(renderer)
    legend = fig.ax_bits.get_legend().get_window_extent(renderer)
    height = canvas.figure.bbox.height
    assert legend.y1 + 2 <= title.y0, (legend, title)
    assert title.y1 <= height and legend.y0 >= fig.ax_bits.get_window_extent(renderer).y1 - 1
