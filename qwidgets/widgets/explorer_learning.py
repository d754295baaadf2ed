"""Learning runs of the grid explorer: follow the plots, estimate the time left, stop on request.

:class:`LearnRunner` runs :func:`qwidgets.learn_grid` for a :class:`GridExplorer`:

- ``run(steps, lr, options)`` learns in the caller's thread (a script, a notebook cell) and
  redraws the explorer about every :attr:`follow_s` seconds;
- ``start(steps)`` (the learn button, in a kernel) learns in a background thread of the
  widgets' one runner (:class:`~qwidgets.widgets.tasks.TaskRunner`) so the kernel keeps
  answering: the button becomes a stop button, the other controls are disabled, and the
  runner shows the latest grid on the kernel's event loop every :attr:`follow_s`;
- ``stop()`` asks the run to stop after its current step; the best grid so far is kept.

The time left is the median measured step time times the steps left. ``clock`` (seconds, a
callable; default :func:`time.monotonic`) is injectable so tests are deterministic.
"""

from __future__ import annotations

import statistics
import threading
import time

from ..learn.one_grid import LearnResult, learn_grid
from .events import running_loop
from .tasks import TaskRunner

__all__ = ["LearnRunner"]


class LearnRunner:
    follow_s = 0.5  # how often the plots follow a learning run

    def __init__(self, explorer, button, clock=None):
        self.ex = explorer
        self.clock = clock or time.monotonic
        self.running = False
        self.result: LearnResult | None = None
        self._stop = False
        self._lock = threading.Lock()
        self._latest = None
        self.follows = 0  # redraws made while learning (tests)
        self.task = TaskRunner(button, explorer.message, "learn", on_poll=self._show_latest,
                               poll_s=self.follow_s)
        self.progress_box = self.task.box

    # ------------------------------------------------------------------ public
    def run(self, steps: int, lr: float, options: dict) -> LearnResult:
        """Learn now, in this thread; returns the result (the explorer shows its best grid)."""
        self._check()
        self._begin(steps)
        last = [self.clock()]

        def follow():
            now = self.clock()
            if now - last[0] >= self.follow_s:
                last[0] = now
                self._show_latest()

        try:
            result = self._learn(steps, lr, options, follow)
        except BaseException:
            self._end(None)
            raise
        self._end(result)
        return result

    def start(self, steps: int, lr: float = 0.2, options: dict | None = None) -> None:
        """Learn in a background thread (needs a running event loop: a kernel); without one,
        learn now as :meth:`run` does."""
        options = dict(options or {})
        if running_loop() is None:
            self.run(steps, lr, options)
            return
        self._check()
        self._begin(steps)

        def work(_step, _should_stop):
            try:
                return self._learn(steps, lr, options, None)
            except BaseException as exc:  # the start grid comes back, the error is shown
                return exc

        def done(outcome) -> None:
            if isinstance(outcome, BaseException):
                self._end(None)
                self.ex.message.error(outcome, "learn")
            else:
                self._end(outcome)

        self.task.start(work, done)

    def stop(self) -> None:
        """Stop after the current step; the best grid so far is kept."""
        if self.running:
            self._stop = True
            self.task.stop()
            self.ex.controls["learn"].description = "stopping"

    # ------------------------------------------------------------------ internals
    def _check(self) -> None:
        if not self.ex.subject.has_layer:
            raise ValueError("learn needs a layer: the error it minimises is the layer's output "
                             "error (use GridExplorer(layer, data))")
        if self.running:
            raise RuntimeError("a learning run is in progress; stop it first")

    def _begin(self, steps: int) -> None:
        ex = self.ex
        self.running, self._stop, self._latest = True, False, None
        self._steps, self._times = steps, []
        self._start_grid, self._source = ex.state.grid, ex.state.source
        self._start_origin = ex.state.origin()
        ex.message.clear()
        ex.panel.enable(False)
        self.task.progress.layout.visibility = "visible"
        self.task.report(0.0, f"learning {steps} steps")

    def _learn(self, steps, lr, options, follow) -> LearnResult:
        ex = self.ex
        options = dict(options)
        options.setdefault("temperature", ex.state.temperature)
        tick = [self.clock()]

        def callback(step, grid, noise, stats):
            now = self.clock()
            self._times.append(now - tick[0])
            tick[0] = now
            with self._lock:
                self._latest = (step, grid, noise, stats)
            if follow is not None:
                follow()
            return self._stop

        with ex.progress:
            return learn_grid(ex.subject.layer, ex.subject.inputs, self._start_grid,
                              source=self._source, noise_steps=max(ex.state.noise_steps, 0.02),
                              steps=steps, lr=lr, callback=callback, progress=False, **options)

    def _show_latest(self) -> None:
        with self._lock:
            latest = self._latest
        if latest is None:
            return
        step, grid, noise, stats = latest
        ex = self.ex
        ex.state.set_grid(grid, self._source, origin=("learning", None))
        ex.state.noise_steps = noise
        left = self._steps - step
        est = statistics.median(self._times) * left if self._times else 0.0
        self.task.report(step / max(self._steps, 1), f"step {step} of {self._steps}, hard "
                         f"layer-output SQNR {stats.sqnr_db:.2f} dB, about {est:.0f} s left")
        ex._redraw()
        self.follows += 1

    def _end(self, result: LearnResult | None) -> None:
        ex = self.ex
        st = ex.state
        self.running = False
        self.task.progress.layout.visibility = "hidden"
        self.task.status.value = ""
        if result is None:  # failed or interrupted: nothing half-learned is left behind
            st.set_grid(self._start_grid, self._source, origin=self._start_origin)
        else:
            self.result = result
            st.remember_learned(result.grid, self._source, steps=len(result.loss))
            st.noise_steps = result.noise_steps
        ex.panel.enable(True)
        if result is not None:
            ran = len(result.loss)
            stopped = f"stopped after {ran} of {self._steps} steps" if ran < self._steps else \
                f"learned {ran} steps"
            ex._note(f"{stopped}: layer-output SQNR {result.start_stats.sqnr_db:.2f} -> "
                     f"{result.stats.sqnr_db:.2f} dB (best at step {result.best_step}); "
                     f"kept for {result.grid.bits} bits")
        ex._redraw()  # (in a kernel the runner turns the button back last, after the note)
