"""Learning runs of the grid explorer: follow the plots, estimate the time left, stop on request.

:class:`LearnRunner` runs :func:`qwidgets.learn_grid` for a :class:`GridExplorer`:

- ``run(steps, lr, options)`` learns in the caller's thread (a script, a notebook cell) and
  redraws the explorer about every :attr:`follow_s` seconds;
- ``start(steps)`` (the learn button, in a kernel) learns in a background thread so the
  kernel keeps answering: the button becomes a stop button, the other controls are disabled,
  and a timer on the kernel's event loop shows the latest grid every :attr:`follow_s`;
- ``stop()`` asks the run to stop after its current step; the best grid so far is kept.

The time left is the median measured step time times the steps left. ``clock`` (seconds, a
callable; default :func:`time.monotonic`) is injectable so tests are deterministic.
"""

from __future__ import annotations

import asyncio
import statistics
import threading
import time

from ..learn.one_grid import LearnResult, learn_grid

__all__ = ["LearnRunner"]


class LearnRunner:
    follow_s = 0.5  # how often the plots follow a learning run

    def __init__(self, explorer, clock=None):
        self.ex = explorer
        self.clock = clock or time.monotonic
        self.running = False
        self.result: LearnResult | None = None
        self._stop = False
        self._lock = threading.Lock()
        self._latest = None
        self._thread = None
        self._outcome = None
        self.follows = 0  # redraws made while learning (tests)

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
        try:
            loop = asyncio.get_running_loop()
        except RuntimeError:
            self.run(steps, lr, options)
            return
        self._check()
        self._begin(steps)
        self._outcome = None

        def work():
            try:
                self._outcome = ("ok", self._learn(steps, lr, options, None))
            except BaseException as exc:  # shown on the message line by the poller
                self._outcome = ("error", exc)

        self._thread = threading.Thread(target=work, name="qwidgets-learn", daemon=True)
        self._thread.start()
        loop.call_later(self.follow_s, self._poll, loop)

    def stop(self) -> None:
        """Stop after the current step; the best grid so far is kept."""
        if self.running:
            self._stop = True
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
        ex.message.clear()
        b = ex.controls["learn"]
        b.description, b.icon, b.button_style = "stop", "stop", "warning"
        b.tooltip = "stop after the current step and keep the best grid so far"
        ex.set_controls_enabled(False)
        ex.progress_box.layout.display = "flex"
        ex.progress_bar.value = 0.0
        ex.progress_label.value = f"learning {steps} steps"

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
        ex.state.set_grid(grid, self._source)
        ex.state.noise_steps = noise
        ex._sync_controls()
        left = self._steps - step
        est = statistics.median(self._times) * left if self._times else 0.0
        ex.progress_bar.value = step / max(self._steps, 1)
        ex.progress_label.value = (f"step {step} of {self._steps}, hard layer-output SQNR "
                                   f"{stats.sqnr_db:.2f} dB, about {est:.0f} s left")
        ex._redraw()
        self.follows += 1

    def _poll(self, loop) -> None:
        if self._outcome is None:
            self.ex.message.run("learn", self._show_latest)
            loop.call_later(self.follow_s, self._poll, loop)
            return
        kind, value = self._outcome
        self._thread = None
        if kind == "ok":
            self.ex.message.run("learn", lambda: self._end(value))
        else:
            self._end(None)
            self.ex.message.error(value, "learn")

    def _end(self, result: LearnResult | None) -> None:
        ex = self.ex
        st = ex.state
        self.running = False
        ex.progress_box.layout.display = "none"
        if result is None:  # failed or interrupted: nothing half-learned is left behind
            st.set_grid(self._start_grid, self._source)
        else:
            self.result = result
            st.remember_learned(result.grid, self._source)
            st.noise_steps = result.noise_steps
        ex.set_controls_enabled(True)
        ex._select_static()
        ex._sync_controls()
        if result is not None:
            ran = len(result.loss)
            stopped = f"stopped after {ran} of {self._steps} steps" if ran < self._steps else \
                f"learned {ran} steps"
            ex._note(f"{stopped}: layer-output SQNR {result.start_stats.sqnr_db:.2f} -> "
                     f"{result.stats.sqnr_db:.2f} dB (best at step {result.best_step}); "
                     f"kept for {result.grid.bits} bits")
        ex._redraw()
        # the button last: a front end that sees "learn" again sees the outcome's note already
        b = ex.controls["learn"]
        b.description, b.icon, b.button_style = "learn", "graduation-cap", ""
        b.tooltip = "learn scale, offset and noise (relaxed quantization)"
