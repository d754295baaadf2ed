"""TaskRunner: long work behind a button that offers to stop (deterministic: no clocks).

Reference: the work's own record of what it did; the stop is a flag the test sets, and the
test waits for the worker thread with ``join`` instead of timing anything.
"""

from __future__ import annotations

import asyncio
import threading

import ipywidgets as widgets

from qwidgets.widgets.events import MessageLine
from qwidgets.widgets.tasks import TaskRunner


def test_in_a_running_kernel_the_button_becomes_stop_and_stops_after_the_current_step():
    button, other = widgets.Button(description="refine"), widgets.FloatSlider()
    message = MessageLine()
    runner = TaskRunner(button, message, "refine", others=lambda: [button, other])
    started, steps, results = threading.Event(), [], []

    def work(step, should_stop):
        started.set()
        i = 0
        while not should_stop():  # runs until asked to stop
            i += 1
            steps.append(i)
            step(min(i / 1000, 1.0), f"step {i}")
            if i > 100000:
                break
        return f"stopped after {i} steps"

    async def kernel():  # a running event loop, as in a kernel: the work goes to a thread
        runner.click(work, results.append)
        assert started.wait(30)
        assert runner.running and button.description == "stop" and other.disabled
        assert runner.progress.layout.visibility == "visible"
        runner.click(work, results.append)  # the second click stops it
        runner.thread.join(30)
        while runner.running:  # the result is handed over on the event loop
            await asyncio.sleep(0.01)

    asyncio.run(kernel())
    assert results == [f"stopped after {len(steps)} steps"] and len(steps) <= 100000
    assert not runner.running and button.description == "refine" and not other.disabled
    assert not message.is_error


def test_an_error_in_the_work_reaches_the_message_line_and_restores_the_button():
    button = widgets.Button(description="curve")
    message = MessageLine()
    runner = TaskRunner(button, message, "metric curve")

    def work(step, should_stop):
        raise ValueError("metric returned nan")

    runner.start(work, lambda r: None)  # no running loop: runs here
    assert message.is_error and "metric curve failed: ValueError: metric returned nan" in message.text
    assert button.description == "curve" and not runner.running
