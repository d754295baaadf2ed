"""One validation layer (qwidgets/core/checks.py): TypeError for a wrong type, ValueError for a
wrong value, each naming the parameter; layer_error, scan, model_error and evaluate_plan
scan each argument once."""

from __future__ import annotations

import pytest
import torch
from torch import nn

import qwidgets
from qwidgets.core.checks import check_axis, check_bool, check_choice, check_int


# ---------------------------------------------------------------------------- the helpers
@pytest.mark.parametrize("value, error, words", [
    (2.5, TypeError, r"steps must be an int >= 0, got 2.5 \(float\)"),
    (True, TypeError, r"steps must be an int >= 0, got True \(bool\)"),
    ("3", TypeError, r"steps must be an int >= 0, got '3' \(str\)"),
    (None, TypeError, r"steps must be an int >= 0, got None"),
    (-1, ValueError, r"steps must be an int >= 0, got -1"),
])
def test_check_int(value, error, words):
    with pytest.raises(error, match=words):
        check_int(value, "steps", minimum=0)


def test_check_int_ranges_and_none():
    assert check_int(None, "n", minimum=1, none_ok=True) is None
    assert check_int(16, "b", minimum=1, maximum=16) == 16
    with pytest.raises(ValueError, match=r"b must be an int in 1..16, got 17"):
        check_int(17, "b", minimum=1, maximum=16)
    with pytest.raises(TypeError, match=r"n must be None or an int >= 1"):
        check_int(1.0, "n", minimum=1, none_ok=True)


def test_check_choice_bool_and_axis():
    assert check_choice("mse", ("mse",), "method") == "mse"
    with pytest.raises(TypeError, match=r"method must be one of 'mse' \(a str\), got 3 \(int\)"):
        check_choice(3, ("mse",), "method")
    with pytest.raises(ValueError, match=r"method must be one of 'mse', got 'kmeans'"):
        check_choice("kmeans", ("mse",), "method")
    for bad in (0, 1, "false", None):
        with pytest.raises(TypeError, match="per_channel must be True or False"):
            check_bool(bad, "per_channel")
    assert check_axis(-2, 2) == -2 and check_axis(None, 0) is None
    with pytest.raises(TypeError, match="axis must be None or an int"):
        check_axis("0", 2)
    with pytest.raises(ValueError, match="axis=2 is out of range for a tensor with 2 dimension"):
        check_axis(2, 2)
    with pytest.raises(ValueError, match="needs a tensor with at least one dimension"):
        check_axis(0, 0)


# ---------------------------------------------------------------------------- public API
def _net():
    torch.manual_seed(0)
    return nn.Sequential(nn.Linear(6, 8), nn.ReLU(), nn.Linear(8, 3)).eval()


@pytest.mark.parametrize("call, error, words", [
    (lambda n, x: qwidgets.scan(n, x, max_samples=2.5, progress=False), TypeError, "max_samples must be None or an int >= 1"),
    (lambda n, x: qwidgets.scan(n, x, max_samples=0, progress=False), ValueError, "max_samples must be None or an int >= 1"),
    (lambda n, x: qwidgets.capture_inputs(n, x, max_samples="4"), TypeError, "max_samples must be None or an int >= 1"),
    (lambda n, x: qwidgets.scan(n, x, method=3, progress=False), TypeError, "method must be one of"),
    (lambda n, x: qwidgets.scan(n, x, method="kmeans", progress=False), ValueError, "method must be one of"),
    (lambda n, x: qwidgets.scan(n, x, scope=None, progress=False), TypeError, "scope must be one of"),
    (lambda n, x: qwidgets.scan(n, x, per_channel=1, progress=False), TypeError, "per_channel must be True or False"),
    (lambda n, x: qwidgets.scan(n, x, progress="no"), TypeError, "progress must be True or False"),
    (lambda n, x: qwidgets.scan(n, x, bits=(2, 4.0), progress=False), TypeError, "bits must be an int"),
    (lambda n, x: qwidgets.scan(n, [1, 2], progress=False), ValueError, "data holds no tensor"),
    (lambda n, x: qwidgets.scan(n, "x", progress=False), TypeError, "data must be a tensor"),
    (lambda n, x: qwidgets.fit_range(x, 4, axis="0"), TypeError, "axis must be None or an int"),
    (lambda n, x: qwidgets.fit_range(x, 4, axis=2), ValueError, "axis=2 is out of range"),
    (lambda n, x: qwidgets.fit_range(x, 4, method=None), TypeError, "method must be one of"),
    (lambda n, x: qwidgets.layer_error(n[0], x, weight_grid=4), TypeError, "weight_grid must be a UniformGrid"),
    (lambda n, x: qwidgets.model_error(n, x, [("0", None)]), TypeError, "settings must be a mapping"),
    (lambda n, x: qwidgets.evaluate_plan(n, x, None, metric=3), TypeError, "metric must be a callable"),
])
def test_public_entry_points_name_the_parameter_and_use_the_right_class(call, error, words):
    net, x = _net(), torch.randn(12, 6)
    with pytest.raises(error, match=words):
        call(net, x)


def test_budget_arguments():
    import numpy as np

    t = qwidgets.SensitivityTable.synthetic(np.array([[10.0, 30.0]]), params=[64], bits=(4, 8))
    with pytest.raises(TypeError, match=r"input_bits must be None or an int in 1..16"):
        qwidgets.plan_budget(t, mean_bits=6, input_bits=8.0)
    with pytest.raises(ValueError, match=r"input_bits must be None or an int in 1..16, got 17"):
        qwidgets.plan_budget(t, mean_bits=6, input_bits=17)
    with pytest.raises(TypeError, match=r"max_points must be None or an int >= 2"):
        qwidgets.pareto_front(t, max_points=2.5)
    with pytest.raises(TypeError, match="cost must be one of"):
        qwidgets.pareto_front(t, cost=None)
    with pytest.raises(TypeError, match="bits must be a mapping"):
        t.make_plan([("layer0", 4)])


# ---------------------------------------------------------------------------- checked once
def test_layer_error_checks_its_inputs_once(monkeypatch):
    import qwidgets.model.layers as layers

    net, x = _net(), torch.randn(16, 6)
    seen = []
    real = layers.as_input
    monkeypatch.setattr(layers, "as_input", lambda t, name="x", **k: seen.append(name) or real(t, name, **k))
    grid = qwidgets.fit_range(x, 4)
    qwidgets.layer_error(net[0], x, input_grid=grid)
    assert seen == ["inputs"]
    bad = x.clone()
    bad[3, 2] = float("nan")
    with pytest.raises(ValueError, match="inputs holds 1 NaN and 0 inf value"):
        qwidgets.layer_error(net[0], bad, input_grid=grid)


# One NaN / inf scan per argument per call. finite_check is that scan (as_input calls it too);
# it is patched in every qwidgets module that looks it up by name, so a helper that scans a
# tensor again, by any route, is counted. A scanned argument (the data, a weight) is matched by
# its storage, or else as a bit-exact copy (the calls copy models they run: copying is exact on
# every CPU); an activation the model computed is matched against the same activation computed
# here with torch, within float32 rounding (other batch shapes and kernels round differently).
def _count_scans(monkeypatch) -> list:
    import sys

    import qwidgets.core.checks as checks
    import qwidgets.model.forward  # noqa: F401 - every module of the three calls is loaded
    import qwidgets.planning.evaluate  # noqa: F401
    import qwidgets.planning.scanning  # noqa: F401

    real, scanned = checks.finite_check, []

    def counting(x, name, *args, **kwargs):
        scanned.append((x.data_ptr(), x.detach().clone()))
        return real(x, name, *args, **kwargs)

    patched = []
    for module in list(sys.modules.values()):
        if getattr(module, "__name__", "").startswith("qwidgets") and getattr(module, "finite_check", None) is real:
            monkeypatch.setattr(module, "finite_check", counting)
            patched.append(module.__name__)
    # the modules that scan data in these calls (a rename must not empty the test)
    assert {"qwidgets.core.checks", "qwidgets.model.sources", "qwidgets.model.finite_state",
            "qwidgets.planning.scanning", "qwidgets.planning.apply"} <= set(patched), patched
    return scanned


def _times(scanned, t) -> int:
    """How often the argument ``t`` (its storage, or a bit-exact copy of it) was scanned."""
    return sum(s.shape == t.shape and (ptr == t.data_ptr() or torch.equal(s, t)) for ptr, s in scanned)


def _times_computed(scanned, t) -> int:
    """How often an activation equal to ``t`` within float32 rounding was scanned: a 6-wide
    float32 dot product rounds to within a few units in the last place (2^-23 relative), so
    rtol 1e-5 holds under any blocking, while independent random rows differ far more."""
    return sum(s.shape == t.shape and torch.allclose(s, t, rtol=1e-5, atol=1e-6) for _, s in scanned)


def _hidden(net, x):
    with torch.no_grad():  # the second layer's input, computed with torch
        return torch.relu(torch.nn.functional.linear(x, net[0].weight, net[0].bias))


@pytest.mark.parametrize("quantize, scope, estimate", [
    ("both", "both", "exact"), ("weight", "model", "exact"), ("separate", "both", "exact"),
    ("both", "model", "gain")])
def test_scan_scans_each_argument_once(monkeypatch, quantize, scope, estimate):
    net, x = _net(), torch.randn(16, 6)
    scanned = _count_scans(monkeypatch)
    qwidgets.scan(net, x, bits=(2, 4), input_bits=(4, 8), quantize=quantize, scope=scope,
                  estimate=estimate, progress=False)
    assert _times(scanned, x) == 1  # the data (also the first layer's input)
    assert _times(scanned, net[0].weight.detach()) == 1 and _times(scanned, net[2].weight.detach()) == 1
    assert _times_computed(scanned, _hidden(net, x)) == 1  # the second layer's input, by the survey
    assert len(scanned) == 4  # nothing else, and nothing twice


def test_scan_with_batch_size_scans_the_data_once_not_each_slice_each_pass(monkeypatch):
    net, x = _net(), torch.randn(16, 6)
    scanned = _count_scans(monkeypatch)
    qwidgets.scan(net, x, bits=(2, 4), quantize="both", batch_size=4, progress=False)
    assert _times(scanned, x) == 1 and not any(s.shape == (4, 6) for _, s in scanned)
    assert _times(scanned, net[0].weight.detach()) == 1 and _times(scanned, net[2].weight.detach()) == 1
    hidden = _hidden(net, x)  # the survey's one pass sees each slice's second-layer input once
    assert all(_times_computed(scanned, h) == 1 for h in hidden.split(4)) and len(scanned) == 3 + 4
    bad = x.clone()
    bad[13, 1] = float("inf")  # in the last slice: named for the data as given
    with pytest.raises(ValueError, match=r"data holds 0 NaN and 1 inf"):
        qwidgets.scan(net, bad, bits=(4,), batch_size=4, progress=False)


@pytest.mark.parametrize("batches", [1, 3])
def test_model_error_scans_each_argument_once(monkeypatch, batches):
    net, x = _net(), torch.randn(18, 6)
    settings = {n: qwidgets.LayerSetting(weight=qwidgets.fit_range(net[int(n)].weight, 4, axis=0),
                                         input=qwidgets.UniformGrid(6, 0.05)) for n in ("0", "2")}
    parts = list(x.split(18 // batches))
    scanned = _count_scans(monkeypatch)
    qwidgets.model_error(net, x if batches == 1 else iter(parts), settings)
    assert all(_times(scanned, p) == 1 for p in parts)  # each batch (the first layer's input too)
    # the weights once per call, however many batches
    assert _times(scanned, net[0].weight.detach()) == 1 and _times(scanned, net[2].weight.detach()) == 1
    # the second layer's input (the output of the quantized first layer): once per batch
    assert len([s for _, s in scanned if s.shape == (18 // batches, 8)]) == batches
    assert len(scanned) == 2 * batches + 2


def test_evaluate_plan_scans_each_argument_once(monkeypatch):
    net, x = _net(), torch.randn(16, 6)
    plan = qwidgets.scan(net, x, bits=(4, 8), quantize="both", progress=False).make_plan({"0": 4, "2": 8})
    scanned = _count_scans(monkeypatch)
    qwidgets.evaluate_plan(net, x, plan)
    assert _times(scanned, x) == 1
    assert _times(scanned, net[0].weight.detach()) == 1 and _times(scanned, net[2].weight.detach()) == 1
    # the planned copy's second layer sees its own (quantized) first layer's output: scanned once
    hidden = [s for _, s in scanned if s.shape == (16, 8)]
    assert len(hidden) == 1 and len(scanned) == 4


def test_activations_are_still_checked_where_they_are_not_the_data():
    # the first layer overflows to inf from finite weights: the second layer's input is
    # refused, named, by each entry point
    net, x = _net(), torch.randn(16, 6)
    with torch.no_grad():
        net[0].bias[3] = 3e38  # float32's largest is 3.4e38: a positive sum above overflows
        net[0].weight[3] = 1e38
    words = r"the input of layer '2' .* holds 0 NaN and \d+ inf"
    with pytest.raises(ValueError, match=words):
        qwidgets.scan(net, x, bits=(4,), progress=False)
    setting = {"2": qwidgets.LayerSetting(input=qwidgets.UniformGrid(6, 0.05))}
    with pytest.raises(ValueError, match=words):
        qwidgets.model_error(net, x, setting)
    # an inf in the weights themselves: the error names that weight
    with torch.no_grad():
        net[0].bias[3] = float("inf")
    words = r"weight '0.bias' \(0 NaN, 1 inf of 8\).* so the input of layer '2'"
    with pytest.raises(ValueError, match=words):
        qwidgets.scan(net, x, bits=(4,), progress=False)
    with pytest.raises(ValueError, match=words):
        qwidgets.model_error(net, x, setting)
    bad = x.clone()
    bad[0, 0] = float("nan")
    with pytest.raises(ValueError, match=r"data holds 1 NaN and 0 inf"):
        qwidgets.model_error(_net(), bad, setting)
