"""ScanView and BudgetPlanner, driven headless: the numbers shown are the core functions' numbers.

Reference for every displayed figure: the core function computing it (scan, plan_budget,
pareto_front, evaluate_plan, Plan.load), called independently in the test.
"""

from __future__ import annotations

import html
import json

import numpy as np
import pytest
import torch
from torch import nn

from qwidgets.planning.evaluate import evaluate_plan
from qwidgets.planning.plan import CAUTION, Plan
from qwidgets.planning.scanning import scan
from qwidgets.planning.solver import pareto_front, plan_budget
from qwidgets.planning.table import SensitivityTable
from qwidgets.widgets.explorer import GridExplorer
from qwidgets.widgets.planner import BudgetPlanner
from qwidgets.widgets.scanview import ScanView

BITS = (2, 4, 6, 8)


@pytest.fixture(scope="module")
def setup():
    torch.manual_seed(0)
    net = nn.Sequential(nn.Conv1d(1, 4, 5, padding=2), nn.BatchNorm1d(4), nn.ReLU(), nn.Flatten(),
                        nn.Linear(4 * 16, 12), nn.ReLU(), nn.Linear(12, 3)).eval()
    x = torch.randn(48, 1, 16)
    target = torch.arange(48) % 3
    table = scan(net, x, BITS, progress=False)
    return net, x, target, table


def _snapshot(model):
    return ({k: v.clone() for k, v in model.state_dict().items()},
            [(m.training, len(m._forward_hooks), len(m._forward_pre_hooks)) for m in model.modules()])


def _untouched(model, snap) -> bool:
    state, flags = snap
    return all(torch.equal(v, state[k]) for k, v in model.state_dict().items()) and flags == [
        (m.training, len(m._forward_hooks), len(m._forward_pre_hooks)) for m in model.modules()]


def _accuracy(out, t):
    return float((out.argmax(1) == t).float().mean())


# ---------------------------------------------------------------------------- ScanView
def test_scanview_shows_the_scan_and_opens_an_explorer(setup):
    net, x, _, table = setup
    snap = _snapshot(net)
    view = ScanView(net, x, bits=BITS, progress=False)
    assert "qw-scanview" in view._dom_classes
    assert view.canvas.image.value[:4] == b"\x89PNG"
    # the same numbers as an independent scan
    np.testing.assert_array_equal(view.table.sqnr_array("model"), table.sqnr_array("model"))
    assert all(name in view.table_html.value for name in table.layers)
    ax = view.canvas.figure.axes[0]
    cell_texts = [t.get_text() for t in ax.texts]
    assert f"{table.sqnr_db('4', 6):.1f}" in cell_texts
    before = view.canvas.last_png
    view.pick("4", bits=6)
    assert view.canvas.last_png != before  # the row marker moved into view
    assert isinstance(view.explorer, GridExplorer) and view.explorer in view.explorer_box.children
    assert view.explorer.layer_name == "4" and view.explorer.grid.bits == 6
    assert f"{table.sqnr_db('4', 6):.2f}" in view.message.text
    # the button path uses the drop-downs
    view.controls["layer"].value, view.controls["bits"].value = "0", 2
    view.controls["open"].click()
    assert view.explorer.layer_name == "0" and view.explorer.grid.bits == 2
    view.set_scope("layer")
    assert "layer output" in view.canvas.figure.axes[0].get_title()
    assert _untouched(net, snap)


def test_scanview_errors_reach_the_message_line(setup):
    net, x, _, table = setup
    view = ScanView(table)
    assert view.controls["open"].disabled
    with pytest.raises(ValueError, match="layer 'nope' is not in the scan"):
        view.pick("nope")
    with pytest.raises(ValueError, match="bits must be one of the scanned widths"):
        view.pick("0", bits=3)
    view.pick("0", bits=4)
    assert view.explorer is None and "give model= and data=" in view.message.text
    view.message.run("explore", lambda: view.pick("nope"))
    assert view.message.is_error and "layer 'nope' is not in the scan" in view.message.text
    with pytest.raises(TypeError, match="ScanView takes a model and its data"):
        ScanView("table")
    with pytest.raises(TypeError, match="give both model= and data="):
        ScanView(table, model=net)
    with_model = ScanView(table, x, model=net)
    assert with_model.pick("6", 8).explorer.layer_name == "6"


def test_scanview_figure_file(setup, tmp_path):
    _, _, _, table = setup
    view = ScanView(table)
    view.pick("4", 4)
    view.save_figure(tmp_path / "heat.png")
    assert (tmp_path / "heat.png").read_bytes()[:4] == b"\x89PNG"


# ---------------------------------------------------------------------------- BudgetPlanner
def test_planner_plans_equal_plan_budget_for_each_kind(setup):
    net, x, target, table = setup
    snap = _snapshot(net)
    p = BudgetPlanner(net, x, metric=_accuracy, target=target, table=table)
    assert "qw-planner" in p._dom_classes
    assert html.escape(CAUTION) in p.caution.value and "medical devices" in CAUTION
    for kind in ("weight_kib", "mean_bits", "bops"):
        front = pareto_front(table, kind)
        assert p.front(kind) and [c for c, _, _ in p.front(kind)] == [c for c, _, _ in front]
        value = front[len(front) // 3][0]
        p.set_budget(kind, value)
        expect = plan_budget(table, **{kind: value})
        assert p.plan.bits == expect.bits
        assert p.plan.predicted_sqnr_db == expect.predicted_sqnr_db
        assert f"{expect.predicted_sqnr_db:.2f} dB" in p.readout.value
        # the figure shows the chosen plan at its cost and predicted SQNR
        xs, ys = p._chosen.get_data()
        assert ys[0] == pytest.approx(expect.predicted_sqnr_db)
        assert [b.get_width() for b in p._bars] == [expect.bits[n] for n in table.layers]
    assert _untouched(net, snap)


def test_planner_measure_equals_evaluate_plan(setup):
    net, x, target, table = setup
    p = BudgetPlanner(net, x, metric=_accuracy, target=target, table=table)
    p.set_budget("mean_bits", 5.0)
    assert "press measure" in p.readout.value
    p.controls["measure"].click()
    ref = evaluate_plan(net, x, p.plan, metric=_accuracy, target=target)
    assert p.report.measured_sqnr_db == ref.measured_sqnr_db
    assert p.report.metric_planned == ref.metric_planned and p.report.metric_float == ref.metric_float
    assert f"{ref.measured_sqnr_db:.2f} dB" in p.readout.value
    assert list(p._measured.get_data()[1]) == [ref.measured_sqnr_db]


def test_planner_slider_burst_coalesces_to_the_last_value(setup):
    net, x, _, table = setup
    p = BudgetPlanner(net, x, table=table)
    p.set_budget("weight_kib", p.front()[0][0])
    s = p.controls["budget"]
    calls = p._updater.calls
    values = np.linspace(s.min, s.max, 200)
    for v in values:
        s.value = float(v)
    p.refresh()
    assert p._updater.calls - calls == 1  # no running event loop: the burst waits for one flush
    assert p.plan.bits == plan_budget(table, weight_kib=float(values[-1])).bits


def test_planner_saves_and_reports_unwritable_paths(setup, tmp_path):
    net, x, _, table = setup
    p = BudgetPlanner(net, x, table=table)
    p.set_budget("mean_bits", 4.0)
    path = tmp_path / "plans" / "board.json"
    p.controls["path"].value = str(path)
    p.controls["save"].click()  # the folder does not exist yet
    assert p.message.is_error and "does not exist" in p.message.text and not path.exists()
    path.parent.mkdir()
    p.controls["save"].click()
    assert not p.message.is_error and str(path) in p.message.text
    loaded = Plan.load(path)
    assert loaded.bits == p.plan.bits and loaded.fingerprint == table.fingerprint
    assert json.loads(path.read_text())["format"] == "qwidgets plan"
    p.controls["path"].value = "   "
    p.controls["save"].click()
    assert p.message.is_error and "type a file path" in p.message.text
    p.controls["path"].value = str(tmp_path)
    p.controls["save"].click()
    assert p.message.is_error and "it is a folder" in p.message.text


def test_planner_bad_input(setup):
    net, x, _, table = setup
    with pytest.raises(TypeError, match="model must be a torch.nn.Module"):
        BudgetPlanner("net", x)
    with pytest.raises(TypeError, match="metric must be a callable"):
        BudgetPlanner(net, x, table=table, metric="accuracy")
    layer_only = scan(net, x, (4, 8), scope="layer", progress=False)
    with pytest.raises(ValueError, match="no model-scope SQNR"):
        BudgetPlanner(net, x, table=layer_only)
    p = BudgetPlanner(net, x, table=table)
    with pytest.raises(ValueError, match="outside the feasible range"):
        p.set_budget("mean_bits", 1.0)
    with pytest.raises(ValueError, match="kind must be one of"):
        p.set_budget("kib", 3.0)


def test_planner_figure_file(setup, tmp_path):
    net, x, _, table = setup
    p = BudgetPlanner(net, x, table=table)
    p.save_figure(tmp_path / "front.svg")
    assert b"<svg" in (tmp_path / "front.svg").read_bytes()[:400]


def test_synthetic_table_in_planner_needs_no_scan():
    t = SensitivityTable.synthetic(np.array([[5.0, 20.0, 40.0], [8.0, 25.0, 45.0]]), params=[100, 400],
                                   bits=(2, 4, 8))
    net = nn.Linear(1, 1)
    p = BudgetPlanner(net, torch.zeros(1, 1), table=t)
    assert p.plan.bits == plan_budget(t, weight_kib=p.budget).bits
