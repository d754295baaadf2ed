"""The explorer's value axes: the histogram of the values shown and the axes' view.

:class:`ValueAxes` recomputes the histogram only when the source or the channel changes, and
moves the view only when the grid's clip range leaves (or dwarfs) it.
"""

from __future__ import annotations

import numpy as np
import torch

from .explorer_numbers import ERROR_SAMPLE

__all__ = ["ValueAxes", "HIST_BINS"]

HIST_BINS = 160


class ValueAxes:
    """Histogram and view placement of an explorer's ``figure`` for ``subject``'s values."""

    def __init__(self, figure, subject):
        self.figure, self.subject = figure, subject
        self.data_range = (0.0, 1.0)
        self.error_sample = None
        self.shown: tuple | None = None  # (source, channel, granularity, block) the histogram is of

    def select(self, state) -> None:
        """Histogram of the values shown (recomputed only when the source or channel changes)."""
        key = (state.source, state.channel, state.grid.granularity, state.block if state.grid.blocked else 0)
        if key == self.shown:
            return
        self.shown = key
        v = state.shown_values()
        lo, hi = float(v.min()), float(v.max())
        if hi <= lo:
            lo, hi = lo - 0.5 * max(abs(lo), 1.0), hi + 0.5 * max(abs(hi), 1.0)
        counts = torch.histc(v.float(), bins=HIST_BINS, min=lo, max=hi).double().numpy()
        label = {"weight": "weights", "input": "input values", "values": "values"}[state.source]
        n = v.numel()
        what = (f"Channel {state.channel} of {state.n_channels()}: {n:,} {label}"
                if state.grid.axis is not None else f"All {n:,} {label}")
        if state.grid.blocked:
            what = f"Channel {state.channel}, block {state.block}: {n:,} {label}"
        unit = {"weight": "weight value", "input": "input value", "values": "value"}[state.source]
        self.figure.set_values(counts, np.linspace(lo, hi, HIST_BINS + 1), what, unit)
        self.data_range = (lo, hi)
        gen = torch.Generator().manual_seed(1)
        self.error_sample = v[torch.randperm(n, generator=gen)[:ERROR_SAMPLE]]
        if self.subject.has_layer:
            ref = self.subject.scatter_x
            pad = 0.05 * (ref.max() - ref.min() + 1e-12)
            self.figure.set_output_range(float(ref.min() - pad), float(ref.max() + pad))
        self.figure.reset_view()

    def place(self, state) -> bool:
        """Keep the value axes still unless the grid's clip range leaves (or dwarfs) the view;
        returns whether the view moved."""
        lo, hi = self.data_range
        width = hi - lo
        g = state.shown_grid()
        c_lo, c_hi = g.clip_range
        need_lo = max(min(lo, c_lo - 0.5 * g.scale), lo - 1.5 * width)
        need_hi = min(max(hi, c_hi + 0.5 * g.scale), hi + 1.5 * width)
        view = self.figure.view
        if view is not None:
            inside = view[0] <= need_lo and need_hi <= view[1]
            if inside and (view[1] - view[0]) <= 1.6 * (need_hi - need_lo):
                return False
        pad = 0.06 * (need_hi - need_lo)
        self.figure.set_view(need_lo - pad, need_hi + pad)
        return True
