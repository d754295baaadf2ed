"""Event plumbing shared by the widgets: coalesced updates, idle steps, the message line.

``Coalescer(callback, delay=0.03, on_error=None)``
    ``.request()`` records that an update is due and schedules one ``callback`` call on the
    running event loop (the kernel's); more requests before it runs add nothing, so a burst of
    slider events costs one update and the update sees the latest values. ``.flush()`` runs a
    pending call now. With no running loop (a script, a test) requests wait for ``flush()``.
``IdleSteps(step, busy, delay)``
    ``.start()``: run ``step()`` while the kernel is idle, one short step at a time, until it
    says it is done or something else waits (the explorer fits other bit widths this way).
``MessageLine()``
    ``.widget`` (an ``ipywidgets.HTML``), ``.text``, ``.error(exc, context)``, ``.info(text)``,
    ``.clear()``, ``.run(context, fn)`` and ``.guard(context)``: a context manager that shows an
    exception raised inside it on the line instead of losing it in the kernel's log.
"""

from __future__ import annotations

import asyncio
import html
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


class IdleSteps:
    """Run ``step()`` while the kernel is idle: ``delay`` seconds after :meth:`start`, then
    again every few milliseconds while it returns True (more to do) and ``busy()`` is False
    (nothing else waits). A new start replaces the one waiting. No running loop: nothing.

    >>> IdleSteps(lambda: True, lambda: False, 0.1).start()  # no running loop here
    """

    def __init__(self, step: Callable[[], bool], busy: Callable[[], bool], delay: float):
        self.step, self.busy, self.delay = step, busy, float(delay)
        self._handle = None

    def start(self) -> None:
        loop = _running_loop()
        if loop is None:
            return
        if self._handle is not None:
            self._handle.cancel()
        self._handle = loop.call_later(self.delay, self._run)

    def _run(self) -> None:
        self._handle = None
        loop = _running_loop()
        if loop is not None and not self.busy() and self.step():
            self._handle = loop.call_later(IDLE_STEP_S, self._run)


IDLE_STEP_S = 0.005  # between idle steps: the loop reads waiting messages in between


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
