"""TaskRunner: a long computation behind a button that turns into a stop button; the one
background runner of the widgets (the planner's refine and metric curve, the explorer's
learning runs).

A widget callback that runs for seconds blocks the kernel: no other click (not even "stop")
reaches it until it returns. So in a running kernel the work runs in a background thread; the
button becomes "stop" (which asks the work to end after its current step), a progress bar
follows the work, and the widgets are written on the kernel's event loop only: every
``poll_s`` seconds ``on_poll()`` runs there (e.g. to draw the latest state of the work), and
when the work ends its result is handed to ``done`` there too. Without a running event loop
(a script, a test) :meth:`TaskRunner.start` runs the work in the caller's thread, so the
result is there when it returns.

The work is ``work(step, should_stop) -> result``: it calls ``step(fraction, text)`` after each
unit of work and checks ``should_stop()``, returning what it has so far when asked to stop.
"""

from __future__ import annotations

import threading
from collections.abc import Callable

import ipywidgets as widgets

from .events import MessageLine, running_loop

__all__ = ["TaskRunner"]


class TaskRunner:
    """Run ``work`` from ``button``; the button offers to stop while it runs.

    >>> b = widgets.Button(description="curve")
    >>> r = TaskRunner(b, MessageLine(), "metric curve")
    >>> def work(step, should_stop):
    ...     for i in range(3):
    ...         step((i + 1) / 3, f"point {i + 1} of 3")
    ...     return "done"
    >>> results = []
    >>> r.start(work, results.append); results, r.progress.value, b.description
    (['done'], 1.0, 'curve')
    """

    def __init__(self, button: widgets.Button, message: MessageLine, what: str, *,
                 others: Callable[[], list] = list, on_poll: Callable[[], object] | None = None,
                 poll_s: float = 0.25):
        self.button, self.message, self.what = button, message, what
        self.others = others  # controls to disable while the work runs
        self.on_poll, self.poll_s = on_poll, float(poll_s)
        self._fraction, self._text = 0.0, ""
        self.progress = widgets.FloatProgress(value=0.0, min=0.0, max=1.0, description="",
                                              layout=widgets.Layout(width="260px", visibility="hidden"))
        self.status = widgets.Label("")
        self.box = widgets.HBox([self.progress, self.status])
        self._label = (button.description, button.icon, button.button_style)
        self._stop = threading.Event()
        self.thread: threading.Thread | None = None
        self.running = False
        self._disabled: list = []

    def stop(self) -> None:
        """Ask the running work to end after its current step (it keeps what it has)."""
        self._stop.set()
        self.status.value = "stopping after this step ..."

    def _step(self, fraction: float, text: str = "") -> None:
        self._fraction, self._text = min(max(float(fraction), 0.0), 1.0), text
        if self.thread is None:  # in the caller's thread: show it now
            self._show_step()

    def report(self, fraction: float, text: str = "") -> None:
        """Progress of work run outside :meth:`start`'s ``step`` (shown at the next poll)."""
        self._step(fraction, text)

    def _show_step(self) -> None:
        self.progress.value, self.status.value = self._fraction, self._text

    def start(self, work: Callable, done: Callable) -> None:
        """Run ``work`` (in a thread inside a running kernel) and pass its result to ``done``."""
        if self.running:
            raise RuntimeError(f"{self.what} is already running")
        self.running = True
        self._stop.clear()
        self.progress.value = 0.0
        self.progress.layout.visibility = "visible"
        self.button.description, self.button.icon, self.button.button_style = "stop", "stop", "warning"
        self._disabled = [c for c in self.others() if not c.disabled and c is not self.button]
        for c in self._disabled:
            c.disabled = True

        loop = running_loop()
        if loop is None:
            try:
                with self.message.guard(self.what):
                    done(work(self._step, self._stop.is_set))
            finally:
                self._finish()
            return
        outcome: list = []

        def run() -> None:
            try:
                outcome.append(("ok", work(self._step, self._stop.is_set)))
            except BaseException as exc:  # shown on the message line by the poll
                outcome.append(("error", exc))

        def poll() -> None:
            self._show_step()
            if not outcome:
                if self.on_poll is not None:
                    self.message.run(self.what, self.on_poll)
                loop.call_later(self.poll_s, poll)
                return
            kind, value = outcome[0]
            self.thread = None
            try:
                if kind == "ok":
                    self.message.run(self.what, lambda: done(value))
                else:
                    self.message.error(value, self.what)
            finally:
                self._finish()

        self.thread = threading.Thread(target=run, name=f"qwidgets {self.what}", daemon=True)
        self.thread.start()
        loop.call_later(self.poll_s, poll)

    def _finish(self) -> None:
        for c in self._disabled:
            c.disabled = False
        self._disabled = []
        self.button.description, self.button.icon, self.button.button_style = self._label
        self.progress.layout.visibility = "hidden"
        self.status.value = ""
        self.running = False

    def click(self, work: Callable, done: Callable) -> None:
        """The button's handler: start the work, or stop it when it runs."""
        if self.running:
            self.stop()
        else:
            self.start(work, done)
