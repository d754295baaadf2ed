"""ScanView and BudgetPlanner, driven headless: the numbers shown are the core functions' numbers.

Reference for every displayed figure: the core function computing it (scan, plan_budget,
pareto_front, evaluate_plan, Plan.load), called independently in the test.
"""

from __future__ import annotations

import html
import json
import re

import numpy as np
import pytest
import torch
from front_end import person_sets
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
    # the view shows what the core scan computes (a second call of scan is the reference for the
    # display; scan itself is checked against a naive loop in test_scan.py)
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
    for kind in ("model_kib", "mean_bits", "bops"):
        front = pareto_front(table, kind)
        assert p.front(kind) and [c for c, _, _ in p.front(kind)] == [c for c, _, _ in front]
        value = front[len(front) // 3][0]
        p.set_budget(kind, value)
        expect = plan_budget(table, **{kind: value})
        assert p.plan.bits == expect.bits
        assert p.plan.predicted_sqnr_db == expect.predicted_sqnr_db
        assert f"{expect.predicted_sqnr_db:.2f} dB" in p.readout.value
        # the figure shows the chosen plan at its cost and predicted SQNR
        xs, ys = p.figure.chosen.get_data()
        assert ys[0] == pytest.approx(expect.predicted_sqnr_db)
        assert [b.get_width() for b in p.figure.weight_bars] == [expect.bits[n] for n in table.layers]
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
    assert list(p.figure.measured.get_data()[1]) == [ref.measured_sqnr_db]


def test_planner_slider_burst_coalesces_to_the_last_value(setup):
    net, x, _, table = setup
    p = BudgetPlanner(net, x, table=table)
    p.set_budget("model_kib", p.front()[0][0])
    s = p.controls["budget"].slider
    calls = p._updater.calls
    for pos in range(0, s.max + 1):  # a drag over every position, as a browser sends it
        s.set_state({"value": pos})
    p.refresh()
    assert p._updater.calls - calls == 1  # no running event loop: the burst waits for one flush
    assert p.plan.bits == plan_budget(table, model_kib=p.state.budget).bits
    assert p.state.budget == p.controls["budget"].positions.value(s.max)


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
    assert p.plan.bits == plan_budget(t, model_kib=p.budget).bits


# ---------------------------------------------------------------------------- issue-10 behaviour
def _pixel(canvas, ax, x, y):
    """The rendered RGB at data point (x, y) of ``ax`` (read from the PNG's pixel buffer)."""
    rgba = canvas.draw()
    px, py = ax.transData.transform((x, y))
    return tuple(int(v) for v in rgba[int(round(canvas.size_px[1] - py)), int(round(px)), :3])


def test_scanview_scope_switches_table_and_heatmap_with_one_colour_scale(setup):
    net, x, _, table = setup
    view = ScanView(table)
    for scope in ("layer", "model"):
        view.controls["scope"].value = scope  # the toggle, as a click sets it
        arr = table.sqnr_array(scope)
        ax = view.canvas.figure.axes[0]
        assert f"{scope} output SQNR" in ax.get_title()
        # the table shows this scope's numbers and header
        assert f"{scope.capitalize()}-output SQNR" in view.table_html.value
        cells = re.findall(r'<td style="background:(#[0-9a-f]{6});color:#[0-9a-f]{6};text-align:right">'
                           r"([^<]*)</td>", view.table_html.value)
        assert [v for _, v in cells] == [("exact" if np.isposinf(v) else f"{v:.1f}") for v in arr.ravel()]
        # reference: the pixels the heatmap really drew, left of each cell's centre (off its text)
        for (bg, _), (i, j) in zip(cells, np.ndindex(arr.shape), strict=True):
            want = tuple(int(bg[k:k + 2], 16) for k in (1, 3, 5))
            got = _pixel(view.canvas, ax, j - 0.38, i)
            assert max(abs(a - b) for a, b in zip(got, want, strict=True)) <= 3, (scope, i, j, got, want)


def test_scanview_says_where_the_model_scope_was_estimated(setup):
    net, x, _, table = setup
    gain = scan(net, x, BITS, progress=False, estimate="gain")
    # the widgets scan with the same options: estimate and batch_size reach scan
    for made in (ScanView(net, x, bits=BITS, progress=False, estimate="gain", batch_size=16).table,
                 BudgetPlanner(net, x, bits=BITS, progress=False, estimate="gain", batch_size=16).table):
        assert made.estimate == "gain" and made.n_samples == len(x)
        np.testing.assert_allclose(made.sqnr_array("model"), gain.sqnr_array("model"), atol=1e-4)
    for t, says in ((table, False), (gain, True)):
        view = ScanView(t)
        for scope in ("model", "layer"):  # only the model scope is estimated
            view.controls["scope"].value = scope
            shown = ("estimated" in view.canvas.figure.axes[0].get_title(),
                     "estimated" in view.table_html.value)
            assert shown == (says and scope == "model",) * 2, (t.estimate, scope)


def test_planner_kind_switch_keeps_the_plan(setup):
    net, x, _, table = setup
    p = BudgetPlanner(net, x, table=table)
    p.set_budget("model_kib", p.front()[len(p.front()) // 2][0])
    plan = p.plan
    p.controls["kind"].value = "bops"
    assert p.plan is plan and p.kind == "bops"
    # BOPs = MACs x weight bits x input bits (common practice), summed by hand here
    bops = sum(table.macs(n) * plan.bits[n] * 8 for n in plan.layers)
    assert p.budget == bops
    # the slider shows the nearest position (1 % apart), the box the exact budget
    assert p.controls["budget"].positions.value(p.controls["budget"].slider.value) == pytest.approx(bops, rel=0.006)
    assert p.controls["budget"].box.value == f"{bops:,}"
    assert "kept the plan" in p.message.text
    p.controls["kind"].value = "mean_bits"
    assert p.plan is plan
    weights = {n: table.params(n) for n in plan.layers}
    # stored bits per weight: codes plus a float32 scale and an int32 zero point per channel
    stored = sum(weights[n] * plan.bits[n] + 64 * table.weight_channels(n) for n in plan.layers)
    assert p.budget == pytest.approx(stored / sum(weights.values()))


def test_planner_keyboard_step_is_about_one_percent(setup):
    net, x, _, table = setup
    p = BudgetPlanner(net, x, table=table)
    for kind in ("model_kib", "mean_bits", "bops"):
        p.controls["kind"].value = kind
        pos = p.controls["budget"].positions
        assert pos.value(1) / pos.value(0) == pytest.approx(1.01, abs=1e-3), kind  # one key: 1 %
        assert pos.lo == p.front(kind)[0][0] and pos.hi == p.front(kind)[-1][0]


def test_planner_markers_stay_inside_the_plot(setup):
    net, x, target, table = setup
    p = BudgetPlanner(net, x, table=table)
    for kind in ("model_kib", "bops"):
        front = p.front(kind)
        for value in (front[0][0], front[-1][0]):  # the two ends, where markers used to be cut
            p.set_budget(kind, value)
            p.measure()
            pos = p.figure.marker_positions()
            assert set(pos) == {"chosen", "measured"}
            assert p.figure.marker_boxes_inside(), (kind, value)


def test_planner_save_never_overwrites_silently(setup, tmp_path):
    net, x, _, table = setup
    p = BudgetPlanner(net, x, table=table)
    path = tmp_path / "plan.json"
    path.write_text("the user's own file")
    p.controls["path"].value = str(path)
    p.controls["save"].click()
    assert path.read_text() == "the user's own file"
    numbered = tmp_path / "plan-1.json"
    assert Plan.load(numbered).bits == p.plan.bits
    assert str(numbered) in p.message.text and "left as it was" in p.message.text
    p.controls["save"].click()
    assert (tmp_path / "plan-2.json").exists() and path.read_text() == "the user's own file"
    p.controls["overwrite"].value = True
    assert p.message.text == ""  # the note was about the last save
    p.controls["save"].click()
    assert Plan.load(path).bits == p.plan.bits and "replaced" in p.message.text


def test_planner_notes_clear_when_the_plan_changes(setup):
    net, x, target, table = setup
    p = BudgetPlanner(net, x, table=table)
    p.measure()
    assert p.message.text.startswith("measured:")
    s = p.controls["budget"].slider
    s.set_state({"value": int(0.3 * s.max)})  # a person's move
    p.refresh()
    assert p.message.text == "" and p.report is None and "press measure" in p.readout.value


def test_planner_measures_on_held_out_data(setup):
    net, x, target, table = setup
    x_test, y_test = torch.randn(30, 1, 16), torch.arange(30) % 3
    p = BudgetPlanner(net, x, table=table, metric=_accuracy, target=target, eval_data=x_test, eval_target=y_test)
    p.measure()
    ref = evaluate_plan(net, x_test, p.plan, metric=_accuracy, target=y_test)
    assert p.report.measured_sqnr_db == ref.measured_sqnr_db and p.report.metric_planned == ref.metric_planned
    assert "held-out" in p.readout.value and "held-out" in p.message.text
    with pytest.raises(ValueError, match="eval_target needs eval_data"):
        BudgetPlanner(net, x, table=table, eval_target=y_test)


def test_explorer_grid_reaches_the_planner_plan(setup):
    net, x, _, table = setup
    p = BudgetPlanner(net, x, table=table)
    view = ScanView(table, x, model=net)
    assert view.controls["use_grid"].disabled and p.controls["use_grid"].disabled
    view.link_planner(p)
    assert view.controls["use_grid"].disabled  # no explorer open yet
    layer = next(iter(p.plan.layers))
    view.pick(layer, bits=p.plan.bits[layer])
    assert not view.controls["use_grid"].disabled and not p.controls["use_grid"].disabled
    ex = view.explorer
    grid = ex.to_setting("weight").weight
    view.controls["use_grid"].click()
    assert not view.message.is_error, view.message.text
    got = p.plan.layers[layer].weight
    assert torch.equal(torch.as_tensor(got.scale), torch.as_tensor(grid.scale)) and got.bits == grid.bits
    assert p.plan.predicted_sqnr_db is None and p.report is not None  # measured at once
    assert "learned grid" in p.table_html.value
    # reference: evaluate_plan of the plan with that setting, made here
    assert p.report.measured_sqnr_db == evaluate_plan(net, x, p.plan).measured_sqnr_db
    # the planner's own button takes the view's open explorer too
    p.controls["use_grid"].click()
    assert not p.message.is_error, p.message.text


@pytest.mark.parametrize("dtype", [torch.float16, torch.bfloat16])
def test_half_precision_models_work(dtype):
    torch.manual_seed(0)
    net = nn.Sequential(nn.Linear(8, 16), nn.ReLU(), nn.Linear(16, 4)).to(dtype)
    x = torch.randn(32, 8).to(dtype)
    view = ScanView(net, x, bits=(2, 4, 8), progress=False)
    assert np.isfinite(view.table.sqnr_array("model")).all()
    p = BudgetPlanner(net, x, table=view.table)
    p.controls["measure"].click()
    assert not p.message.is_error, p.message.text
    assert str(dtype).replace("torch.", "") in p.readout.value


def test_layer_names_are_drawn_as_literal_text(tmp_path):
    # matplotlib reads "$...$" as math and fails on "$^$" (its mathtext parser, checked first)
    from matplotlib.figure import Figure

    names = ["w$^$", "conv_$a$", "fc"]
    fig = Figure()
    fig.add_subplot().set_yticks([0], ["w$^$"])
    with pytest.raises(ValueError):
        fig.savefig(tmp_path / "bad.png")
    t = SensitivityTable.synthetic(np.array([[5.0, 20.0], [8.0, 25.0], [9.0, 30.0]]), params=[10, 20, 30],
                                   bits=(2, 4), names=names)
    view = ScanView(t)
    view.pick("w$^$", 4)
    assert not view.message.is_error
    assert [x.get_text().replace("\\$", "$") for x in view.canvas.figure.axes[0].get_yticklabels()] == names
    p = BudgetPlanner(nn.Linear(1, 1), torch.zeros(1, 1), table=t)
    p.save_figure(tmp_path / "planner.png")
    assert (tmp_path / "planner.png").read_bytes()[:4] == b"\x89PNG"


def test_display_bundle_carries_a_static_snapshot(setup):
    import base64

    net, x, _, table = setup
    view = ScanView(table)
    view.pick("4", 6)
    bundle = view._repr_mimebundle_()
    assert "application/vnd.jupyter.widget-view+json" in bundle  # the live widget stays first
    assert base64.b64decode(bundle["image/png"]) == view.canvas.last_png
    assert f"{table.sqnr_db('4', 6, 'model'):.1f}" in bundle["text/html"]
    assert "data-widget='ScanView'" in bundle["text/html"] and "<img src='data:image/png;base64," in bundle["text/html"]
    p = BudgetPlanner(net, x, table=table)
    p.measure()
    bundle = p._repr_mimebundle_()
    assert base64.b64decode(bundle["image/png"]) == p.canvas.last_png
    assert f"{p.report.measured_sqnr_db:.2f} dB" in bundle["text/html"]  # the readout as it stands


def test_planner_second_budget_holds_with_the_first(setup):
    net, x, _, table = setup
    p = BudgetPlanner(net, x, table=table)
    front = p.front("model_kib")
    kib = front[-1][0]  # weight storage alone would allow the largest plan
    p.set_budget("model_kib", kib)
    p.controls["limit_kind"].value = "bops"
    assert not p.controls["limit"].disabled
    bops_front = p.front("bops")
    limit = bops_front[len(bops_front) // 3][0]
    p.controls["limit"].box.set_state({"value": f"{limit:,}"})  # typed, as a browser sends it
    p.refresh()
    assert not p.message.is_error, p.message.text
    assert p.state.limit == limit
    want = plan_budget(table, model_kib=kib, bops=limit)
    assert p.plan.bits == want.bits
    # both budgets hold, counted here: BOPs = MACs x weight bits x 8 input bits (common practice)
    assert sum(table.macs(n) * p.plan.bits[n] * 8 for n in p.plan.layers) <= limit
    assert p.plan.model_kib <= kib + 1e-9 and "bops" in p.readout.value
    # one budget per kind: the first budget's kind is not offered; switching to it drops the second
    assert "model_kib" not in [v for _, v in p.controls["limit_kind"].options]
    plan = p.plan
    p.controls["kind"].value = "bops"
    assert p.controls["limit_kind"].value == "" and p.controls["limit"].disabled and p.plan is plan
    assert "model_kib" in [v for _, v in p.controls["limit_kind"].options]


def test_planner_shows_input_widths_for_a_separate_table():
    # a table with weight and input rows (as quantize="separate" scans make), built by hand
    t = SensitivityTable.synthetic(np.array([[5.0, 20.0, 40.0], [8.0, 25.0, 45.0]]), params=[100, 400],
                                   bits=(2, 4, 8), input_sqnr_db=np.array([[15.0, 40.0], [12.0, 36.0]]),
                                   input_bits=(4, 8))
    p = BudgetPlanner(nn.Linear(1, 1), torch.zeros(1, 1), table=t)
    p.set_budget("model_kib", p.front()[len(p.front()) // 2][0])
    assert p.figure.input_bars and "input bits" in p.table_html.value
    widths = [b.get_width() for b in p.figure.input_bars]
    assert widths == [p.plan.chosen_input_bits[n] or 0 for n in t.layers]
    assert all(w in (4, 8) for w in widths)


def test_scanview_shows_input_rows_beside_weight_rows():
    # a table with weight and input rows (as quantize="separate" scans make), built by hand; the
    # second entry's input was not scanned (NaN): its cells stay empty
    t = SensitivityTable.synthetic(np.array([[5.0, 20.0, 40.0], [8.0, 25.0, 45.0]]), params=[100, 400],
                                   bits=(2, 4, 8), input_sqnr_db=np.array([[15.0, 40.0], [np.nan, np.nan]]),
                                   input_bits=(4, 8))
    view = ScanView(t)
    ax_w, ax_in = view.canvas.figure.axes[:2]
    assert ax_in is view.figure.axes_inputs and "layer inputs" in ax_in.get_title()
    assert [x.get_text() for x in ax_in.texts] == ["15.0", "40.0"]  # the input rows' values
    assert [x.get_text() for x in ax_w.texts] == ["5.0", "20.0", "40.0", "8.0", "25.0", "45.0"]
    html_ = view.table_html.value
    assert "weights quantized" in html_ and "layer inputs quantized" in html_
    assert html_.index("weights quantized") < html_.index("layer inputs quantized")
    assert "<th>4 bits</th><th>8 bits</th></tr>" in html_


def test_scanview_state_is_a_traitlets_model_the_controls_follow(setup):
    net, x, _, table = setup
    view = ScanView(table, x, model=net)
    seen = []
    view.state.observe(lambda ch: seen.append((ch["name"], ch["new"])), names=["layer", "bits"])
    person_sets(view.controls["layer"], "4")  # a person's choices, as a browser sends them
    person_sets(view.controls["bits"], 8)
    assert seen == [("layer", "4"), ("bits", 8)]
    view.controls["open"].click()
    assert view.selected == ("4", 8) and view.explorer.grid.bits == 8
    view.state.scope = "layer"  # a script: the toggle and the drawing follow
    assert view.controls["scope"].value == "layer" and "Layer-output" in view.table_html.value
