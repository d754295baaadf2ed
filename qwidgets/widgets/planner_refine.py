"""The planner's "refine" button: learn every planned grid together (:func:`qwidgets.refine_plan`)
with a progress bar and a stop button; the plan becomes the refined one and the readout shows
the model-output SQNR (and the metric, when measured) before and after."""

from __future__ import annotations

import html

import ipywidgets as widgets

from .tasks import TaskRunner

__all__ = ["RefineControl"]

REFINE_STEPS = 200


class RefineControl:
    """The refine button and its progress bar, for a BudgetPlanner."""

    def __init__(self, planner, steps: int = REFINE_STEPS):
        self.planner = planner
        self.steps = steps
        self.button = widgets.Button(description="refine", icon="magic", layout=widgets.Layout(width="110px"),
                                     tooltip="learn every planned grid together on the model's output "
                                             "(relaxed quantization); stop keeps the best plan so far")
        self.runner = TaskRunner(self.button, planner.message, "refine",
                                 others=lambda: [c for c in planner.controls.values() if hasattr(c, "disabled")])
        self.button.on_click(lambda _b: planner.message.run("refine", lambda: self.runner.click(self._work, self._done)))
        self.before = None  # (model-output SQNR on the data, report measured before) of the last run
        self.result = None

    def _work(self, step, should_stop):
        from ..planning.refining import refine_plan

        p = self.planner

        def follow(i, so_far) -> bool:
            step(i / max(self.steps, 1), f"step {i} of {self.steps}: {so_far.sqnr_db:.2f} dB "
                                         f"(start {so_far.start_sqnr_db:.2f} dB)")
            return should_stop()

        before = p.report
        result = refine_plan(p.model, p.data, p.plan, steps=self.steps, progress=False, callback=follow)
        return before, result

    def _done(self, outcome) -> None:
        before, result = outcome
        self.before, self.result = before, result
        self.planner.take_refined(result)

    def readout_rows(self) -> list:
        """Readout rows for the last refinement: SQNR on the data and the metric, before and after."""
        if self.result is None:
            return []
        r = self.result
        rows = [("refined", f"model-output SQNR on the scan's data {r.start_sqnr_db:.2f} dB -> {r.sqnr_db:.2f} dB "
                            f"({r.improvement_db:+.2f} dB, best at step {r.best_step}"
                            f"{', stopped early' if r.stopped else ''})")]
        after = self.planner.report
        if self.before is not None and after is not None and after.metric_planned is not None \
                and self.before.metric_planned is not None:
            rows.append(("metric before / after", f"{self.before.metric_planned:.4g} -> {after.metric_planned:.4g}"))
        return rows


def rows_html(rows: list) -> str:
    return "".join(f"<tr><td style='padding-right:12px;color:#555'>{html.escape(k)}</td>"
                   f"<td><b>{html.escape(v)}</b></td></tr>" for k, v in rows)
