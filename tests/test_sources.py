"""Data sources (tensor, tuple, dict, numpy, DataLoader, iterables) and output handling."""

from __future__ import annotations

import json
import subprocess
import sys
from collections import namedtuple

import numpy as np
import pytest
import torch
from conftest import F32_EPS, f32_sqnr_tol_db
from hypothesis import given, settings
from hypothesis import strategies as st
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

from qwidgets import (
    LayerSetting,
    UniformGrid,
    capture_inputs,
    error_stats,
    evaluate_plan,
    layer_error,
    model_error,
    plan_budget,
    scan,
)
from qwidgets.model.sources import data_source
from qwidgets.model.statistics import RangeSample
from tests.test_probe import assert_untouched, snapshot


def _net():
    torch.manual_seed(0)
    return nn.Sequential(nn.Conv1d(2, 6, 3, padding=1), nn.ReLU(), nn.Flatten(), nn.Linear(6 * 16, 5))


def _loader(x, batch_size=8):
    return DataLoader(TensorDataset(x), batch_size=batch_size)  # yields (x,) tuples: model(*batch)


@pytest.mark.parametrize("quantize", ["weight", "input", "both"])
def test_dataloader_of_four_batches_gives_the_concatenated_table(quantize):
    net, x = _net(), torch.randn(32, 2, 16)
    before = snapshot(net)
    whole = scan(net, x, bits=(3, 5, 8), quantize=quantize, method="mse", progress=False)
    parts = scan(net, _loader(x), bits=(3, 5, 8), quantize=quantize, method="mse", progress=False)
    for scope in ("layer", "model"):
        assert np.allclose(whole.sqnr_array(scope), parts.sqnr_array(scope), atol=0.01, rtol=0)
    assert parts.n_samples == 32
    assert_untouched(net, before)


def test_numpy_generator_and_max_samples():
    net, x = _net(), torch.randn(20, 2, 16)
    t1 = scan(net, x[:12], bits=(4,), progress=False)
    t2 = scan(net, x.numpy().astype(np.float64), bits=(4,), max_samples=12, progress=False)
    t3 = scan(net, ((b,) for b in x.split(5)), bits=(4,), max_samples=12, progress=False)  # one-shot
    for t in (t2, t3):
        assert t.n_samples == 12
        assert np.allclose(t.sqnr_array("model"), t1.sqnr_array("model"), atol=0.01)
    seen = capture_inputs(net, _loader(x, 6), max_samples=15)
    assert seen["0"].shape == (15, 2, 16) and torch.equal(seen["0"], x[:15])


def test_model_error_and_evaluate_plan_stream_batches_with_targets():
    net, x = _net(), torch.randn(24, 2, 16)
    y = torch.randint(0, 5, (24,))
    settings = {"3": LayerSetting(weight=UniformGrid(4, 0.02))}

    def acc(out, target):
        return float((out.argmax(1) == target).float().mean())

    whole = model_error(net, x, settings, metric=acc, target=y)
    parts = model_error(net, _loader(x, 6), settings, metric=acc, target=list(y.split(6)))
    # batches of 6 and of 24 round the float32 outputs differently (other blockings)
    assert parts.output.sqnr_db == pytest.approx(whole.output.sqnr_db, abs=f32_sqnr_tol_db(whole.output.sqnr_db))
    assert parts.metric_quantized == pytest.approx(whole.metric_quantized)  # equal batches: mean of means
    plan = plan_budget(scan(net, x, bits=(4, 8), progress=False), mean_bits=6)
    r1 = evaluate_plan(net, x, plan)
    r2 = evaluate_plan(net, iter([(b,) for b in x.split(10)]), plan)
    assert r2.measured_sqnr_db == pytest.approx(r1.measured_sqnr_db, abs=f32_sqnr_tol_db(r1.measured_sqnr_db))
    lin = nn.Linear(4, 3)
    xs = torch.randn(30, 4)
    g = UniformGrid(3, 0.1)
    whole_layer = layer_error(lin, xs, weight_grid=g).sqnr_db
    assert layer_error(lin, iter(xs.split(7)), weight_grid=g).sqnr_db == pytest.approx(
        whole_layer, abs=f32_sqnr_tol_db(whole_layer))


def test_output_selector_and_structured_outputs():
    class Net(nn.Module):
        def __init__(self):
            super().__init__()
            self.a = nn.Linear(4, 4)

        def forward(self, x):
            P = namedtuple("P", "logits hidden")
            h = self.a(x)
            return P(h, [2 * h])

    torch.manual_seed(1)
    net, x = Net(), torch.randn(8, 4)
    s = {"a": LayerSetting(weight=UniformGrid(3, 0.1))}
    only = model_error(net, x, s, output=lambda o: o.logits)
    with torch.no_grad():
        ref = net(x).logits
        q = torch.nn.functional.linear(x, torch.round(net.a.weight / 0.1).clamp(-4, 3) * 0.1, net.a.bias)
    assert only.output.sqnr_db == pytest.approx(error_stats(ref, q).sqnr_db, abs=1e-6)
    t = scan(net, x, bits=(3,), output=lambda o: o.logits, progress=False)
    same = model_error(net, x, {"a": LayerSetting(weight=t.weight_grid("a", 3))}, output=lambda o: o.logits)
    assert t.sqnr_db("a", 3) == pytest.approx(same.output.sqnr_db, abs=1e-6)
    both = model_error(net, x, s)  # default: logits and the list's tensor, both compared
    assert both.output.n == 2 * only.output.n


def test_constant_or_integer_output_gets_a_clear_error():
    net = nn.Sequential(nn.Linear(3, 4), nn.ReLU(), nn.Linear(4, 2))
    nn.init.zeros_(net[2].weight)
    nn.init.zeros_(net[2].bias)  # a head initialised to zero
    x = torch.randn(5, 3)
    with pytest.raises(ValueError, match="all zeros on this data.*output="):
        scan(net, x, bits=(4,), progress=False)
    with pytest.raises(ValueError, match="all zeros"):
        model_error(net, x, {"0": LayerSetting(weight=UniformGrid(4, 0.1))})

    class Argmax(nn.Module):
        def __init__(self):
            super().__init__()
            self.a = nn.Linear(3, 4)

        def forward(self, x):
            return self.a(x).argmax(1)

    with pytest.raises(ValueError, match="no floating-point tensor.*output="):
        scan(Argmax(), x, bits=(4,), progress=False)


def test_bad_data_sources_are_named():
    net = _net()
    with pytest.raises(TypeError, match="data must be a tensor, a numpy array"):
        scan(net, 3.0, progress=False)
    with pytest.raises(ValueError, match="data gave no batch"):
        scan(net, iter([]), progress=False)
    with pytest.raises(TypeError, match="data batch 1 must be a tensor"):
        list(data_source(net, iter([torch.zeros(1, 2, 16), "text"])))
    with pytest.raises(TypeError, match="output must be None or a function"):
        scan(net, torch.randn(2, 2, 16), output="logits", progress=False)


def test_range_sample_keeps_extremes_and_is_bounded():
    r = RangeSample(limit=1000)
    torch.manual_seed(2)
    batches = [torch.randn(700) for _ in range(5)]
    for b in batches:
        r.add(b)
    allv = torch.cat(batches)
    assert r.lo == float(allv.min()) and r.hi == float(allv.max())
    assert r.values().numel() <= 1002 and r.count == 3500


_PEAK = r"""
import json, sys, torch
from torch import nn
from torch.utils.data import DataLoader, TensorDataset
from qwidgets import scan


def rss(field):
    with open("/proc/self/status") as f:
        return next(int(l.split()[1]) for l in f if l.startswith(field)) * 1024


torch.set_num_threads(1)
torch.manual_seed(0)
net = nn.Sequential(nn.Conv2d(3, 16, 3, padding=1), nn.ReLU(), nn.Conv2d(16, 16, 3, padding=1),
                    nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(16, 4))
x = torch.randn(256, 3, 32, 32)
data = x if sys.argv[1] == "tensor" else DataLoader(TensorDataset(x), batch_size=64)
scan(net, x[:4], bits=(4, 8), progress=False)  # warm up: libraries loaded before the baseline
base = rss("VmRSS:")
scan(net, data, bits=(4, 8), progress=False)
print(json.dumps(rss("VmHWM:") - base))
"""


def test_streamed_scan_has_lower_peak_memory():
    # peak resident memory above the baseline, each in a fresh process (no timing involved):
    # 256 images at once against a DataLoader of 4 batches of 64
    peaks = {}
    for kind in ("tensor", "loader"):
        out = subprocess.run([sys.executable, "-c", _PEAK, kind], capture_output=True, text=True,
                             check=True)
        peaks[kind] = json.loads(out.stdout.strip().splitlines()[-1])
    assert peaks["tensor"] > 32 << 20, peaks  # the whole batch's activations were resident
    assert peaks["loader"] < 0.6 * peaks["tensor"], peaks


@settings(max_examples=25, deadline=None)
@given(st.lists(st.integers(1, 9), min_size=1, max_size=6), st.integers(2, 8))
def test_any_split_into_batches_gives_the_same_errors(sizes, bits):
    # invariant: float64 sums over batches equal the sums over the concatenated tensor, up to
    # the float32 rounding of outputs computed under other batch shapes (f32_sqnr_tol_db)
    torch.manual_seed(sum(sizes))
    net = nn.Sequential(nn.Linear(3, 4), nn.Tanh(), nn.Linear(4, 2))
    x = torch.randn(sum(sizes), 3)
    s = {"0": LayerSetting(weight=UniformGrid(bits, 0.05))}
    whole = model_error(net, x, s).output
    split = model_error(net, iter(x.split(sizes)), s).output
    assert split.sqnr_db == pytest.approx(whole.sqnr_db, abs=f32_sqnr_tol_db(whole.sqnr_db))
    # the largest error moves by the outputs' rounding: a few float32 ulps of the outputs
    assert split.n == whole.n and split.max_abs == pytest.approx(whole.max_abs, abs=64 * F32_EPS)
    r = RangeSample(limit=10_000)
    for part in x.split(sizes):
        r.add(part)
    assert torch.equal(r.values(), x.reshape(-1))  # under the limit: every value, in order
