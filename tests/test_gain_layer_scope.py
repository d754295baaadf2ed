"""The gain estimate's probe pass gives the layer scope too, and cuts a large batch in pieces
sized ahead.

Outside checks:
- the layer scope of every probed layer equals a naive loop written here (forward hooks on a
  deep copy capture each layer's input; output and error of each width computed in float64
  with torch's own ``F.linear`` / ``F.conv2d``; SQNR as a ratio of powers) within a bound
  derived from float32 rounding (below), and the scan with ``scope="layer"``;
- pieces: probes seeded per sample, so pieces give the numbers of the whole batch (float32
  layer outputs of fewer rows round differently: 1e-4 dB, as for executors in
  test_scan_scale.py).

The float32 bound (Higham, *Accuracy and Stability of Numerical Algorithms*, 2002, Thm 3.5 for
dot products): each output value ``e_j`` of a K-term product is computed with an absolute
error at most ``gamma_K a_j``, ``gamma_K = K u / (1 - K u)``, ``u = 2^-24``, where ``a_j`` is
the same product of absolute values. A power sum then moves by at most
``sum_j (2 |e_j| gamma_K a_j + gamma_K^2 a_j^2)``, plus ``gamma_V`` of itself for the float32
sum of a row's V squares; the SQNR by at most ``10 log10((1 + r_s) / (1 - r_e))`` dB for the
relative bounds r_s (signal) and r_e (error).
"""

from __future__ import annotations

import copy
import math

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch import nn

from qwidgets.core.rounding import quantize
from qwidgets.planning import gain_probes
from qwidgets.planning.scanning import scan

U = 2.0 ** -24  # float32 unit roundoff


def _gamma(k: int) -> float:
    return k * U / (1 - k * U)


def _convnet() -> nn.Module:
    torch.manual_seed(4)
    return nn.Sequential(nn.Conv2d(3, 8, 3, padding=1), nn.ReLU(), nn.Conv2d(8, 8, 3, groups=2), nn.ReLU(),
                         nn.Flatten(), nn.Linear(8 * 6 * 6, 20), nn.Tanh(), nn.Linear(20, 70)).eval()


def _tokens() -> nn.Module:
    torch.manual_seed(5)
    return nn.Sequential(nn.Linear(16, 32), nn.GELU(), nn.Linear(32, 16), nn.Tanh(), nn.Linear(16, 90)).eval()


def _inputs(name: str) -> torch.Tensor:
    g = torch.Generator().manual_seed(6)
    return torch.randn(5, 3, 8, 8, generator=g) if name == "conv" else torch.randn(4, 10, 16, generator=g)


def _apply(layer, x, w, b):
    if isinstance(layer, nn.Linear):
        return F.linear(x, w, b)
    return F.conv2d(x, w, b, layer.stride, layer.padding, layer.dilation, layer.groups)


def _naive_layer_sqnr(model, x, name, wgrid, igrid) -> tuple[float, float]:
    """(SQNR in dB, its float32 rounding bound in dB) of one layer's output: the layer's input
    captured by a forward hook on a deep copy, everything after in float64."""
    copy_ = copy.deepcopy(model)
    layer = copy_.get_submodule(name)
    seen = []
    handle = layer.register_forward_pre_hook(lambda m, args: seen.append(args[0].detach()))
    with torch.no_grad():
        copy_(x)
    handle.remove()
    (x_in,) = seen
    w, b = layer.weight.detach(), None if layer.bias is None else layer.bias.detach()
    wq = w if wgrid is None else quantize(w, wgrid)
    xq = x_in if igrid is None else quantize(x_in, igrid)
    d = torch.float64
    bd = None if b is None else b.to(d)
    y = _apply(layer, x_in.to(d), w.to(d), bd)
    e = _apply(layer, xq.to(d), wq.to(d), bd) - y
    a_y = _apply(layer, x_in.abs().to(d), w.abs().to(d), None if b is None else bd.abs())
    if igrid is None:  # weight-only widths: the error is computed as the product with w_q - w
        a_e = _apply(layer, x_in.abs().to(d), (wq - w).abs().to(d), None)
    else:  # as a difference of two outputs: both products' rounding
        a_e = _apply(layer, xq.abs().to(d), wq.abs().to(d), None) + a_y
    k = w[0].numel() + 1  # fan-in terms and the bias
    rows = y.shape[0]
    g = _gamma(k)
    signal, noise = float(y.square().sum()), float(e.square().sum())
    r_s = float((2 * y.abs() * g * a_y + (g * a_y) ** 2).sum()) / signal + _gamma(y.numel() // rows)
    r_e = float((2 * e.abs() * g * a_e + (g * a_e) ** 2).sum()) / noise + _gamma(e.numel() // rows)
    return 10 * math.log10(signal / noise), 10 * math.log10((1 + r_s) / (1 - r_e))


def _forwards(model) -> list:
    count = [0]
    handle = model.register_forward_pre_hook(lambda m, a: count.__setitem__(0, count[0] + 1))
    return count, handle


@pytest.mark.parametrize("net_name", ["conv", "tokens"])
@pytest.mark.parametrize("quantize_mode", ["weight", "both"])
def test_layer_scope_from_the_probe_pass_equals_a_naive_loop_and_the_layer_scan(net_name, quantize_mode):
    net = _convnet() if net_name == "conv" else _tokens()
    x = _inputs(net_name)
    kw = dict(bits=(3, 5, 8), method="minmax", progress=False, quantize=quantize_mode)
    count, handle = _forwards(net)
    gain = scan(net, x, estimate="gain", **kw)
    both_passes = count[0]
    count[0] = 0
    scan(net, x, estimate="gain", scope="model", **kw)
    model_passes = count[0]
    handle.remove()
    layer_only = scan(net, x, scope="layer", **kw)
    assert {gain.model_pass(n) for n in gain.layers} == {"probes"}
    # no pass of its own for the layer scope: the probes' pass measured it
    assert both_passes == model_passes
    for name in gain.layers:
        for b in gain.bits:
            want, tol = _naive_layer_sqnr(net, x, name, gain.weight_grid(name, b),
                                          gain.input_grid(name, b) if quantize_mode == "both" else None)
            assert abs(gain.sqnr_db(name, b, scope="layer") - want) <= tol, (name, b, tol)
            assert abs(layer_only.sqnr_db(name, b, scope="layer") - want) <= tol, (name, b, tol)


def test_two_identical_gain_scans_give_the_same_layer_scope():
    net, x = _tokens(), _inputs("tokens")
    a = scan(net, x, bits=(3, 6), progress=False, estimate="gain")
    b = scan(net, x, bits=(3, 6), progress=False, estimate="gain")
    assert np.array_equal(a.sqnr_array("layer"), b.sqnr_array("layer"))
    assert np.array_equal(a.sqnr_array("model"), b.sqnr_array("model"))


def test_a_batch_over_the_error_cap_is_cut_ahead_after_one_sample(monkeypatch):
    # 90 output values a sample: random probes, seeded per sample, so a wrong first row of a
    # piece would change the estimate far beyond 1e-4 dB
    net = _tokens()
    x = torch.randn(12, 10, 16, generator=torch.Generator().manual_seed(8))
    kw = dict(bits=(3, 6), method="minmax", progress=False, estimate="gain", batch_size=6)
    whole = scan(net, x, **kw)
    attempts, one_batch = [], gain_probes._one_batch

    def recording(model, piece, *args, **kwargs):
        n = gain_probes.batch_size(piece)
        try:
            kept = one_batch(model, piece, *args, **kwargs)
        except gain_probes._TooLarge:
            attempts.append((n, "too large"))
            raise
        attempts.append((n, kept))
        return kept

    monkeypatch.setattr(gain_probes, "_one_batch", recording)
    scan(net, x, **{**kw, "batch_size": 1})
    per_sample = attempts[0][1]  # the layer errors one sample keeps
    attempts.clear()
    monkeypatch.setattr(gain_probes, "ERROR_BYTES", int(2.5 * per_sample))
    parts = scan(net, x, **kw)
    sizes = [n for n, _ in attempts]
    # batch 1: whole (stopped by the cap), one sample, then pieces of two; batch 2: cut ahead
    assert sizes == [6, 1, 2, 2, 1, 2, 2, 2], attempts
    assert [n for n, kept in attempts if kept == "too large"] == [6]
    for scope in ("model", "layer"):
        np.testing.assert_allclose(parts.sqnr_array(scope), whole.sqnr_array(scope), rtol=0, atol=1e-4)
