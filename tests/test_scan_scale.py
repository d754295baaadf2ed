"""The scan at scale: residual networks replayed from a trace, batches, the gain estimate, executors.

Outside checks:
- model scope of a residual network (a small network with ResNet-18's block layout, written
  here) equals the naive loop written here (deep copy, overwrite one weight, full forward) to
  0.01 dB, on every available device;
- a scan cut into batches equals one scan of all samples (the SQNR of summed powers is the
  SQNR over all samples: definition of SQNR as a ratio of total powers);
- the gain estimate is exact where the rest of the model is linear (additive noise model,
  Widrow & Kollar 2008, Quantization Noise: the output error is J e), checked against the
  naive loop, and within the spread of Hutchinson's estimator where it uses random probes;
- scans on a thread pool, a process pool and a two-process Dask cluster equal the serial scan
  to 1e-4 dB.
"""

from __future__ import annotations

import json
import multiprocessing
from concurrent.futures import Executor, ProcessPoolExecutor, ThreadPoolExecutor

import numpy as np
import pytest
import torch
from naive_loops import naive_weight_sqnr_db
from torch import nn

from qwidgets.core.ranges import fit_range
from qwidgets.core.rounding import quantize
from qwidgets.model.layers import layer_forward
from qwidgets.planning import gain_dots, gain_probes
from qwidgets.planning.gain_probes import probe_count
from qwidgets.planning.scanning import scan
from qwidgets.planning.table import SensitivityTable

DEVICES = ["cpu"] + (["cuda"] if torch.cuda.is_available() else [])


class _Block(nn.Module):
    """ResNet's basic block: two 3x3 convs with BatchNorm, a skip (1x1 conv when shapes change)."""

    def __init__(self, c_in, c_out, stride):
        super().__init__()
        self.c1 = nn.Conv2d(c_in, c_out, 3, stride, 1, bias=False)
        self.b1 = nn.BatchNorm2d(c_out)
        self.c2 = nn.Conv2d(c_out, c_out, 3, 1, 1, bias=False)
        self.b2 = nn.BatchNorm2d(c_out)
        self.down = (nn.Sequential(nn.Conv2d(c_in, c_out, 1, stride, bias=False), nn.BatchNorm2d(c_out))
                     if stride != 1 or c_in != c_out else nn.Identity())

    def forward(self, x):
        return torch.relu(self.b2(self.c2(torch.relu(self.b1(self.c1(x))))) + self.down(x))


def _resnet(width=4) -> nn.Module:
    """Stem, two stages of two blocks each (the second strided), pooling and a Linear head."""
    torch.manual_seed(0)
    net = nn.Sequential(nn.Conv2d(3, width, 3, 1, 1, bias=False), nn.BatchNorm2d(width), nn.ReLU(),
                        _Block(width, width, 1), _Block(width, width, 1),
                        _Block(width, 2 * width, 2), _Block(2 * width, 2 * width, 1),
                        nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(2 * width, 5))
    with torch.no_grad():
        for m in net.modules():
            if isinstance(m, nn.BatchNorm2d):
                m.running_mean.uniform_(-0.1, 0.1)
                m.running_var.uniform_(0.5, 1.5)
    return net.eval()


def _mlp() -> nn.Module:
    torch.manual_seed(3)
    return nn.Sequential(nn.Linear(6, 12), nn.ReLU(), nn.Linear(12, 8), nn.Tanh(), nn.Linear(8, 3)).eval()



def _state(model):
    return ({k: v.clone() for k, v in model.state_dict().items()},
            [(m.training, len(m._forward_hooks), len(m._forward_pre_hooks)) for m in model.modules()])


def _same_state(model, snap) -> bool:
    state, flags = snap
    return all(torch.equal(v, state[k]) for k, v in model.state_dict().items()) and flags == [
        (m.training, len(m._forward_hooks), len(m._forward_pre_hooks)) for m in model.modules()]


# ---------------------------------------------------------------------------- residual, exact
@pytest.mark.parametrize("device", DEVICES)
def test_residual_model_scope_equals_naive_loop_from_the_replayed_suffix(device):
    net = _resnet().to(device)
    x = torch.randn(6, 3, 12, 12, generator=torch.Generator().manual_seed(1)).to(device)
    snap = _state(net)
    t = scan(net, x, bits=(2, 4, 8), method="minmax", progress=False)
    assert _same_state(net, snap)
    assert len(t.layers) == 1 + 2 * 4 + 1 + 1  # stem, 8 block convs, one 1x1 skip conv, head
    assert all(t.model_pass(n) == "suffix" for n in t.layers)  # no full forward per bit width
    for name in t.layers:
        assert t.weight_grid(name, 4).scale.device.type == device
        for b in t.bits:
            assert abs(t.sqnr_db(name, b) - naive_weight_sqnr_db(net, x, name, t.weight_grid(name, b))) <= 0.01


def test_replay_is_kept_when_the_passes_run_on_fewer_threads(monkeypatch):
    # the passes may run on one thread while torch is set to two; the reference outputs must
    # be recorded on the passes' threads, or a 200-wide layer's float rounding differs and the
    # replay (checked bit for bit) is refused for slower forward passes
    from qwidgets.planning import scanning

    torch.manual_seed(9)
    mix, xm = _MixBatch(width=200).eval(), torch.randn(7, 6)
    before = torch.get_num_threads()
    monkeypatch.setattr(scanning, "pass_threads", lambda model: 1)
    try:
        torch.set_num_threads(2)
        t = scan(mix, xm, bits=(3, 6), progress=False)
    finally:
        torch.set_num_threads(before)
    assert {t.model_pass(n) for n in t.layers} == {"suffix"}
    for b in t.bits:  # and the numbers are the naive loop's
        assert t.sqnr_db("a", b) == pytest.approx(naive_weight_sqnr_db(mix, xm, "a", t.weight_grid("a", b)), abs=1e-3)


# ---------------------------------------------------------------------------- batches
@pytest.mark.parametrize("device", DEVICES)
def test_batches_give_the_scan_of_all_samples(device):
    net = _resnet().to(device)
    x = torch.randn(10, 3, 8, 8, generator=torch.Generator().manual_seed(2)).to(device)
    whole = scan(net, x, bits=(3, 6), method="mse", progress=False)
    cut = scan(net, x, bits=(3, 6), method="mse", progress=False, batch_size=4)  # 4 + 4 + 2
    assert cut.n_samples == 10
    for scope in ("layer", "model"):
        np.testing.assert_allclose(cut.sqnr_array(scope), whole.sqnr_array(scope), atol=1e-6)


def test_batches_with_input_grids_give_the_scan_of_all_samples():
    # min-max input ranges over batches are the min-max of all samples (definition)
    net = _mlp()
    x = torch.randn(9, 6, generator=torch.Generator().manual_seed(4))
    whole = scan(net, x, bits=(3, 8), quantize="both", method="minmax", progress=False)
    cut = scan(net, x, bits=(3, 8), quantize="both", method="minmax", progress=False, batch_size=4)
    for name in whole.layers:
        assert whole.input_grid(name, 3).scale == pytest.approx(cut.input_grid(name, 3).scale, rel=1e-6)
    for scope in ("layer", "model"):
        np.testing.assert_allclose(cut.sqnr_array(scope), whole.sqnr_array(scope), atol=1e-4)


# ---------------------------------------------------------------------------- gain estimate
class _Times3(nn.Module):
    def forward(self, x):
        return 3.0 * x


class _MixBatch(nn.Module):
    """Adds the batch mean after the first layer, then a linear head: samples interact."""

    def __init__(self, width=8):
        super().__init__()
        self.a = nn.Linear(6, width)
        self.b = nn.Linear(width, 3)

    def forward(self, x):
        h = self.a(x)
        return self.b(h + h.mean(0, keepdim=True))


@pytest.mark.parametrize("device", DEVICES)
@pytest.mark.parametrize("rest", ["times 3", "linear head", "batch-mixing linear head"])
def test_gain_estimate_is_exact_where_the_rest_of_the_model_is_linear(rest, device):
    # additive-noise model (Widrow & Kollar 2008): when what follows layer "0" / "a" is linear,
    # the model's output error is exactly J e for every bit width and every noise pattern, so
    # the estimate (one-hot probes: few output values) equals the naive loop written here
    torch.manual_seed(9)
    net, name = {"times 3": (nn.Sequential(nn.Linear(6, 8), _Times3()), "0"),
                 "linear head": (nn.Sequential(nn.Linear(6, 8), nn.Linear(8, 5)), "0"),
                 "batch-mixing linear head": (_MixBatch(), "a")}[rest]
    net = net.eval().to(device)
    x = torch.randn(7, 6).to(device)
    snap = _state(net)
    gain = scan(net, x, bits=(2, 3, 5, 8), progress=False, estimate="gain")
    assert _same_state(net, snap) and all(p.grad is None for p in net.parameters())
    assert gain.model_pass(name) == "probes"
    for b in gain.bits:
        # float32 outputs, float64 sums: equal to 1e-3 dB
        assert abs(gain.sqnr_db(name, b) - naive_weight_sqnr_db(net, x, name, gain.weight_grid(name, b))) <= 1e-3


class _Thresholded(nn.Module):
    """Layer a reaches the output only through a threshold (no gradient), layer b directly."""

    def __init__(self):
        super().__init__()
        self.a = nn.Linear(6, 8)
        self.b = nn.Linear(6, 8)

    def forward(self, x):
        return (self.a(x) > 0).float() + self.b(x)


def test_gain_estimate_measures_exactly_what_gradients_do_not_reach():
    torch.manual_seed(11)
    net, x = _Thresholded().eval(), torch.randn(9, 6)
    gain = scan(net, x, bits=(2, 4), progress=False, estimate="gain")
    assert (gain.model_pass("a"), gain.model_pass("b")) == ("suffix", "probes")
    for name in ("a", "b"):
        for b in gain.bits:  # the naive loop written here (inf where no threshold flips)
            want = naive_weight_sqnr_db(net, x, name, gain.weight_grid(name, b))
            assert gain.sqnr_db(name, b) == pytest.approx(want, abs=1e-3)
    assert np.isfinite(gain.sqnr_db("a", 2))  # a flip at 2 bits, which a gradient cannot see


def test_gain_estimate_with_random_probes_is_unbiased_where_the_rest_is_linear(monkeypatch):
    # 100 output values per sample: random probes (Hutchinson's estimator: E[(r.Je)^2] =
    # ||Je||^2 for standard normal r; relative spread sqrt(2 / (probes x samples)) when the
    # samples contribute alike). Over 24 independent data sets and probe seeds the estimated /
    # exact noise ratio averages 1 within 4 standard errors
    torch.manual_seed(10)
    net = nn.Sequential(nn.Linear(6, 16), nn.Linear(16, 100)).eval()
    n = 32
    spread = np.sqrt(2 / (probe_count(n) * n))
    ratios = []
    for k in range(24):
        x = torch.randn(n, 6, generator=torch.Generator().manual_seed(100 + k))
        monkeypatch.setattr(gain_probes, "SEED", 1000 + k)
        gain = scan(net, x, bits=(3, 6), progress=False, estimate="gain")
        exact = scan(net, x, bits=(3, 6), progress=False)
        ratios.append(10 ** ((exact.sqnr_array("model") - gain.sqnr_array("model")) / 10))
    r = np.array(ratios)
    std = r.std(axis=0, ddof=1)
    assert (np.abs(r.mean(axis=0) - 1) <= 4 * std / np.sqrt(len(r))).all(), (r.mean(axis=0), std)
    # the spread is the formula's when samples contribute alike, more when a few dominate
    assert (std <= 2.5 * spread).all(), (std, spread)
    assert np.abs(r - 1).max() > 1e-3  # it is an estimate: not the exact numbers by another road


def test_gain_estimate_measures_a_large_batch_in_parts_with_the_same_numbers(monkeypatch):
    # samples kept apart, probes seeded per sample: halving a batch to bound memory must not
    # change the estimate; a model that mixes samples is then measured exactly (naive loop)
    net = _resnet()
    x = torch.randn(6, 3, 12, 12, generator=torch.Generator().manual_seed(5))
    whole = scan(net, x, bits=(3, 6), method="minmax", progress=False, estimate="gain")
    monkeypatch.setattr(gain_probes, "ERROR_BYTES", 4000)  # a few rows' errors of one layer
    measured, one_batch = [], gain_probes._one_batch

    def counting(model, piece, *args, **kwargs):
        measured.append(gain_probes.batch_size(piece))
        return one_batch(model, piece, *args, **kwargs)

    monkeypatch.setattr(gain_probes, "_one_batch", counting)
    parts = scan(net, x, bits=(3, 6), method="minmax", progress=False, estimate="gain")
    assert min(measured) == 1 and len(measured) > 6  # halved down to single samples
    # the same probes; float32 layer outputs of fewer rows round differently (1e-4 dB: executors)
    np.testing.assert_allclose(parts.sqnr_array("model"), whole.sqnr_array("model"), rtol=0, atol=1e-4)
    torch.manual_seed(9)
    mix, xm = _MixBatch(width=200).eval(), torch.randn(7, 6)
    t = scan(mix, xm, bits=(3, 6), progress=False, estimate="gain")
    assert t.model_pass("a") == "suffix"  # measured exactly
    for b in t.bits:
        assert t.sqnr_db("a", b) == pytest.approx(naive_weight_sqnr_db(mix, xm, "a", t.weight_grid("a", b)), abs=1e-3)


def test_gain_estimate_tracks_the_exact_model_scope_of_a_residual_network():
    net = _resnet()
    x = torch.randn(6, 3, 12, 12, generator=torch.Generator().manual_seed(5))
    exact = scan(net, x, bits=(3, 4, 6, 8), method="minmax", progress=False)
    gain = scan(net, x, bits=(3, 4, 6, 8), method="minmax", progress=False, estimate="gain")
    assert (exact.estimate, gain.estimate) == ("exact", "gain")
    assert {gain.model_pass(n) for n in gain.layers} == {"probes"}
    # the gain scan's layer scope comes from its probe pass's errors (other product shapes than
    # the layer pass's): float32 rounding only, far under 1e-4 dB here (the bound is derived in
    # test_gain_layer_scope.py)
    np.testing.assert_allclose(gain.sqnr_array("layer"), exact.sqnr_array("layer"), atol=1e-4)
    # the head's output is the model's (5 values a sample: one-hot probes): exact there
    np.testing.assert_allclose(gain.sqnr_array("model")[-1], exact.sqnr_array("model")[-1], atol=1e-3)
    # elsewhere the rest is nonlinear (ReLUs): first order, close where the error is small
    err = np.abs(gain.sqnr_array("model") - exact.sqnr_array("model"))
    assert np.median(err[:, 1:]) <= 0.5 and err[:, 2:].max() <= 1.0, err


def test_estimate_is_saved_and_shown(tmp_path):
    net = _mlp()
    t = scan(net, torch.randn(20, 6), bits=(4, 8), progress=False, estimate="gain")
    t.save(tmp_path / "t.json")
    back = SensitivityTable.load(tmp_path / "t.json")
    assert back.estimate == "gain" and "gain" in repr(back) and "estimated" in back._repr_html_()
    d = json.loads((tmp_path / "t.json").read_text())
    d["estimate"] = "guess"
    (tmp_path / "bad.json").write_text(json.dumps(d))
    with pytest.raises(ValueError, match="estimate"):
        SensitivityTable.load(tmp_path / "bad.json")
    del d["estimate"]  # a table written before the field existed holds exact model scopes
    (tmp_path / "old.json").write_text(json.dumps(d))
    assert SensitivityTable.load(tmp_path / "old.json").estimate == "exact"


def test_bad_arguments_are_named():
    net, x = _mlp(), torch.randn(4, 6)
    with pytest.raises(ValueError, match="estimate"):
        scan(net, x, estimate="fast", progress=False)
    with pytest.raises(ValueError, match="batch_size"):
        scan(net, x, batch_size=0, progress=False)
    with pytest.raises(TypeError, match="batch_size"):
        scan(net, x, batch_size=2.5, progress=False)
    with pytest.raises(TypeError, match="executor"):
        scan(net, x, executor=4, progress=False)


# ---------------------------------------------------------------------------- executors
def _assert_same_tables(a, b):
    assert a.layers == b.layers and a.bits == b.bits and a.n_samples == b.n_samples
    for scope in a.scopes:
        np.testing.assert_allclose(a.sqnr_array(scope), b.sqnr_array(scope), atol=1e-4)
    for name in a.layers:
        for bits in a.bits:
            assert torch.equal(a.weight_grid(name, bits).scale, b.weight_grid(name, bits).scale)


def test_thread_pool_gives_the_serial_table():
    net = _resnet()
    x = torch.randn(4, 3, 8, 8, generator=torch.Generator().manual_seed(6))
    snap = _state(net)
    serial = scan(net, x, bits=(2, 6), method="minmax", progress=False)
    with ThreadPoolExecutor(2) as pool:
        spread = scan(net, x, bits=(2, 6), method="minmax", progress=False, executor=pool)
    _assert_same_tables(serial, spread)
    assert _same_state(net, snap)


def test_process_pool_gives_the_serial_table():
    net = _mlp()  # standard modules only: a fresh process unpickles them without this file
    x = torch.randn(30, 6, generator=torch.Generator().manual_seed(7))
    serial = scan(net, x, bits=(2, 4, 8), quantize="both", progress=False, batch_size=16)
    with ProcessPoolExecutor(2, mp_context=multiprocessing.get_context("spawn")) as pool:
        spread = scan(net, x, bits=(2, 4, 8), quantize="both", progress=False, batch_size=16,
                      executor=pool)
    _assert_same_tables(serial, spread)


def test_dask_cluster_executor_gives_the_serial_table():
    import distributed  # a development dependency (pip install -e ".[dev]")
    net = _mlp()
    x = torch.randn(30, 6, generator=torch.Generator().manual_seed(8))
    serial = scan(net, x, bits=(3, 8), progress=False, estimate="gain")
    # two threads a worker: two tasks on each share the copy scattered to it
    with distributed.LocalCluster(n_workers=2, threads_per_worker=2, processes=True,
                                  dashboard_address=None, host="127.0.0.1") as cluster, \
            distributed.Client(cluster) as client:
        spread = scan(net, x, bits=(3, 8), progress=False, estimate="gain",
                      executor=client.get_executor())
    _assert_same_tables(serial, spread)
    assert spread.estimate == "gain"


class _RecordingClient:
    """A stand-in for a dask.distributed client that records what it is sent (its futures are
    the values themselves; tasks run in this process)."""

    def __init__(self, workers: int):
        self.workers, self.scattered, self.submitted = workers, [], []

    def nthreads(self):
        return {f"w{i}": 2 for i in range(self.workers)}

    def scatter(self, values, broadcast=False, hash=True):
        self.scattered.append((len(values), broadcast))
        return [("future", v) for v in values]

    def submit(self, fn, *args, pure=True):
        self.submitted.append(args)
        return fn(*[a[1] if isinstance(a, tuple) and a and a[0] == "future" else a for a in args])

    def gather(self, futures):
        return list(futures)


def test_dask_executor_sends_the_weights_once_per_worker_not_per_task():
    # the client's scatter(broadcast=True) sends one copy to every worker; every task gets the
    # futures, never the model itself (dask.distributed's documented way to share large inputs)
    net = _mlp()
    x = torch.randn(30, 6, generator=torch.Generator().manual_seed(9))
    client = _RecordingClient(workers=2)
    executor = type("ClientExecutor", (Executor,), {})()
    executor._client = client
    spread = scan(net, x, bits=(3, 8), progress=False, executor=executor)
    assert client.scattered == [(1, True)]  # the model and the data, once, to every worker
    assert len(client.submitted) == 4  # one task per worker thread
    for args in client.submitted:
        assert not any(isinstance(a, (nn.Module, torch.Tensor)) for a in args)
        assert any(isinstance(a, tuple) and a[:1] == ("future",) for a in args)
    _assert_same_tables(scan(net, x, bits=(3, 8), progress=False), spread)


@pytest.mark.parametrize("layer,shape", [(nn.Linear(6, 5), (4, 3, 6)), (nn.Conv2d(3, 4, 3, padding=1), (2, 3, 5, 5))])
def test_probe_layer_errors_stacked_along_output_channels_equal_each_configs_difference(layer, shape):
    # reference: torch's own layer call with each quantized weight, less the float output
    # (float32 rounding of the two routes differs by about 1e-6 of the output's scale)
    torch.manual_seed(5)
    x = torch.randn(*shape)
    w = layer.weight.detach()
    configs = [(None, None)] + [(fit_range(w, b, "minmax", axis=0), None) for b in (2, 4)]
    with torch.no_grad():
        ref = layer(x)
        got = gain_dots.layer_errors(layer, x, w, configs)
        want = torch.stack([(layer_forward(layer, x, w if g is None else quantize(w, g)) - ref).reshape(shape[0], -1)
                            for g, _ in configs], dim=1)
    assert got.shape == want.shape
    torch.testing.assert_close(got, want, rtol=0, atol=1e-5 * float(ref.abs().max()))
