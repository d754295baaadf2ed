"""A note shown by the scan view and the budget planner when BatchNorm after planned layers is
not folded: deployed layers carry the folded weights, whose per-channel ranges differ."""

from __future__ import annotations

import html

import ipywidgets as widgets

from ..model.folding import foldable_batchnorm

__all__ = ["batchnorm_note"]


def batchnorm_note(model, layers, width: int) -> widgets.HTML:
    """An HTML note naming the unfolded BatchNorm layers that follow ``layers`` (empty if none).

    >>> from torch import nn
    >>> net = nn.Sequential(nn.Conv2d(3, 4, 3), nn.BatchNorm2d(4))
    >>> "fold_batchnorm" in batchnorm_note(net, ["0"], 400).value, batchnorm_note(net, [], 400).value
    (True, '')
    """
    pairs = {} if model is None else {bn: layer for bn, layer in foldable_batchnorm(model).items()
                                      if layer in set(layers)}
    note = widgets.HTML(layout=widgets.Layout(width=f"{width}px"))
    note.add_class("qw-batchnorm-note")
    if pairs:
        listed = ", ".join(f"{bn} after {layer}" for bn, layer in sorted(pairs.items()))
        note.value = (
            '<div style="font-size:90%;padding:4px 8px;border-left:3px solid #888">'
            f"Unfolded BatchNorm after planned layers ({html.escape(listed)}): a deployed model "
            "carries it folded into those layers, with other weight ranges. Scan and plan "
            "<code>fold_batchnorm(model)</code> instead.</div>")
    return note
