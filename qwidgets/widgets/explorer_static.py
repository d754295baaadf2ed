"""The explorer's static parts: the histogram of the values shown and the value axes' view.

Recomputed only when the source or the channel changes (the histogram) or when the grid's clip
range leaves or dwarfs the view; a mixin of :class:`~qwidgets.widgets.explorer.GridExplorer`.
"""

from __future__ import annotations

import numpy as np
import torch

from .explorer_numbers import ERROR_SAMPLE

HIST_BINS = 160


class ExplorerStatic:
    """Histogram and view placement; uses the explorer's ``state``, ``figure`` and ``subject``."""

    def _select_static(self) -> None:
        """Histogram of the values shown (recomputed only when the source or channel changes)."""
        st = self.state
        v = st.shown_values()
        lo, hi = float(v.min()), float(v.max())
        if hi <= lo:
            lo, hi = lo - 0.5 * max(abs(lo), 1.0), hi + 0.5 * max(abs(hi), 1.0)
        counts = torch.histc(v.float(), bins=HIST_BINS, min=lo, max=hi).double().numpy()
        label = {"weight": "weights", "input": "input values", "values": "values"}[st.source]
        n = v.numel()
        what = (f"Channel {st.channel} of {st.n_channels()}: {n:,} {label}" if st.grid.axis is not None
                else f"All {n:,} {label}")
        unit = {"weight": "weight value", "input": "input value", "values": "value"}[st.source]
        self.figure.set_values(counts, np.linspace(lo, hi, HIST_BINS + 1), what, unit)
        self._data_range = (lo, hi)
        gen = torch.Generator().manual_seed(1)
        self._error_sample = v[torch.randperm(n, generator=gen)[:ERROR_SAMPLE]]
        if self.subject.has_layer:
            ref = self.subject.scatter_x
            pad = 0.05 * (ref.max() - ref.min() + 1e-12)
            self.figure.set_output_range(float(ref.min() - pad), float(ref.max() + pad))
        self.figure.reset_view()
        self._place_view()

    def _place_view(self) -> None:
        """Keep the value axes still unless the grid's clip range leaves (or dwarfs) the view."""
        lo, hi = self._data_range
        width = hi - lo
        g = self.state.shown_grid()
        c_lo, c_hi = g.clip_range
        need_lo = max(min(lo, c_lo - 0.5 * g.scale), lo - 1.5 * width)
        need_hi = min(max(hi, c_hi + 0.5 * g.scale), hi + 1.5 * width)
        view = self.figure.view
        if view is not None:
            inside = view[0] <= need_lo and need_hi <= view[1]
            if inside and (view[1] - view[0]) <= 1.6 * (need_hi - need_lo):
                return
        pad = 0.06 * (need_hi - need_lo)
        self.figure.set_view(need_lo - pad, need_hi + pad)
        self._sync_probe_range()
