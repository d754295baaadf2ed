"""GridExplorer controls a person uses: every control on several models, the step control,
learning with a stop button, labels, headings, half precision, snapshots, sampled readouts."""

from __future__ import annotations

import asyncio
import copy
import math
import threading

import pytest
import torch
from front_end import person_sets
from torch import nn

from qwidgets import GridExplorer, LayerSetting, UniformGrid, error_stats, fit_range, layer_error
from qwidgets.core import renamed
from qwidgets.demo import load_demo
from qwidgets.widgets import events
from qwidgets.widgets import explorer as explorer_module
from qwidgets.widgets.number_control import eng


def _move_every_control(ex: GridExplorer) -> list:
    """Move each control as a person would, through the messages a browser sends (both
    sources), refreshing; collect the messages."""
    seen = []
    c = ex.controls

    def step(fn):
        fn()
        ex.refresh()
        seen.append(ex.message.text)
        assert not ex.message.is_error, ex.message.text

    def drag(name, by):
        s = c[name].slider
        person_sets(s, min(max(s.value + by, 0), s.max))

    for source in [s for _, s in c["source"].options]:
        step(lambda s=source: person_sets(c["source"], s))
        for b in (2, 5, 8, 3):
            step(lambda b=b: person_sets(c["bits"], b))
        step(lambda: drag("scale", 60))
        step(lambda: person_sets(c["offset"].box, eng(0.3 * ex.grid.scale)))  # typed
        step(lambda: drag("noise", -30))
        step(lambda: person_sets(c["temperature"].box, "2"))
        step(lambda: person_sets(c["probe"].slider, c["probe"].slider.max // 2))
        step(lambda: person_sets(c["signed"], not c["signed"].value))
        step(lambda: person_sets(c["keep_clip"], True))
        step(lambda: person_sets(c["bits"], 6))
        step(lambda: person_sets(c["keep_clip"], False))
        for m in ("minmax", "percentile", "mse"):
            step(lambda m=m: person_sets(c["method"], m))
            step(lambda: c["fit"].click())
        if not c["per_channel"].disabled:
            step(lambda: person_sets(c["per_channel"], True))
            step(lambda: person_sets(c["channel"], 1))
            step(lambda: drag("scale", -25))
            step(lambda: person_sets(c["per_channel"], False))
        if not c["learn"].disabled:
            c["steps"].value = 3
            step(lambda: c["learn"].click())
        step(lambda: c["reset"].click())
    return seen


class SmallConv(nn.Module):
    """A second, different model: 2-D convolutions (written here for the test)."""

    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 6, 3, padding=1)
        self.body = nn.Conv2d(6, 4, 3, stride=2, groups=2)
        self.head = nn.Linear(4 * 3 * 3, 5)

    def forward(self, x):
        x = torch.relu(self.stem(x))
        x = torch.relu(self.body(x))
        return self.head(x.flatten(1))


def test_every_control_on_the_demo_reports_no_failure():
    demo = load_demo()
    model = demo.model
    before = copy.deepcopy(model.state_dict())
    for name in ("conv2", "fc1"):
        ex = GridExplorer(model, demo.x_train[:64], layer=name, bits=3)
        messages = _move_every_control(ex)
        assert any(m.startswith("fitted the range") for m in messages)
    for k, v in model.state_dict().items():
        assert torch.equal(v, before[k]), k  # the user's model is untouched


def test_every_control_on_a_transformer_reports_no_failure():
    """The second kind of model of the issue: an encoder (attention and feed-forward blocks,
    tests/attention_models.py); layers inside its blocks get 3-D inputs (batch, sequence,
    features). The model's state and torch's attention fast-path switch are left as they were."""
    from attention_models import EncoderClassifier, sequences

    torch.manual_seed(5)
    model = EncoderClassifier().eval()
    before = copy.deepcopy(model.state_dict())
    fastpath = torch.backends.mha.get_fastpath_enabled()
    for name in ("encoder.layers.0.linear1", "encoder.layers.1.linear2"):
        ex = GridExplorer(model, sequences(n=12), layer=name, bits=4)
        assert ex.subject.inputs.dim() == 3
        messages = _move_every_control(ex)
        assert any(m.startswith("fitted the range") for m in messages)
    assert torch.backends.mha.get_fastpath_enabled() == fastpath
    for k, v in model.state_dict().items():
        assert torch.equal(v, before[k]), k


@pytest.mark.parametrize("dtype", [torch.float32, torch.float16, torch.bfloat16])
def test_every_control_on_a_small_conv_net_reports_no_failure(dtype):
    torch.manual_seed(4)
    model = SmallConv().to(dtype)
    data = torch.randn(16, 3, 8, 8).to(dtype)
    ex = GridExplorer(model, data, layer="body", bits=4)
    if dtype != torch.float32:
        assert f"computes in {str(dtype)[6:]}" in ex.heading.value
    _move_every_control(ex)
    # the layer output error is the one of a float32 copy of the layer, checked against a
    # naive loop written here: deep copy, overwrite the weight, run the layer
    ex.controls["source"].value = "weight"
    ex.refresh()
    layer32 = copy.deepcopy(model.body).float()
    captured = torch.relu(model.stem(data)).float().detach()
    naive = copy.deepcopy(layer32)
    with torch.no_grad():
        from qwidgets import quantize
        naive.weight.copy_(quantize(layer32.weight, ex.grid))
        ref = error_stats(layer32(captured), naive(captured))
    assert ex.layer_stats.sqnr_db == pytest.approx(ref.sqnr_db, abs=0.05)


def test_a_tensor_explorer_moves_every_control():
    ex = GridExplorer(torch.randn(40, 30))
    _move_every_control(ex)
    assert "bare tensor" in ex.heading.value


def test_heading_names_the_layer():
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(6, 8), nn.ReLU(), nn.Linear(8, 2))
    ex = GridExplorer(model, torch.randn(10, 6), layer="2")
    assert ex.heading.value == "<b>Layer &#x27;2&#x27; (Linear), weight 2x8</b>"
    assert ex.snapshot_title == "Layer '2' (Linear), weight 2x8"


def test_labels_are_literal_text_even_with_math_characters():
    """A layer named with $, ^ and _ (math-text syntax) draws as written, no parse error."""
    torch.manual_seed(0)
    model = nn.Sequential()
    model.add_module("fc$\\frac{_x^", nn.Linear(5, 4))
    ex = GridExplorer(model, torch.randn(8, 5), layer="fc$\\frac{_x^")
    ex.figure.ax_hist.set_title("cost $\\frac{1}{$ of fc_1^")  # would fail as math text
    ex.canvas.invalidate()
    ex.controls["source"].value = "input"
    ex.refresh()
    assert not ex.message.is_error, ex.message.text
    ex.canvas.render()
    texts = [t for t in ex.canvas.figure.findobj(lambda a: hasattr(a, "get_parse_math"))]
    assert texts and not any(t.get_parse_math() for t in texts)


def test_step_control_is_a_window_around_the_fitted_step_and_never_moves_while_dragged():
    torch.manual_seed(1)
    layer, x = nn.Linear(40, 20), torch.randn(30, 40)
    ex = GridExplorer(layer, x, bits=4)
    s = ex.controls["scale"]
    fitted = fit_range(layer.weight.detach(), 4, "mse", signed=True).scale
    assert s.positions.lo == pytest.approx(fitted / 8) and s.positions.hi == pytest.approx(fitted * 8)
    window = s.positions
    # a drag: many positions inside the window; the window stays where it is
    for pos in range(100, 800, 37):
        person_sets(s.slider, pos)
        ex.refresh()
        assert s.positions is window and s.slider.value == pos
        assert ex.grid.scale == pytest.approx(window.value(pos))
        # the box and the readout show the same value with the same digits
        assert ex.readouts["step"] == s.box.value == eng(ex.grid.scale)
    # one slider position moves the step by well under 1 % (fine moves with a mouse)
    assert window.value(1) / window.value(0) - 1 < 0.01
    person_sets(s.box, "12.5m")  # a typed value is taken exactly
    assert ex.grid.scale == 0.0125 and ex.readouts["step"] == "12.5m"
    person_sets(ex.controls["bits"], 6)  # a new fitted step: the window follows it
    assert s.positions.lo == pytest.approx(ex.grid.scale / 8)


def test_values_within_rounding_of_zero_print_as_zero():
    ex = GridExplorer(torch.randn(50))
    ex.state.offset = -1.110e-16
    ex.refresh()
    assert ex.readouts["offset"] == "0"


def test_per_channel_readouts_say_which_figures_are_per_channel():
    torch.manual_seed(2)
    ex = GridExplorer(nn.Linear(12, 6), torch.randn(20, 12), per_channel=True)
    ex.controls["channel"].value = 2
    ex.refresh()
    html = ex.readout.value
    assert "<i>channel 2 of 6</i>" in html and "<i>whole tensor</i>" in html
    assert html.index("channel 2 of 6") < html.index("qw-r-step") < html.index("whole tensor")
    assert html.index("whole tensor") < html.index("qw-r-tensor-sqnr")


def test_noise_is_in_steps_and_named_so():
    torch.manual_seed(2)
    ex = GridExplorer(torch.randn(100), noise_steps=0.4)
    assert ex.noise_steps == 0.4
    with pytest.deprecated_call():  # the previous name, one release; warns (once per process)
        renamed._warned.discard(("GridExplorer", "noise"))
        assert ex.noise == 0.4
    assert ex.readouts["noise (steps)"].startswith("0.4 ")
    ex.state.noise_steps = 0.2
    assert ex.noise_steps == 0.2
    with pytest.raises(TypeError, match="not both"):
        GridExplorer(torch.randn(10), noise=0.1, noise_steps=0.2)


def test_messages_describe_the_current_state_or_are_cleared():
    torch.manual_seed(2)
    ex = GridExplorer(nn.Linear(12, 6), torch.randn(20, 12))
    ex.fit("minmax")
    assert ex.message.text.startswith("fitted the range")
    s = ex.controls["scale"].slider
    person_sets(s, s.value + 5)  # a person's move: the note was about the state before it
    assert ex.message.text == ""


def test_show_setting_takes_a_plans_grids():
    torch.manual_seed(2)
    layer, x = nn.Linear(12, 6), torch.randn(20, 12)
    ex = GridExplorer(layer, x)
    w, i = UniformGrid(3, 0.05), UniformGrid(5, 0.1, signed=True)
    ex.show_setting(LayerSetting(weight=w, input=i))
    assert ex.grid is w and ex.to_setting().input is i
    ex.refresh()
    assert ex.layer_stats == layer_error(layer, x, weight_grid=w)
    assert GridExplorer(layer, x, grid=w).grid is w
    with pytest.raises(ValueError):  # 5 channel scales for a 6-channel weight
        ex.show_setting(LayerSetting(weight=UniformGrid(4, torch.ones(5), axis=0)))
    assert ex.grid is w


def test_snapshot_is_in_the_display_bundle():
    torch.manual_seed(2)
    ex = GridExplorer(nn.Linear(12, 6), torch.randn(20, 12))
    bundle = ex._repr_mimebundle_()
    assert "application/vnd.jupyter.widget-view+json" in bundle
    assert bundle["image/png"] and "data:image/png;base64," in bundle["text/html"]
    assert "qw-r-layer-output-sqnr" in bundle["text/html"]


class Clock:
    """A clock that moves 0.1 s each time it is read (deterministic timing)."""

    def __init__(self):
        self.t = 0.0

    def __call__(self):
        self.t += 0.1
        return self.t


def test_learning_follows_every_half_second_and_estimates_from_step_times():
    torch.manual_seed(5)
    layer, x = nn.Linear(16, 8), torch.randn(40, 16)
    ex = GridExplorer(layer, x, bits=3, clock=Clock())
    result = ex.learn(steps=30)
    # the clock is read once per step and once per follow check: 0.2 s a step, a follow
    # every 0.5 s: every third step
    assert ex.learner.follows == 30 // 3
    assert len(result.loss) == 30 and ex.grid is result.grid
    assert ex.controls["learn"].description == "learn"
    assert not ex.controls["bits"].disabled


def test_learn_button_becomes_stop_and_stops_keeping_the_best_grid():
    torch.manual_seed(5)
    layer, x = nn.Linear(32, 16), torch.randn(200, 32)
    ex = GridExplorer(layer, x, bits=3)
    ex.controls["steps"].value = 100000
    start = ex.grid
    seen = {}

    async def session():
        ex.controls["learn"].click()  # in a kernel: learns in the background
        seen["description"] = ex.controls["learn"].description
        seen["bits disabled"] = ex.controls["bits"].disabled
        while not ex.learner._times:  # a few steps have run
            await asyncio.sleep(0.05)
        ex.controls["learn"].click()  # stop
        while ex.learner.running:
            await asyncio.sleep(0.05)

    asyncio.run(session())
    assert seen == {"description": "stop", "bits disabled": True}
    r = ex.learner.result
    assert len(r.loss) < 100000 and ex.grid is r.grid
    assert r.stats.sqnr_db >= r.start_stats.sqnr_db
    assert ex.message.text.startswith("stopped after") and not ex.message.is_error
    assert not ex.controls["bits"].disabled and ex.controls["learn"].description == "learn"
    assert start is not ex.grid or r.best_step == 0
    assert not [t for t in threading.enumerate() if t.name == "qwidgets learn"]


def test_a_large_layer_is_sampled_while_moving_and_exact_when_still(monkeypatch):
    from test_explorer import FakeLoop

    torch.manual_seed(6)
    layer, x = nn.Linear(64, 32), torch.randn(256, 64)
    loop = FakeLoop()
    monkeypatch.setattr(events, "_running_loop", lambda: loop)
    monkeypatch.setattr(explorer_module, "LARGE_LAYER_MACS", 1000)
    ex = GridExplorer(layer, x, bits=4)
    ex.state.scale = ex.state.scale * 1.3
    loop.advance(0.05)  # drawn, as while moving: a sample of the rows, with its +-dB
    shown = ex.readouts["layer-output SQNR"]
    assert "+-" in shown and f"of {x.shape[0]} rows" in shown
    loop.advance(1.0)  # still for a moment: exact
    exact = layer_error(layer, x, weight_grid=ex.grid)
    assert ex.readouts["layer-output SQNR"] == f"{exact.sqnr_db:.2f} dB"
    est = float(shown.split()[0])
    se = float(shown.split()[1][2:])
    assert abs(est - exact.sqnr_db) <= 4 * se + 0.05  # the estimate is within its error bars
    assert not math.isnan(se)
