"""A stand-in for the browser's copy of a control, for tests without a browser.

It follows what the ipywidgets 8 front end (@jupyter-widgets/controls, read from its source)
does with a slider: it keeps its own copy of the state, updated by each message the kernel
sends (one per change, or one per ``hold_sync`` block); after each message the slider view
redraws (noUiSlider) at ``min + round((value - min) / step) * step`` within ``min..max`` (a
log slider in the exponent) and, when that differs from its copy of ``value``, sends the
value it shows back. Those messages reach the kernel only after the kernel's own work, so
they are queued until :meth:`FrontEnd.deliver`. A person's move arrives through
``Widget.set_state`` too: a selection widget sends the option's ``index``, others ``value``.
"""

from __future__ import annotations

import math


def person_sets(control, value) -> None:
    """A person's move, as the browser sends it."""
    if hasattr(control, "_options_labels"):
        values = [v for _, v in control._options_full]
        control.set_state({"index": values.index(value)})
    else:
        control.set_state({"value": value})


class FrontEnd:
    """The browser's copy of ``controls`` (sliders echo what they show; others never echo)."""

    def __init__(self, *controls):
        self.queue: list = []
        self.state: dict = {}
        for c in controls:
            self.state[id(c)] = dict(c.get_state())
            self._patch(c)
            self._redraw(c)  # first drawn

    def _patch(self, c) -> None:
        def send(msg, buffers=None):
            self.state[id(c)].update(msg.get("state", {}))
            self._redraw(c)

        c._send = send

    def _redraw(self, c) -> None:
        s = self.state[id(c)]
        if "step" not in s or "value" not in s or "index" in s or not s.get("continuous_update", True):
            return
        lo, hi, step, v = s["min"], s["max"], s["step"], s["value"]
        base = s.get("base")
        if base is not None:  # FloatLogSlider: the handle sits at the exponent
            e = math.log(v) / math.log(base) if v > 0 else lo
            e = min(max(e, lo), hi)
            e = lo + round((e - lo) / step) * step if step else e
            shown = base ** min(max(e, lo), hi)
        else:
            shown = min(max(v, lo), hi)
            if step:
                shown = min(max(lo + round((shown - lo) / step) * step, lo), hi)
            if isinstance(v, int):
                shown = int(round(shown))
        if shown != v:
            s["value"] = shown
            self.queue.append((c, {"value": shown}))

    def deliver(self) -> int:
        """The kernel reads the messages the browser sent meanwhile; returns how many."""
        n = 0
        while self.queue:
            c, msg = self.queue.pop(0)
            c.set_state(msg)
            n += 1
        return n
