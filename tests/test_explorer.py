"""GridExplorer driven headless: set control values, refresh, compare with the core functions."""

from __future__ import annotations

import asyncio
import json
import math

import matplotlib
import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st
from PIL import Image
from torch import nn

from qwidgets import (
    GridExplorer,
    LayerSetting,
    error_stats,
    fit_range,
    grid_usage,
    layer_error,
    quantize,
)
from qwidgets.widgets import events, explorer_numbers, explorer_state
from qwidgets.widgets.explorer import SETTLE_S
from qwidgets.widgets.explorer_numbers import grid_key


@pytest.fixture(scope="module")
def subject():
    torch.manual_seed(0)
    layer = nn.Linear(48, 24)
    with torch.no_grad():
        layer.weight.normal_(0.0, 0.05)
    x = torch.randn(80, 48)
    return layer, x


def _snapshot(module: nn.Module):
    return ({k: v.detach().clone() for k, v in module.state_dict().items()},
            [m.training for m in module.modules()])


def _assert_untouched(module: nn.Module, snap) -> None:
    state, flags = snap
    for k, v in module.state_dict().items():
        assert torch.equal(v, state[k]), k
    assert [m.training for m in module.modules()] == flags
    for m in module.modules():
        assert not m._forward_hooks and not m._forward_pre_hooks and not m._backward_hooks
    assert all(p.grad is None for p in module.parameters())


def _assert_stats_close(a, b):
    """Two ErrorStats equal to float64 rounding (one from sorted prefix sums, one direct)."""
    for name in ("mse", "rmse", "max_abs", "rel_err", "cosine"):
        assert getattr(a, name) == pytest.approx(getattr(b, name), rel=1e-7, abs=1e-12), name
    assert a.sqnr_db == pytest.approx(b.sqnr_db, abs=1e-6) and a.n == b.n


def _check_readouts_match_core(ex, layer, x):
    """Readouts equal the core functions' results for the explorer's grid (the main contract)."""
    values = layer.weight.detach() if ex.source == "weight" else x
    g = ex.grid
    _assert_stats_close(ex.stats, error_stats(values, quantize(values, g)))
    assert ex.usage == grid_usage(values, g)
    kw = {"weight_grid": g} if ex.source == "weight" else {"input_grid": g}
    assert ex.layer_stats == layer_error(layer, x, **kw)
    r = ex.readouts
    assert r["tensor SQNR"] == f"{error_stats(values, quantize(values, g)).sqnr_db:.2f} dB"
    assert r["layer-output SQNR"] == f"{layer_error(layer, x, **kw).sqnr_db:.2f} dB"
    assert r["cosine similarity"] == f"{ex.layer_stats.cosine:.6f}"
    assert r["bins used"].startswith(f"{ex.usage.bins_used:,} of {ex.usage.n_bins:,}")
    assert f"{ex.layer_stats.sqnr_db:.2f} dB" in ex.readout.value  # the HTML shown


def test_controls_drive_the_grid_and_readouts_equal_core_results(subject):
    layer, x = subject
    snap = _snapshot(layer)
    ex = GridExplorer(layer, x, bits=4)
    _check_readouts_match_core(ex, layer, x)
    c = ex.controls
    c["bits"].value = 3
    ex.state.scale = 0.031
    ex.state.offset = 0.004
    ex.refresh()
    assert (ex.grid.bits, ex.grid.scale, ex.grid.offset) == (3, 0.031, 0.004)
    _check_readouts_match_core(ex, layer, x)
    c["signed"].value = False
    ex.refresh()
    assert ex.grid.signed is False
    _check_readouts_match_core(ex, layer, x)
    c["source"].value = "input"
    c["bits"].value = 6
    ex.refresh()
    assert ex.source == "input" and ex.grid.bits == 6
    _check_readouts_match_core(ex, layer, x)
    _assert_untouched(layer, snap)


@pytest.mark.parametrize("method", ["minmax", "percentile", "mse"])
def test_changing_bits_refits_the_range_with_the_selected_method(subject, method):
    layer, x = subject
    ex = GridExplorer(layer, x, bits=2)
    ex.controls["method"].value = method  # used from the next fit on
    sqnr = {}
    for b in (3, 5, 8, 4):
        ex.controls["bits"].value = b
        ref = fit_range(layer.weight.detach(), b, method, signed=True)  # the core's fit
        assert (ex.grid.bits, ex.grid.scale, ex.grid.offset) == (b, ref.scale, ref.offset)
        ex.refresh()
        sqnr[b] = ex.layer_stats.sqnr_db
        _check_readouts_match_core(ex, layer, x)
    # about 6 dB a bit (6.02 b + c for a fine grid: textbook formula for uniform quantizers)
    assert 6.02 * 3 - 4 <= sqnr[8] - sqnr[5] <= 6.02 * 3 + 4
    assert sqnr[3] < sqnr[4] < sqnr[5] < sqnr[8]


def test_keep_clip_range_keeps_the_clip_range(subject):
    layer, x = subject
    ex = GridExplorer(layer, x, bits=4, method="minmax")
    ex.controls["keep_clip"].value = True
    lo, hi = ex.grid.clip_range
    predicted, origin = ex.state.grid_for_bits(8)  # what the change will show (idle steps use it)
    ex.controls["bits"].value = 8
    assert ex.grid is predicted or grid_key(ex.grid) == grid_key(predicted)
    assert ex.state.origin() == origin == ("clip range kept", 4)
    lo8, hi8 = ex.grid.clip_range
    assert ex.grid.bits == 8
    assert hi8 - lo8 == pytest.approx(hi - lo, rel=1e-6)  # clip_range is float32
    assert ex.state.scale == pytest.approx(ex.grid.scale)


def test_plot_artists_change_with_the_controls(subject):
    layer, x = subject
    ex = GridExplorer(layer, x)
    f = ex.figure

    def grab():
        return dict(
            ticks=np.array(f.grid_ticks.get_xdata(), float).copy(),
            hard=np.array(f.hard_line.get_ydata(), float).copy(),
            soft=np.array(f.soft_line.get_ydata(), float).copy(),
            image=np.array(f.map_values, float).copy(),
            bars=f.bars.get_data().values.copy(),
            scatter=np.array(f.out_points.get_ydata(), float).copy(),
            png=ex.canvas.last_png,
        )

    def changed(a, b):
        return {k for k in a if not (np.array_equal(a[k], b[k]) if k != "png" else a[k] == b[k])}

    before = grab()
    ex.state.scale = ex.grid.scale * 1.3
    ex.refresh()
    after_scale = grab()
    assert {"ticks", "hard", "soft", "scatter", "png"} <= changed(before, after_scale)
    ex.state.noise_steps = 0.9
    ex.refresh()
    after_noise = grab()
    assert {"image", "soft", "bars", "png"} <= changed(after_scale, after_noise)
    assert "scatter" not in changed(after_scale, after_noise)  # hard output does not see noise
    ex.state.probe = ex.controls["probe"].positions.lo * 0.5
    ex.refresh()
    assert "bars" in changed(after_noise, grab())
    # the image shown is the core's bin probabilities: each column is a distribution over bins,
    # drawn in matplotlib's viridis colours (0 to 1)
    np.testing.assert_allclose(f.map_values.sum(axis=0), 1.0, atol=1e-5)
    viridis = matplotlib.colormaps["viridis"](f.map_values, bytes=True)
    np.testing.assert_array_equal(np.asarray(f.map_img.get_array()), viridis)


class FakeLoop:
    """A stand-in for the kernel's event loop with a clock the test moves (deterministic)."""

    def __init__(self):
        self.now = 0.0
        self.calls = []

    def call_later(self, delay, fn, *args):
        handle = FakeHandle(self.now + delay, fn, args)
        self.calls.append(handle)
        return handle

    def advance(self, dt):
        end = self.now + dt
        while True:
            due = sorted((h for h in self.calls if not h.cancelled and h.when <= end),
                         key=lambda h: h.when)
            if not due:
                break
            h = due[0]
            self.calls.remove(h)
            self.now = h.when
            h.fn(*h.args)
        self.now = end


class FakeHandle:
    def __init__(self, when, fn, args):
        self.when, self.fn, self.args, self.cancelled = when, fn, args, False

    def cancel(self):
        self.cancelled = True


def test_a_burst_of_200_changes_costs_a_few_renders_and_ends_in_the_last_value(subject, monkeypatch):
    layer, x = subject
    ex = GridExplorer(layer, x)
    scale0 = ex.grid.scale
    values = [scale0 * (1 + 0.002 * i) for i in range(200)]

    loop = FakeLoop()
    monkeypatch.setattr(events, "_running_loop", lambda: loop)
    renders = ex.canvas.renders
    # as a kernel sees a dragged slider: one event a millisecond for 200 ms, the loop running
    # between them; the coalescer (30 ms delay) draws once per 30 ms window that saw a change
    for v in values:
        ex.state.scale = v
        loop.advance(0.001)
    loop.advance(1.0)
    spent = ex.canvas.renders - renders
    assert spent == math.ceil(0.2 / 0.03), spent
    assert ex.grid.scale == pytest.approx(values[-1])
    _assert_stats_close(ex.stats, error_stats(layer.weight, quantize(layer.weight.detach(), ex.grid)))
    assert ex.readouts["tensor SQNR"] in ex.readout.value


def _fake_loop(monkeypatch):
    """A :class:`FakeLoop` the explorer's idle steps and coalesced redraws run on."""
    loop = FakeLoop()
    monkeypatch.setattr(events, "_running_loop", lambda: loop)
    return loop


def _calls(monkeypatch, module, name, note) -> list:
    """Replace ``module.name`` by itself recording ``note(*args)`` of each call; the list."""
    calls, real = [], getattr(module, name)

    def recording(*args, **kw):
        calls.append(note(*args))
        return real(*args, **kw)

    monkeypatch.setattr(module, name, recording)
    return calls


def test_while_idle_after_a_draw_the_other_widths_are_fitted_one_step_at_a_time(subject, monkeypatch):
    """After a draw the kernel fits ahead, one width per idle step, nearest first (3 and 5 next
    to 4, then 2, 6, 1, 7, 8, then 4 bits unsigned); a move waiting stops the steps, the next
    draw starts them again; a width fitted ahead costs no fit when it is chosen."""
    layer, x = subject
    ex = GridExplorer(layer, x, bits=4)
    loop = _fake_loop(monkeypatch)
    fits = _calls(monkeypatch, explorer_state, "fit_cached",
                  lambda fitter, widths: (round(loop.now, 4), widths[0], fitter.signed))
    ex.state.scale = ex.grid.scale * 1.1
    loop.advance(0.03)  # the coalesced redraw
    assert fits == []
    loop.advance(SETTLE_S + events.IDLE_STEP_S / 2)  # the first idle step
    assert [b for _, b, _ in fits] == [3]
    ex.state.noise_steps = 0.5  # a move waits: no idle step runs before its redraw
    loop.advance(0.02)
    assert len(fits) == 1
    loop.advance(5.0)
    assert [(b, signed) for _, b, signed in fits] == [
        (3, True), (5, True), (2, True), (6, True), (1, True), (7, True), (8, True), (4, False)]
    times = [t for t, _, _ in fits]
    assert all(b - a >= events.IDLE_STEP_S - 1e-9 for a, b in zip(times[:-1], times[1:], strict=True))
    ex.state.bits = 7
    assert len(fits) == 8 and ex.grid.bits == 7  # fitted ahead: no fit now
    assert not ex.state.prefetch(limit=1)  # one fit was left around 7 bits, and is done:
    assert [(b, signed) for _, b, signed in fits[8:]] == [(7, False)]  # 7 bits unsigned


def test_idle_steps_work_out_the_other_widths_figures_and_a_bits_change_then_needs_no_layer_product(
        subject, monkeypatch):
    """Once the widths are fitted, each idle step works out one other width's figures (layer
    output, tensor, bin map), nearest first. A change to such a width runs no layer forward,
    and what it shows equals the core functions' results (layer_error, error_stats), as a
    fresh computation does. A move back to a grid drawn before needs none either."""
    layer, x = subject
    ex = GridExplorer(layer, x, bits=4)
    loop = _fake_loop(monkeypatch)
    forwards = _calls(monkeypatch, explorer_numbers, "layer_forward", lambda *args: round(loop.now, 4))
    ex.state.scale = ex.grid.scale * 1.1
    loop.advance(0.03)
    assert len(forwards) == 1  # the redraw's own
    assert ex.state.widths_ahead()[:3] == (3, 4, 5)
    loop.advance(SETTLE_S + events.IDLE_STEP_S * 8.5)  # 8 fits, then the first width's figures
    assert len(forwards) == 2 and not ex.state.fits_left()
    loop.advance(5.0)
    assert len(forwards) == 1 + 7  # widths 3, 5, 2, 6, 1, 7, 8: one forward each
    assert all(b - a >= events.IDLE_STEP_S - 1e-9 for a, b in zip(forwards[1:-1], forwards[2:], strict=True))
    for bits in (5, 2, 8, 5):  # (the last: back to a grid drawn before)
        ex.state.bits = bits
        ex.refresh()
        assert len(forwards) == 8
        _check_readouts_match_core(ex, layer, x)
    assert not ex.prefetch()  # (nothing left that is not known: the other widths' too)


def test_refresh_leaves_torch_thread_count_as_it_was(subject):
    layer, x = subject
    ex = GridExplorer(layer, x)
    before = torch.get_num_threads()
    ex.state.scale = ex.grid.scale * 1.1
    ex.refresh()
    assert torch.get_num_threads() == before


def test_without_an_event_loop_changes_wait_for_refresh(subject):
    layer, x = subject
    ex = GridExplorer(layer, x)
    renders = ex.canvas.renders
    for b in [2, 3, 5, 6, 7, 8] * 30:
        ex.controls["bits"].value = b
    assert ex.canvas.renders == renders and ex._updater.pending
    assert ex.grid.bits == 8  # the state follows at once; only drawing waits
    ex.refresh()
    assert ex.canvas.renders == renders + 1


@pytest.mark.parametrize("method", ["minmax", "percentile", "mse"])
@pytest.mark.parametrize("per_channel", [False, True])
def test_fit_matches_fit_range(subject, method, per_channel):
    layer, x = subject
    ex = GridExplorer(layer, x, bits=3, per_channel=per_channel)
    ex.state.scale = ex.state.scale * 3  # move away first
    g = ex.fit(method)
    ref = fit_range(layer.weight.detach(), 3, method, signed=True, axis=0 if per_channel else None)
    for a, b in ((g.scale, ref.scale), (g.offset, ref.offset)):
        if per_channel:
            assert torch.equal(a, b)
        else:
            assert a == b
    assert ex.grid is g
    ex.refresh()
    _check_readouts_match_core(ex, layer, x)


def test_fit_button_uses_the_method_dropdown(subject):
    layer, x = subject
    ex = GridExplorer(layer, x, bits=4)
    ex.controls["method"].value = "minmax"
    ex.controls["fit"].click()
    assert ex.grid.scale == fit_range(layer.weight.detach(), 4, "minmax", signed=True).scale


def test_per_channel_sliders_edit_the_channel_shown(subject):
    layer, x = subject
    ex = GridExplorer(layer, x, per_channel=True)
    before = ex.grid.scale.clone()
    ex.controls["channel"].value = 5
    assert ex.state.scale == pytest.approx(float(before[5]))
    ex.state.scale = 0.123
    ex.refresh()
    after = ex.grid.scale
    assert float(after[5]) == pytest.approx(0.123)
    assert torch.equal(after[torch.arange(24) != 5], before[torch.arange(24) != 5])
    _check_readouts_match_core(ex, layer, x)
    assert ex.figure.ax_hist.get_title().startswith("Channel 5 of 24")


def test_learn_from_a_poor_scale_improves_the_hard_layer_output_sqnr(subject):
    layer, x = subject
    snap = _snapshot(layer)
    ex = GridExplorer(layer, x, bits=4)
    ex.state.scale = ex.grid.scale * 6  # deliberately poor
    ex.refresh()
    start = ex.layer_stats.sqnr_db
    result = ex.learn(steps=120)
    ex.refresh()
    assert ex.layer_stats.sqnr_db > start + 6.0
    assert ex.layer_stats == layer_error(layer, x, weight_grid=ex.grid)
    assert ex.state.scale == pytest.approx(ex.grid.scale)  # sliders follow
    assert ex.state.offset == pytest.approx(ex.grid.offset)
    assert ex.state.noise_steps == pytest.approx(result.noise_steps)
    assert "learned 120 steps" in ex.message.text
    ex.controls["bits"].value = 6  # another width: fitted; back at 4 bits, the learned grid
    assert ex.grid is not result.grid
    ex.controls["bits"].value = 4
    assert ex.grid is result.grid
    ex.reset()  # reset: the fitted grid of the current width
    assert ex.grid.scale == fit_range(layer.weight.detach(), 4, "mse", signed=True).scale
    _assert_untouched(layer, snap)


def test_errors_reach_the_message_line(subject):
    layer, x = subject
    tensor_ex = GridExplorer(torch.randn(30, 20))
    tensor_ex.controls["learn"].click()  # a tensor has no layer output to learn against
    assert tensor_ex.message.is_error
    assert tensor_ex.message.text.startswith("learn failed: ValueError: learn needs a layer")
    assert "learn needs a layer" in tensor_ex.message.widget.value

    ex = GridExplorer(layer, x)
    ex.controls["source"].value = "input"
    ex.controls["per_channel"].disabled = False  # a front-end could still send it
    ex.controls["per_channel"].value = True
    assert "per-channel grids are offered for weights" in ex.message.text
    assert ex.controls["per_channel"].value is False  # the control is put back

    def broken(_data):
        raise RuntimeError("drawing broke")

    ex.figure.update = broken

    async def move():
        ex.state.noise_steps = 0.5
        while ex._updater.pending:
            await asyncio.sleep(0.01)

    asyncio.run(move())  # a scheduled update has no caller: its error must be shown
    assert ex.message.text == "update failed: RuntimeError: drawing broke"
    with pytest.raises(RuntimeError, match="drawing broke"):
        ex.refresh()  # a script calling refresh gets the exception (and the line shows it)
    assert ex.message.text.startswith("refresh failed")


def test_model_and_layer_are_bit_identical_after_every_interaction(tmp_path):
    torch.manual_seed(1)
    model = nn.Sequential(nn.Conv1d(2, 6, 3, padding=1), nn.BatchNorm1d(6), nn.ReLU(),
                          nn.Flatten(), nn.Linear(6 * 20, 4))
    model.train()  # BatchNorm in training mode: a careless forward would move its statistics
    data = torch.randn(32, 2, 20)
    snap = _snapshot(model)
    ex = GridExplorer(model, data, layer="4", bits=4)
    steps = [
        lambda: ex.controls["bits"].value.__class__,
        lambda: setattr(ex.controls["bits"], "value", 5),
        lambda: setattr(ex.state, "scale", ex.grid.scale * 2),
        lambda: setattr(ex.state, "offset", 0.001),
        lambda: setattr(ex.state, "noise_steps", 0.2),
        lambda: setattr(ex.state, "temperature", 2.0),
        lambda: setattr(ex.controls["per_channel"], "value", True),
        lambda: setattr(ex.controls["channel"], "value", 3),
        lambda: setattr(ex.controls["source"], "value", "input"),
        lambda: setattr(ex.controls["signed"], "value", True),
        lambda: ex.fit("percentile"),
        lambda: ex.learn(steps=10),
        lambda: ex.controls["reset"].click(),
        lambda: ex.save_figure(tmp_path / "f.png"),
        lambda: ex.to_setting(),
        lambda: ex.refresh(),
    ]
    for step in steps:
        step()
        _assert_untouched(model, snap)
    assert not ex.message.is_error, ex.message.text


def test_construction_modes_and_bad_input():
    torch.manual_seed(2)
    model = nn.Sequential(nn.Linear(5, 7), nn.ReLU(), nn.Linear(7, 3))
    data = torch.randn(40, 5)
    ex = GridExplorer(model, data, layer="2")
    assert ex.layer_name == "2"
    captured = torch.relu(model[0](data)).detach()
    assert ex.layer_stats == layer_error(model[2], captured, weight_grid=ex.grid)
    assert ex.controls["source"].options == (("weights", "weight"), ("layer input", "input"))
    t = GridExplorer(torch.randn(100))
    assert t.layer_stats is None and t.controls["learn"].disabled
    assert t.to_setting() == LayerSetting(weight=t.grid)
    with pytest.raises(ValueError, match=r"layer='0'"):
        GridExplorer(model, data)
    with pytest.raises(TypeError, match="needs data"):
        GridExplorer(model[0])
    with pytest.raises(TypeError, match="takes no data"):
        GridExplorer(torch.randn(3), data)
    with pytest.raises(ValueError, match="not found in the model"):
        GridExplorer(model, data, layer="9")
    with pytest.raises(TypeError, match="needs a Linear or Conv layer"):
        GridExplorer(model, data, layer="1")
    with pytest.raises(ValueError, match="bits must be in 1..16"):
        GridExplorer(torch.randn(10), bits=0)
    with pytest.raises(ValueError, match="method must be one of"):
        GridExplorer(torch.randn(10), method="max")
    with pytest.raises(ValueError, match="noise_steps must be > 0"):
        GridExplorer(torch.randn(10), noise_steps=0.0)
    with pytest.raises(ValueError, match="source must be one of"):
        GridExplorer(model[0], data, source="bias")


def test_to_setting_reset_and_source_memory(subject):
    layer, x = subject
    ex = GridExplorer(layer, x)
    w0 = ex.grid
    ex.controls["bits"].value = 2
    ex.controls["source"].value = "input"
    i0 = ex.grid
    ex.controls["source"].value = "weight"
    assert ex.grid.bits == 2  # each source keeps its own grid
    s = ex.to_setting()
    assert s.weight is ex.grid and s.input is i0
    assert ex.to_setting("weight").input is None
    with pytest.raises(ValueError, match="sources must name"):
        ex.to_setting("bias")
    ex.controls["bits"].value = 4
    assert ex.grid.scale == w0.scale  # the fitted grid of that width again
    ex.state.scale = w0.scale * 2
    ex.reset()
    assert ex.grid.scale == w0.scale and ex.controls["bits"].value == 4


def test_save_figure_png_and_svg(subject, tmp_path):
    layer, x = subject
    ex = GridExplorer(layer, x, width=720, height=600)
    ex.save_figure(tmp_path / "explorer.png")
    ex.save_figure(tmp_path / "explorer.svg")
    with Image.open(tmp_path / "explorer.png") as im:  # decoded by Pillow
        assert im.size == (720, 600)
    svg = (tmp_path / "explorer.svg").read_text()
    assert svg.lstrip().startswith("<?xml") and "<svg" in svg and "layer output" in svg
    with pytest.raises(ValueError, match=r"\.png or \.svg"):
        ex.save_figure(tmp_path / "explorer.jpg")
    # the live view still renders by blitting after a save
    ex.state.noise_steps = 0.5
    ex.refresh()
    assert ex.canvas.last_png[:4] == b"\x89PNG"


def test_stable_css_classes_for_front_end_tests(subject):
    layer, x = subject
    ex = GridExplorer(layer, x)
    assert "qw-explorer" in ex._dom_classes
    for name in ("bits", "scale", "offset", "noise", "temperature", "source", "signed",
                 "per_channel", "channel", "method", "fit", "learn", "reset", "probe"):
        assert f"qw-{name.replace('_', '-')}" in ex.controls[name]._dom_classes
    assert "qw-plot" in ex.canvas.image._dom_classes
    assert "qw-readout" in ex.readout._dom_classes
    assert "qw-message" in ex.message.widget._dom_classes
    assert "class='qw-r-layer-output-sqnr'" in ex.readout.value
    assert ex.canvas.image.layout.width == "720px"  # fixed width: not stretched, not blurry


@settings(max_examples=15, deadline=None)
@given(
    bits=st.integers(1, 16),
    factor=st.floats(0.05, 20.0),
    offset_steps=st.floats(-3.0, 3.0),
    signed=st.booleans(),
    source=st.sampled_from(["weight", "input"]),
)
def test_any_control_state_reads_out_the_core_numbers(explorer_and_subject, bits, factor,
                                                      offset_steps, signed, source):
    """Property: whatever the controls say, the readouts are the core functions' numbers."""
    ex, layer, x = explorer_and_subject
    c = ex.controls
    c["source"].value = source
    c["bits"].value = bits
    c["signed"].value = signed
    ex.state.scale = ex.grid.scale * factor
    ex.state.offset = offset_steps * ex.grid.scale
    ex.refresh()
    assert not ex.message.is_error, ex.message.text
    assert (ex.grid.bits, ex.grid.signed) == (bits, signed)
    _check_readouts_match_core(ex, layer, x)


@pytest.fixture(scope="module")
def explorer_and_subject():
    torch.manual_seed(3)
    layer = nn.Linear(20, 10)
    x = torch.randn(30, 20)
    return GridExplorer(layer, x), layer, x


def test_slider_messages_from_a_front_end_coalesce_in_a_real_kernel():
    """In an ipykernel (what JupyterLab, Notebook 7 and VS Code run), 50 slider messages sent as
    a front-end sends them cost a few renders, and the kernel ends in the last value."""
    from jupyter_client.manager import start_new_kernel

    km, kc = start_new_kernel(kernel_name="python3")
    try:
        def run(code):
            msg_id = kc.execute(code)
            out = []
            while True:
                m = kc.get_iopub_msg(timeout=120)
                if m["parent_header"].get("msg_id") != msg_id:
                    continue
                if m["msg_type"] == "stream":
                    out.append(m["content"]["text"])
                if m["msg_type"] == "error":
                    raise AssertionError("\n".join(m["content"]["traceback"]))
                if m["msg_type"] == "status" and m["content"]["execution_state"] == "idle":
                    return "".join(out)

        model_id = run(
            "import torch\nfrom torch import nn\nfrom qwidgets import GridExplorer\n"
            "torch.manual_seed(0)\nex = GridExplorer(nn.Linear(64, 32), torch.randn(50, 64))\n"
            "print(ex.controls['bits'].model_id)"
        ).strip()
        # the clock of the coalescer, injected: no scheduled draw fires while messages arrive
        run("ex._updater.delay = 3600.0")
        values = [2, 3, 4, 5, 6, 7, 8, 3, 5, 6] * 5
        for v in values:
            # the bit buttons: a click sends the option's index (widths 1..16)
            state = {"method": "update", "state": {"index": v - 1}, "buffer_paths": []}
            kc.shell_channel.send(kc.session.msg("comm_msg", {"comm_id": model_id, "data": state}))
        out = run(
            "import json\n"
            "pending = ex._updater.pending\n"
            "ex._updater.flush()\n"
            "print(json.dumps([ex.grid.bits, ex.canvas.renders, ex._updater.requests, ex.message.text]))"
        )
        bits, renders, requests, message = json.loads(out)
        assert bits == values[-1] and message == ""
        assert requests >= len(values)  # each message changed the state (and its grid)
        assert renders == 2  # the first render at construction, then one for 50 messages
    finally:
        kc.stop_channels()
        km.shutdown_kernel(now=True)
