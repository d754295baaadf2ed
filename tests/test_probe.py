"""Probing a model: captured inputs, functional layer outputs, layer and model error, and the
guarantee that the user's model is never changed (also when a call fails)."""

from __future__ import annotations

import copy
import math
import warnings

import pytest
import torch
import torch.nn.functional as F
from torch import nn

from qwidgets import (
    LayerSetting,
    ModelError,
    UniformGrid,
    capture_inputs,
    error_stats,
    fit_range,
    layer_error,
    model_error,
    quantize,
)
from qwidgets.model.capture import quantizable_layers
from qwidgets.model.forward import forward_float, forward_quantized
from qwidgets.model.layers import fit_weight, layer_macs, layer_output

_HOOK_DICTS = (
    "_forward_hooks",
    "_forward_hooks_with_kwargs",
    "_forward_hooks_always_called",
    "_forward_pre_hooks",
    "_forward_pre_hooks_with_kwargs",
    "_backward_hooks",
    "_backward_pre_hooks",
)


# ---------------------------------------------------------------------------- helpers
def snapshot(model: nn.Module) -> dict:
    return {
        "state": {k: v.detach().clone() for k, v in model.state_dict(keep_vars=True).items()},
        "requires_grad": [p.requires_grad for p in model.parameters()],
        "grads": [p.grad for p in model.parameters()],
        "training": [m.training for m in model.modules()],
        "hooks": [{h: dict(getattr(m, h)) for h in _HOOK_DICTS} for m in model.modules()],
    }


def assert_untouched(model: nn.Module, before: dict) -> None:
    after = snapshot(model)
    assert before["state"].keys() == after["state"].keys()
    for k, v in before["state"].items():
        w = after["state"][k]
        assert v.dtype == w.dtype and v.shape == w.shape and v.device == w.device, k
        assert v.is_meta or torch.equal(v, w), k  # meta tensors hold no values
    assert before["requires_grad"] == after["requires_grad"]
    assert all(g is None for g in after["grads"])
    assert before["training"] == after["training"]
    assert before["hooks"] == after["hooks"]


def accuracy(output, target) -> float:
    return float((output.argmax(dim=1) == target).float().mean())


class ConvBN(nn.Module):
    """A small conv net with BatchNorm, left in training mode by the tests."""

    def __init__(self):
        super().__init__()
        self.conv1 = nn.Conv2d(3, 6, 3, padding=1)
        self.bn1 = nn.BatchNorm2d(6)
        self.conv2 = nn.Conv2d(6, 4, 3, stride=2, groups=2, padding_mode="reflect", padding=1)
        self.bn2 = nn.BatchNorm2d(4)
        self.fc = nn.Linear(4 * 4 * 4, 5)
        self.drop = nn.Dropout(0.5)

    def forward(self, x):
        x = F.relu(self.bn1(self.conv1(x)))
        x = F.relu(self.bn2(self.conv2(x)))
        return self.fc(self.drop(x.flatten(1)))


@pytest.fixture
def convbn():
    torch.manual_seed(0)
    net = ConvBN()
    with torch.no_grad():  # give the BatchNorm buffers non-trivial values, then stay in train()
        for _ in range(3):
            net(torch.randn(8, 3, 8, 8))
    net.train()
    net.conv1.register_forward_hook(lambda m, i, o: None)  # the user's own hook must survive
    return net, torch.randn(10, 3, 8, 8)


# ---------------------------------------------------------------------------- digits MLP
@pytest.fixture(scope="session")
def digits():
    """scikit-learn's bundled optical digits data and a small MLP trained on it (seeded)."""
    from sklearn.datasets import load_digits

    d = load_digits()
    x = torch.tensor(d.data, dtype=torch.float32) / 16.0
    y = torch.tensor(d.target, dtype=torch.int64)
    perm = torch.randperm(len(y), generator=torch.Generator().manual_seed(0))
    train, test = perm[:1200], perm[1200:]
    torch.manual_seed(0)
    net = nn.Sequential(nn.Linear(64, 64), nn.ReLU(), nn.Linear(64, 32), nn.ReLU(), nn.Linear(32, 10))
    opt = torch.optim.Adam(net.parameters(), lr=1e-2)
    threads = torch.get_num_threads()
    torch.set_num_threads(1)  # tiny matrices: one thread is faster on a busy machine
    try:
        for _ in range(200):
            opt.zero_grad()
            F.cross_entropy(net(x[train]), y[train]).backward()
            opt.step()
    finally:
        torch.set_num_threads(threads)
    for p in net.parameters():
        p.grad = None
    net.eval()
    return net, x[test], y[test]


def test_digits_8bit_minmax_weights_and_inputs_keep_accuracy_within_one_point(digits):
    # scikit-learn load_digits; 8-bit post-training quantization costs < 1 point (common practice)
    net, x, y = digits
    seen = capture_inputs(net, x)
    settings = {
        name: LayerSetting(weight=fit_weight(net.get_submodule(name), 8, "minmax"),
                           input=fit_range(inp, 8, "minmax"))
        for name, inp in seen.items()
    }
    res = model_error(net, x, settings, metric=accuracy, target=y)
    assert isinstance(res, ModelError)
    assert res.metric_float > 0.9  # the MLP did learn the digits
    assert abs(res.metric_quantized - res.metric_float) <= 0.01
    assert res.layers == ("0", "2", "4")
    # Bennett (1948): noise power step^2 / 12; an 8-bit min-max grid has step = 2 max / 255, so
    # one tensor's SQNR is 10 log10(12 * 255^2 / 4) - 20 log10(crest) = 53.1 dB - 20 log10(crest),
    # crest = max / rms. At a crest factor of 10 (from memory: weights and activations of small
    # MLPs stay under it) that is 33.1 dB; six such sources (three layers' weights and inputs)
    # adding in power (Widrow & Kollar 2008) give 33.1 - 10 log10(6) = 25.3 dB.
    assert res.output.sqnr_db > 25


def test_digits_output_sqnr_falls_with_weight_bits(digits):
    # scikit-learn load_digits: output SQNR at 2-bit weights < 4-bit < 8-bit
    net, x, _ = digits
    sqnr = {}
    for bits in (2, 4, 8):
        settings = {n: LayerSetting(weight=fit_weight(net.get_submodule(n), bits, "minmax"))
                    for n in quantizable_layers(net)}
        sqnr[bits] = model_error(net, x, settings).output.sqnr_db
    assert sqnr[2] < sqnr[4] < sqnr[8]
    assert sqnr[8] - sqnr[4] > 15  # about 6 dB per bit


# ---------------------------------------------------------------------------- capture_inputs
def test_captured_inputs_equal_what_each_layer_receives(digits):
    net, x, _ = digits
    seen = capture_inputs(net, x)
    assert list(seen) == ["0", "2", "4"]
    with torch.no_grad():
        h1 = F.relu(net[0](x))
        h2 = F.relu(net[2](h1))
    assert torch.equal(seen["0"], x) and torch.equal(seen["2"], h1) and torch.equal(seen["4"], h2)
    assert seen["0"] is not x  # a copy, not the caller's tensor


def test_capture_order_is_execution_order_and_max_samples_cuts_the_batch():
    class Backwards(nn.Module):
        def __init__(self):
            super().__init__()
            self.last = nn.Linear(3, 2)
            self.first = nn.Linear(4, 3)

        def forward(self, x):
            return self.last(torch.tanh(self.first(x)))

    net = Backwards()
    seen = capture_inputs(net, torch.randn(9, 4), max_samples=4)
    assert list(seen) == ["first", "last"]
    assert [tuple(v.shape) for v in seen.values()] == [(4, 4), (4, 3)]
    assert quantizable_layers(net) == ["last", "first"]
    assert quantizable_layers(net, torch.randn(2, 4)) == ["first", "last"]


def test_capture_any_named_module_and_tuple_and_dict_data():
    class TwoInputs(nn.Module):
        def __init__(self):
            super().__init__()
            self.a, self.b, self.act = nn.Linear(2, 3), nn.Linear(5, 3), nn.ReLU()

        def forward(self, u, v, scale=1.0):
            return self.act(self.a(u) + self.b(v)) * scale

    net = TwoInputs()
    u, v = torch.randn(6, 2), torch.randn(6, 5)
    seen = capture_inputs(net, (u, v), layers="act", max_samples=2)
    assert list(seen) == ["act"] and seen["act"].shape == (2, 3)
    seen = capture_inputs(net, {"u": u, "v": v, "scale": 2.0})
    assert torch.equal(seen["a"], u) and torch.equal(seen["b"], v)


def test_layer_called_several_times_concatenates_along_axis_0():
    class Shared(nn.Module):
        def __init__(self):
            super().__init__()
            self.lin = nn.Linear(4, 4)
            self.conv = nn.Conv1d(2, 2, 3, padding=1)

        def forward(self, x, seq):
            y = self.lin(self.lin(x))
            z = self.lin(seq)  # a different leading shape: flattened to (-1, in_features)
            c = self.conv(self.conv(torch.ones(1, 2, 5))).sum() + self.conv(torch.ones(1, 2, 7)).sum()
            return y.sum() + z.sum() + c

    net = Shared()
    x, seq = torch.randn(3, 4), torch.randn(2, 5, 4)
    with pytest.warns(UserWarning, match="keeping the first call"):
        seen = capture_inputs(net, (x, seq))
    assert seen["lin"].shape == (3 + 3 + 10, 4)
    assert torch.equal(seen["lin"][:3], x)
    assert seen["conv"].shape == (1, 2, 5)


def test_layers_that_never_run_are_left_out_unless_named():
    class Spare(nn.Module):
        def __init__(self):
            super().__init__()
            self.used, self.spare = nn.Linear(4, 4), nn.Linear(4, 4)  # spare is never called

        def forward(self, x):
            return self.used(x)

    net = Spare()
    assert list(capture_inputs(net, torch.randn(2, 4))) == ["used"]
    with pytest.raises(ValueError, match=r"\['spare'\] did not run"):
        capture_inputs(net, torch.randn(2, 4), layers=["spare"])


# ---------------------------------------------------------------------------- layer_output / macs
@pytest.mark.parametrize(
    "layer, shape",
    [
        (nn.Linear(5, 3), (4, 5)),
        (nn.Linear(5, 3, bias=False), (2, 6, 5)),
        (nn.Conv1d(4, 6, 3, stride=2, padding=2, dilation=2, groups=2), (2, 4, 11)),
        (nn.Conv2d(3, 4, (3, 2), padding="same", padding_mode="circular"), (2, 3, 7, 6)),
        (nn.Conv2d(4, 4, 3, groups=4, padding=1, padding_mode="reflect", bias=False), (1, 4, 6, 6)),
        (nn.Conv2d(2, 3, 3, padding=1, padding_mode="replicate"), (3, 5, 5)[:0] + (1, 2, 5, 5)),
        (nn.Conv3d(2, 2, 2, stride=(1, 2, 1)), (1, 2, 4, 4, 3)),
    ],
)
def test_layer_output_equals_the_module_forward(layer, shape):
    # reference: the torch module's own forward
    x = torch.randn(*shape)
    with torch.no_grad():
        assert torch.equal(layer_output(layer, x), layer(x))
    w_grid = fit_weight(layer, 4, "minmax")
    got = layer_output(layer, x, weight_grid=w_grid)
    ref_layer = type(layer).__new__(type(layer))
    ref_layer.__dict__.update(layer.__dict__)
    ref_layer._parameters = dict(layer._parameters)
    ref_layer._parameters["weight"] = nn.Parameter(quantize(layer.weight.detach(), w_grid))
    with torch.no_grad():
        assert torch.equal(got, ref_layer(x))


def test_layer_macs():
    assert layer_macs(nn.Linear(64, 10), (1, 64)) == 640
    assert layer_macs(nn.Linear(64, 10), (8, 5, 64)) == 8 * 5 * 640
    # out 16x16 positions * 8 out channels * (4 / 2 groups) * 3 * 3
    assert layer_macs(nn.Conv2d(4, 8, 3, stride=2, padding=1, groups=2), (1, 4, 32, 32)) == 16 * 16 * 8 * 2 * 9
    assert layer_macs(nn.Conv1d(2, 3, 5), (2, 2, 20)) == 2 * 16 * 3 * 2 * 5


# ---------------------------------------------------------------------------- layer_error
def test_layer_error_matches_a_hand_computed_comparison():
    torch.manual_seed(1)
    lin, x = nn.Linear(16, 8), torch.randn(32, 16)
    wg, ig = fit_weight(lin, 3, "mse"), fit_range(x, 5, "minmax")
    with torch.no_grad():
        ref = F.linear(x, lin.weight, lin.bias)
        approx = F.linear(quantize(x, ig), quantize(lin.weight, wg), lin.bias)
    assert layer_error(lin, x, wg, ig) == error_stats(ref, approx)
    assert math.isinf(layer_error(lin, x).sqnr_db)
    e_in = layer_error(lin, x, input_grid=ig)
    e_w = layer_error(lin, x, weight_grid=wg)
    assert e_in.sqnr_db > e_w.sqnr_db  # 5-bit inputs beat 3-bit weights here


def test_weight_grids_are_per_output_channel():
    conv = nn.Conv2d(3, 5, 3)
    g = fit_weight(conv, 4)
    assert g.axis == 0 and g.scale.shape == (5,)
    assert isinstance(fit_weight(conv, 4, per_channel=False).scale, float)
    with pytest.raises(ValueError, match="per-channel values"):
        layer_error(conv, torch.randn(1, 3, 5, 5), weight_grid=fit_range(torch.randn(4, 3), 4, axis=0))


# ---------------------------------------------------------------------------- model_error
def test_model_error_equals_a_hand_quantized_forward(digits):
    net, x, y = digits
    seen = capture_inputs(net, x)
    settings = {"0": LayerSetting(input=fit_range(seen["0"], 4, "minmax")),
                "4": LayerSetting(weight=fit_weight(net[4], 3, "mse"), input=fit_range(seen["4"], 6))}
    with torch.no_grad():
        h = F.relu(F.linear(quantize(x, settings["0"].input), net[0].weight, net[0].bias))
        h = F.relu(net[2](h))
        manual = F.linear(quantize(h, settings["4"].input), quantize(net[4].weight, settings["4"].weight),
                          net[4].bias)
    assert torch.equal(forward_quantized(net, x, settings), manual)
    res = model_error(net, x, settings, metric=accuracy, target=y)
    assert res.output == error_stats(forward_float(net, x), manual)
    assert res.metric_quantized == accuracy(manual, y)
    assert res.drop == res.metric_float - res.metric_quantized  # the one sign: float - quantized
    empty = model_error(net, x, {"2": LayerSetting()})
    assert math.isinf(empty.output.sqnr_db) and empty.layers == ()


def test_model_error_user_hooks_see_the_quantized_output_and_survive():
    torch.manual_seed(2)
    net = nn.Sequential(nn.Linear(4, 4))
    seen = []
    net[0].register_forward_hook(lambda m, i, o: seen.append(o.clone()))
    x = torch.randn(3, 4)
    grid = UniformGrid(2, 0.5)
    out = forward_quantized(net, x, {"0": LayerSetting(weight=grid)})
    assert torch.equal(seen[-1], out)
    assert len(net[0]._forward_hooks) == 1


def test_model_error_with_tuple_output():
    class Pair(nn.Module):
        def __init__(self):
            super().__init__()
            self.lin = nn.Linear(3, 3)

        def forward(self, x):
            y = self.lin(x)
            return y, {"twice": 2 * y, "index": torch.arange(3)}

    net = Pair()
    res = model_error(net, torch.randn(4, 3), {"lin": LayerSetting(weight=UniformGrid(4, 0.05))})
    assert res.output.n == 24  # both float tensors, the integer one left out


def test_subclass_with_other_arithmetic_is_measured_with_its_own_forward():
    # naive loop written here: deep copy, overwrite the weight with its quantized value, forward
    class Scaled(nn.Linear):
        def forward(self, x):
            return 2 * super().forward(x)

    torch.manual_seed(3)
    x = torch.randn(2, 3)
    grid = UniformGrid(4, 0.05)
    net = nn.Sequential(Scaled(3, 3))
    before = snapshot(net)
    res = model_error(net, x, {"0": LayerSetting(weight=grid)})
    copy_ = copy.deepcopy(net)
    with torch.no_grad():
        copy_[0].weight.copy_(quantize(copy_[0].weight, grid))
        assert res.output == error_stats(net(x), copy_(x))
    assert_untouched(net, before)


def test_attention_output_projection_is_a_weight_only_entry():
    mha = nn.MultiheadAttention(4, 1)  # its out_proj weight is used without calling out_proj
    torch.manual_seed(4)
    x = torch.randn(3, 1, 4)

    class Wrap(nn.Module):
        def __init__(self):
            super().__init__()
            self.att = mha

        def forward(self, x):
            return self.att(x, x, x)[0]

    net = Wrap()
    grid = UniformGrid(4, 0.1)
    res = model_error(net, x, {"att.out_proj": LayerSetting(weight=grid)})
    naive = copy.deepcopy(net).eval()  # naive loop: deep copy, overwrite, full forward
    with torch.no_grad():
        naive.att.out_proj.weight.copy_(quantize(naive.att.out_proj.weight, grid))
        assert res.output == error_stats(net.eval()(x), naive(x))
    # its input is the attention's context, quantized in the written-out attention; an
    # attention with bias_k / bias_v is not written out, and there out_proj stays weight-only
    assert model_error(net, x, {"att.out_proj": LayerSetting(input=grid)}).output.sqnr_db < math.inf
    net.att = nn.MultiheadAttention(4, 1, add_bias_kv=True)
    with pytest.raises(ValueError, match="weight-only entry"):
        model_error(net, x, {"att.out_proj": LayerSetting(input=grid)})


# ---------------------------------------------------------------------------- untouched
def test_every_function_leaves_a_training_mode_batchnorm_model_untouched(convbn):
    net, x = convbn
    before = snapshot(net)
    assert net.training and net.bn1.training
    seen = capture_inputs(net, x, max_samples=4)
    assert quantizable_layers(net, x) == ["conv1", "conv2", "fc"]
    settings = {}
    for name, inp in seen.items():
        layer = net.get_submodule(name)
        settings[name] = LayerSetting(weight=fit_weight(layer, 4), input=fit_range(inp, 6, "percentile"))
        layer_error(layer, inp, settings[name].weight, settings[name].input)
        layer_output(layer, inp)
        layer_macs(layer, inp.shape)
    res = model_error(net, x, settings, metric=lambda o, t: float(o.mean()), target=None)
    assert res.metric_float is not None and math.isfinite(res.output.sqnr_db)
    forward_float(net, x)
    forward_quantized(net, x, settings)
    assert_untouched(net, before)
    # eval mode was used: BatchNorm running statistics, not batch statistics, and no dropout
    ref = net.eval()(x)
    net.train()
    assert torch.equal(forward_float(net, x), ref.detach())
    assert_untouched(net, before)


# ---------------------------------------------------------------------------- bad input
def _calls(net, data, settings):
    """Every public entry point that takes a model and data."""
    return [
        lambda: capture_inputs(net, data),
        lambda: model_error(net, data, settings),
        lambda: forward_quantized(net, data, settings),
        lambda: quantizable_layers(net, data),
    ]


def test_model_must_be_a_module():
    for call in _calls("not a model", torch.randn(2, 3), {}):
        with pytest.raises(TypeError, match="model must be a torch.nn.Module, got str"):
            call()


def test_data_the_model_rejects_is_reported_with_its_cause(convbn):
    net, _ = convbn
    before = snapshot(net)
    wrong = torch.randn(2, 5, 8, 8)  # 5 channels, conv1 expects 3
    for call in _calls(net, wrong, {"fc": LayerSetting(weight=UniformGrid(4, 0.1))}):
        with pytest.raises(RuntimeError, match="the model's forward failed on the given data") as info:
            call()
        assert "shape (2, 5, 8, 8)" in str(info.value)
        assert isinstance(info.value.__cause__, RuntimeError)
        assert_untouched(net, before)


def test_model_with_no_quantizable_layers():
    net = nn.Sequential(nn.ReLU(), nn.BatchNorm1d(3))
    before = snapshot(net)
    for call in (lambda: capture_inputs(net, torch.randn(2, 3)),
                 lambda: quantizable_layers(net, torch.randn(2, 3))):
        with pytest.raises(ValueError, match="no quantizable layers .* BatchNorm1d, ReLU, Sequential"):
            call()
    assert_untouched(net, before)


def test_unknown_layer_names_list_the_available_ones(convbn):
    net, x = convbn
    before = snapshot(net)
    with pytest.raises(ValueError, match=r"\['conv9'\] not found .* \['conv1', 'conv2', 'fc'\]"):
        capture_inputs(net, x, layers=["conv1", "conv9"])
    with pytest.raises(ValueError, match="'conv9', which is not in the model.*'conv1'"):
        model_error(net, x, {"conv9": LayerSetting()})
    with pytest.raises(ValueError, match="layers is empty"):
        capture_inputs(net, x, layers=[])
    assert_untouched(net, before)


def test_layer_types_that_cannot_be_evaluated_functionally(convbn):
    net, x = convbn
    before = snapshot(net)
    with pytest.raises(TypeError, match="MaxPool2d; qwidgets evaluates only nn.Linear"):
        layer_error(nn.MaxPool2d(2), torch.randn(1, 2, 4, 4))
    with pytest.raises(ValueError, match=r"settings names layer 'bn1', which is not in the model"):
        model_error(net, x, {"bn1": LayerSetting(input=UniformGrid(8, 0.1))})
    with pytest.raises(TypeError, match="settings\\['fc'\\] must be a LayerSetting"):
        model_error(net, x, {"fc": UniformGrid(8, 0.1)})
    with pytest.raises(ValueError, match="do not fit Linear"):
        layer_error(nn.Linear(3, 2), torch.randn(4, 5))
    assert_untouched(net, before)


def test_data_and_model_on_different_devices(convbn):
    net, x = convbn
    meta = ConvBN().to("meta")
    before = snapshot(meta)
    for call in _calls(meta, x, {}):
        with pytest.raises(ValueError, match="data is on cpu but the model's parameters are on meta"):
            call()
    assert_untouched(meta, before)


def test_empty_data(convbn):
    net, _ = convbn
    before = snapshot(net)
    for data, words in ((torch.empty(0, 3, 8, 8), "data is empty"), ((), "data holds no tensor"),
                        ({"x": torch.empty(0)}, "data\\['x'\\] is empty")):
        for call in _calls(net, data, {}):
            with pytest.raises(ValueError, match=words):
                call()
    with pytest.raises(ValueError, match="inputs is empty"):
        layer_error(net.fc, torch.empty(0, 64))
    with pytest.raises(ValueError, match="max_samples must be None or an int >= 1, got 0"):
        capture_inputs(net, torch.randn(2, 3, 8, 8), max_samples=0)
    assert_untouched(net, before)


def test_unknown_method_or_style_through_fit_weight():
    with pytest.raises(ValueError, match="method must be one of 'minmax', 'percentile', 'mse', got 'max'"):
        fit_weight(nn.Linear(2, 2), 4, "max")
    with pytest.raises(ValueError, match="style must be one of"):
        fit_weight(nn.Linear(2, 2), 4, style="floor")
    with pytest.raises(ValueError, match="percentile must be in"):
        fit_weight(nn.Linear(2, 2), 4, "percentile", percentile=0.0)


def test_nan_and_inf_in_data_or_captured_inputs_name_the_place(convbn):
    net, x = convbn
    before = snapshot(net)
    bad = x.clone()
    bad[0, 0, 0, 0] = float("nan")
    for call in _calls(net, bad, {}):
        with pytest.raises(ValueError, match="data holds 1 NaN and 0 inf"):
            call()
    with pytest.raises(ValueError, match="inputs holds 0 NaN and 1 inf"):
        layer_error(net.fc, torch.tensor([[math.inf] + [0.0] * 63]))
    assert_untouched(net, before)

    class Blows(nn.Module):  # finite data, an infinite activation inside
        def __init__(self):
            super().__init__()
            self.a, self.b = nn.Linear(2, 2), nn.Linear(2, 1)

        def forward(self, x):
            return self.b(self.a(x) / 0.0)

    blows = Blows()
    before = snapshot(blows)
    with torch.no_grad():
        blows.a.bias.fill_(1.0)
        blows.a.weight.zero_()
    before = snapshot(blows)
    for call in (lambda: capture_inputs(blows, torch.ones(3, 2)),
                 lambda: model_error(blows, torch.ones(3, 2), {"b": LayerSetting(input=UniformGrid(4, 1.0))})):
        with pytest.raises(ValueError, match=r"the input of layer 'b' \(Linear\(in_features=2.*6 inf"):
            call()
        assert_untouched(blows, before)


def test_bad_settings_metric_and_layers_arguments(convbn):
    net, x = convbn
    before = snapshot(net)
    with pytest.raises(TypeError, match="settings must be a mapping"):
        model_error(net, x, [LayerSetting()])
    with pytest.raises(TypeError, match="metric must be a callable"):
        model_error(net, x, {}, metric="accuracy")
    with pytest.raises(TypeError, match="metric\\(output, target\\) must return a float, got str"):
        model_error(net, x, {}, metric=lambda o, t: "high")
    with pytest.raises(TypeError, match="layers must be None or a list"):
        capture_inputs(net, x, layers=3)
    with pytest.raises(TypeError, match="data must be a tensor, a numpy array, a tuple"):
        capture_inputs(net, "pixels")
    assert_untouched(net, before)


def test_no_warnings_on_plain_use(digits):
    net, x, _ = digits
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        capture_inputs(net, x)
