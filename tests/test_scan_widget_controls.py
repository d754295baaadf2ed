"""Every control of ScanView and BudgetPlanner, moved as a person would, never shows a failure.

Run on the demo model (qwidgets.demo) and on a second, different model written here (a 2-D
convolutional network with BatchNorm whose layer names hold characters matplotlib would read as
math text). The controls are found from each widget's ``controls`` dict, so a control added
later is moved too; the test fails if one is of a kind it does not know how to move.
"""

from __future__ import annotations

from collections import OrderedDict

import ipywidgets as widgets
import pytest
import torch
from front_end import person_sets
from torch import nn

from qwidgets.widgets.number_control import NumberControl
from qwidgets.widgets.planner import BudgetPlanner
from qwidgets.widgets.scanview import ScanView


def _messages(w) -> list:
    lines = [w.message]
    ex = getattr(w, "explorer", None)
    if ex is not None and hasattr(ex, "message"):
        lines.append(ex.message)
    return lines


def _check(w, what: str) -> None:
    for line in _messages(w):
        assert not line.is_error, f"{what}: {line.text}\n{line.last_traceback}"


# controls whose move is a request for another plan; any other move keeps the plan
ASKS_FOR_A_PLAN = {"budget", "limit", "limit_kind", "refine", "use_grid"}


def _move_all(w, tmp_path, skip=()) -> set:
    """Move each control through its values (buttons clicked), as a browser sends them,
    checking the message lines and that no move changes the plan unless it asked for one."""
    moved = set()
    for name, c in list(w.controls.items()):
        if name in skip:
            continue
        plan = getattr(w, "plan", None)
        if isinstance(c, NumberControl):
            n = c.slider.max
            for pos in (0, n, int(0.37 * n), n // 2):
                c.slider.set_state({"value": pos})
                w.refresh()
                _check(w, f"{name} at position {pos}")
            c.box.set_state({"value": c.fmt(c.positions.value(n // 3))})  # typed
            w.refresh()
            _check(w, f"{name} typed")
        elif isinstance(c, (widgets.ToggleButtons, widgets.Dropdown)):
            values = [v for _, v in c.options] if c.options and isinstance(c.options[0], tuple) else list(c.options)
            for v in values + [values[0]]:
                person_sets(c, v)
                if hasattr(w, "refresh"):
                    w.refresh()
                _check(w, f"{name}={v!r}")
        elif isinstance(c, (widgets.FloatSlider, widgets.IntSlider)):
            lo, hi = c.min, c.max
            for v in (lo, hi, lo + 0.37 * (hi - lo), lo + 0.5 * (hi - lo)):
                c.value = v
                w.refresh()
                _check(w, f"{name}={v!r}")
        elif isinstance(c, widgets.Checkbox):
            for v in (not c.value, c.value):
                c.value = v
                _check(w, f"{name}={v!r}")
        elif isinstance(c, widgets.Text):
            c.value = str(tmp_path / f"{name}.json")
            _check(w, f"{name} typed")
        elif isinstance(c, widgets.Button):
            if c.disabled:
                continue
            c.click()
            if hasattr(w, "refresh"):
                w.refresh()
            _check(w, f"{name} clicked")
        else:
            raise AssertionError(f"do not know how to move control {name!r} ({type(c).__name__})")
        if name not in ASKS_FOR_A_PLAN and plan is not None:
            assert w.plan is plan, f"moving {name} changed the plan"
        moved.add(name)
    return moved


def _math_named_model() -> tuple[nn.Module, torch.Tensor]:
    torch.manual_seed(1)
    net = nn.Sequential(OrderedDict([
        ("conv_$^$", nn.Conv2d(3, 8, 3, padding=1)),
        ("bn", nn.BatchNorm2d(8)),
        ("act", nn.ReLU()),
        ("conv^2", nn.Conv2d(8, 8, 3, stride=2, padding=1)),
        ("act2", nn.ReLU()),
        ("flat", nn.Flatten()),
        ("head_{x}", nn.Linear(8 * 4 * 4, 5)),
    ])).eval()
    return net, torch.randn(24, 3, 8, 8)


class TinyTransformer(nn.Module):
    """A second kind of model, written here: a projection, one encoder layer (attention and a
    feed-forward block), a mean over the sequence and a head."""

    def __init__(self):
        super().__init__()
        self.embed = nn.Linear(6, 16)
        self.encoder = nn.TransformerEncoderLayer(16, 2, dim_feedforward=32, dropout=0.0, batch_first=True)
        self.head = nn.Linear(16, 3)

    def forward(self, x):
        return self.head(self.encoder(self.embed(x)).mean(1))


def _cases():
    from qwidgets.demo import load_demo

    demo = load_demo()
    net, x = _math_named_model()
    torch.manual_seed(2)
    tf, xt = TinyTransformer().eval(), torch.randn(40, 5, 6)
    return {"demo": (demo.model, demo.x_train[:96], demo.x_test[:200], demo.y_test[:200]),
            "conv2d with math-like names": (net, x[:16], x[16:], None),
            "transformer": (tf, xt[:24], xt[24:], None)}


@pytest.fixture(scope="module")
def cases():
    return _cases()


@pytest.mark.parametrize("case", ["demo", "conv2d with math-like names", "transformer"])
def test_every_control_moves_without_a_failure(cases, case, tmp_path):
    from qwidgets.demo import accuracy

    model, x, x_test, y_test = cases[case]
    before = {k: v.clone() for k, v in model.state_dict().items()}
    view = ScanView(model, x, bits=(2, 4, 8), progress=False)
    metric = accuracy if y_test is not None else None
    planner = BudgetPlanner(model, x, table=view.table, metric=metric, eval_data=x_test, eval_target=y_test)
    view.link_planner(planner)
    moved_view = _move_all(view, tmp_path, skip=("use_grid",))
    view.pick(view.table.layers[-1], bits=4)  # an explorer is open: "use grid in plan" works
    moved_view |= _move_all(view, tmp_path, skip=set(view.controls) - {"use_grid"})
    assert moved_view == set(view.controls)
    assert view.planner.plan.layers[view.table.layers[-1]] is not None
    planner.refine_steps, planner.curve_points = 20, 3  # the buttons' long tasks, kept short here
    moved_planner = _move_all(planner, tmp_path)
    # "metric curve" is disabled by design without a metric
    assert moved_planner == set(planner.controls) - ({"curve"} if metric is None else set())
    assert all(torch.equal(v, before[k]) for k, v in model.state_dict().items())
