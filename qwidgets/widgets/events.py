"""Event plumbing shared by the widgets: coalesced updates, the message line, echo filtering.

``Coalescer(callback, delay=0.03, on_error=None)``
    ``.request()`` records that an update is due and schedules one ``callback`` call on the
    running event loop (the kernel's); more requests before it runs add nothing, so a burst of
    slider events costs one update and the update sees the latest values. ``.flush()`` runs a
    pending call now. With no running loop (a script, a test) requests wait for ``flush()``.
``MessageLine()``
    ``.widget`` (an ``ipywidgets.HTML``), ``.text``, ``.error(exc, context)``, ``.info(text)``,
    ``.clear()``, ``.run(context, fn)`` and ``.guard(context)``: a context manager that shows an
    exception raised inside it on the line instead of losing it in the kernel's log.
``observe_value(widget, handler)``
    Call ``handler(change)`` when a control's value changes, except when the change is the
    front end echoing, rounded to the control's step, a value the kernel set (see below).
"""

from __future__ import annotations

import asyncio
import html
import math
import traceback
from collections.abc import Callable
from contextlib import contextmanager

import ipywidgets as widgets


def running_loop():
    """The running event loop (a kernel's), or None in a script or a test.

    >>> running_loop() is None
    True
    """
    return _running_loop()


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


_ECHO_HISTORY = 64  # kernel-set values remembered since the last real move


_ECHO_TOL = 1e-3  # in steps: how close an echo is to the front end's rounding of a kernel value


def observe_value(widget, handler: Callable[[dict], object]) -> None:
    """Observe ``widget.value``, ignoring the front end's echoes of values the kernel set.

    A browser shows a slider at its step: given a value between two steps it rounds it and
    sends the rounded value back, often after the kernel has moved on (the sliders follow a
    learning run; a planner has been measured). Taken as a person's move, that echo would
    replace what the kernel computed with a rounded or stale value. A front end also re-sends
    its old value when it redraws a slider whose window (min, max, step) changed. So an echo
    is recognised as a value the kernel set since the last person's move (the step rounding of
    it, for an off-grid value, under the window then shown), or a value off the slider's
    current step grid: it is ignored (and if it was stale, the control is put back to the
    latest value). Values set in the kernel (by the widget or a script) always reach
    ``handler``; a value from the front end (it arrives through ``Widget.set_state``) reaches it
    when it moves the slider to a new position, and a person's move forgets the earlier kernel
    values, which can no longer echo. (The one move lost: a single click landing exactly where
    the kernel put the slider earlier; the slider then shows the kernel's value again.)

    >>> import ipywidgets as widgets
    >>> s = widgets.FloatSlider(min=0, max=1, step=0.1)
    >>> seen = []
    >>> observe_value(s, lambda c: seen.append(c["new"]))
    >>> s.value = 0.123   # set by the kernel, off the step grid
    >>> s.set_state({"value": 0.1})  # the browser's rounded echo of it: ignored
    >>> s.set_state({"value": 0.7})  # a person's move
    >>> seen, s.value
    ([0.123, 0.7], 0.7)
    """
    echoes: list = []  # values the kernel set (off-grid ones as the front end rounds them)
    latest = [widget.value]  # the latest value taken
    restoring = [False]
    from_front = [False]  # True while ipywidgets applies a message from the front end

    # ``Widget.set_state`` is ipywidgets' public entry for state sent by the front end: wrapping
    # it on this instance tells a browser's value from one set in the kernel.
    apply_front = widget.set_state

    def set_state(sync_data):
        from_front[0] = True
        try:
            return apply_front(sync_data)
        finally:
            from_front[0] = False

    widget.set_state = set_state

    def remember(value) -> bool:
        snapped = _on_step_grid(widget, value)
        if snapped is not None and not _same_position(widget, value, snapped):
            echoes.append(snapped)
            del echoes[:-_ECHO_HISTORY]
            return True
        return False

    remember(widget.value)  # the value it was made with echoes too, when first drawn

    def observe(change):
        new = change["new"]
        if restoring[0]:
            return None
        if not from_front[0]:  # set in the kernel (by the widget or a script): always taken
            latest[0] = new
            if not remember(new):  # on the step grid: the front end may still send it back late
                echoes.append(new)  # (it re-sends its old value when it redraws the slider)
                del echoes[:-_ECHO_HISTORY]
            return handler(change)
        # (no time limit: while a notebook runs all its cells, the kernel reads the front end's
        # messages only after the last cell, long after it set the values they echo)
        if any(_same_position(widget, new, v) for v in echoes):
            if not _same_position(widget, new, _on_step_grid(widget, latest[0])):
                restoring[0] = True  # a stale echo: show the latest value again
                try:
                    widget.value = latest[0]
                finally:
                    restoring[0] = False
            return None
        if getattr(widget, "step", None) and _same_position(widget, new, latest[0]):
            return None  # the slider's position did not move: an echo, not a person's move
        snapped = _on_step_grid(widget, new)
        if snapped is not None and not _same_position(widget, new, snapped):
            # off this slider's step grid, so no person put it there: the late echo of a value
            # shown under an earlier min / step (the window moved since). Show the latest again.
            restoring[0] = True
            try:
                widget.value = latest[0]
            finally:
                restoring[0] = False
            return None
        echoes.clear()  # a person moved it: earlier kernel values can no longer echo
        latest[0] = new
        return handler(change)

    def regrid(change):
        # the kernel moved the slider's window: the front end shows the latest value at its
        # rounding under the new min / step, which echoes too
        if not from_front[0] and not restoring[0]:
            remember(latest[0])

    widget.observe(observe, names="value")
    widget.observe(regrid, names=[n for n in ("min", "max", "step") if widget.has_trait(n)])


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
    step = getattr(widget, "step", None)
    if not step or isinstance(a, bool) or not isinstance(a, (int, float)) \
            or not isinstance(b, (int, float)):
        return a == b
    base = getattr(widget, "base", None)
    if base is not None:
        if a <= 0 or b <= 0:
            return a == b
        return abs(math.log(a, base) - math.log(b, base)) <= _ECHO_TOL * step
    return abs(a - b) <= _ECHO_TOL * step
