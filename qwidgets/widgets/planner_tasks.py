"""The budget planner's long tasks: refining the chosen plan, and the metric curve along the front.

Both run behind a button that turns into "stop" (:class:`~qwidgets.widgets.tasks.TaskRunner`),
with a progress bar; both are also plain methods for scripts (:meth:`PlannerTasks.refine`,
:meth:`PlannerTasks.curve`).
"""

from __future__ import annotations

import ipywidgets as widgets

from ..planning.curve import CurvePoint, metric_curve
from ..planning.refining import RefineResult, refine_plan
from .planner_text import KIND_LABELS
from .tasks import TaskRunner

__all__ = ["PlannerTasks"]


class _Stopped(Exception):
    """Raised from the metric curve's progress callback when the user pressed stop."""


class PlannerTasks:
    """"refine" and "metric curve" for :class:`~qwidgets.widgets.planner.BudgetPlanner` (which holds
    ``model``, ``data``, ``plan``, ``report``, ``metric``, ``controls``, ``message``,
    ``figure``, ``measure`` and the held-out data)."""

    refine_steps = 200
    curve_points = 6

    def _build_tasks(self) -> widgets.Widget:
        c = self.controls
        c["refine"] = widgets.Button(description="refine", icon="magic", layout=widgets.Layout(width="110px"),
                                     tooltip="learn every grid of this plan together on the model's output")
        c["curve"] = widgets.Button(description="metric curve", icon="line-chart",
                                    layout=widgets.Layout(width="130px"), disabled=self.metric is None,
                                    tooltip="the metric along the front, with intervals (needs metric=)")
        self.refine_task = TaskRunner(c["refine"], self.message, "refine", others=lambda: list(c.values()))
        self.curve_task = TaskRunner(c["curve"], self.message, "metric curve", others=lambda: list(c.values()))
        for name in ("refine", "curve"):
            c[name].add_class(f"qw-planner-{name}")
        c["refine"].on_click(lambda _b: self.refine_task.click(self._refine_work, self._refine_done))
        c["curve"].on_click(lambda _b: self.curve_task.click(self._curve_work, self._curve_done))
        self.refined: RefineResult | None = None
        self.curve_points_measured: list[CurvePoint] = []
        return widgets.VBox([widgets.HBox([c["refine"], c["curve"]]), self.refine_task.box,
                             self.curve_task.box])

    # ------------------------------------------------------------------ refine
    def refine(self, steps: int | None = None, **options) -> RefineResult:
        """Refine the current plan (:func:`qwidgets.refine_plan` on the planner's data and rules),
        take the refined plan, measure it, and say what changed; returns the result."""
        self._refine_done(self._refine_work(lambda *_: None, lambda: False, steps, **options))
        return self.refined

    def _refine_work(self, step, should_stop, steps: int | None = None, **options):
        if self.plan is None:
            raise ValueError("no plan yet")
        before = self.report if self.report is not None else self.measure()
        steps = self.refine_steps if steps is None else steps

        def callback(i, so_far):
            step(i / max(steps, 1), f"step {i} of {steps}: best {so_far.sqnr_db:.2f} dB")
            return should_stop()

        options.setdefault("rules", self.rules)
        result = refine_plan(self.model, self.data, self.plan, steps=steps, progress=False, inputs=getattr(self, "inputs", None),
                             callback=callback, **options)
        return before, result

    def _refine_done(self, work) -> None:
        before, result = work
        self.refined = result
        self.plan = result.plan
        after = self.measure()  # the chosen point moves to the refined plan's measurement
        text = (f"refined ({result.steps_run} steps{', stopped' if result.stopped else ''}): "
                f"model-output SQNR {result.start_sqnr_db:.2f} -> {result.sqnr_db:.2f} dB on the "
                f"calibration data; {before.measured_sqnr_db:.2f} -> {after.measured_sqnr_db:.2f} dB "
                f"on {self._measured_on()}")
        if after.metric_float is not None:
            text += f"; metric {before.metric_planned:.4g} -> {after.metric_planned:.4g}"
        self.message.info(text)

    # ------------------------------------------------------------------ metric curve
    def curve(self, points: int | None = None, **options) -> list[CurvePoint]:
        """The user's metric along the front (:func:`qwidgets.metric_curve` on the held-out
        data, else the scan's data), drawn under the front with its intervals; returns it."""
        self._curve_done(self._curve_work(lambda *_: None, lambda: False, points, **options))
        return self.curve_points_measured

    def _curve_work(self, step, should_stop, points: int | None = None, **options):
        if self.metric is None:
            raise ValueError("the metric curve needs metric= (and target=) when the planner is made")
        points = self.curve_points if points is None else points
        self._confidence = options.get("confidence", 0.95)
        data, target = (self.eval_data, self.eval_target) if self.eval_data is not None else (self.data, self.target)

        def progress(i, total):
            step(i / total, f"point {i} of {total}")
            if should_stop():
                raise _Stopped

        options.setdefault("rules", self.rules)  # the curve's plans are the planner's front's
        options.setdefault("assumed_input_bits", self.assumed_input_bits)
        try:
            return metric_curve(self.model, data, self.table, metric=self.metric, target=target, inputs=getattr(self, "inputs", None),
                                cost=self.kind, points=points, progress=progress, **options)
        except _Stopped:
            return None

    def _curve_done(self, curve) -> None:
        if curve is None:
            self.message.info("metric curve stopped; nothing drawn")
            return
        self.curve_points_measured = list(curve)
        scale = self._scale
        self.figure.show_curve([p.budget / scale for p in curve],
                               [p.metric_planned for p in curve],
                               [p.metric_float - p.drop_high for p in curve],
                               [p.metric_float - p.drop_low for p in curve],
                               curve[0].metric_float if curve else None, label="metric")
        self.canvas.render()
        self.message.info(f"metric curve: {len(curve)} plans along the front ({KIND_LABELS[self.kind]}), "
                          f"measured on {self._measured_on()}; bars: {100 * self._confidence:g}% intervals")
