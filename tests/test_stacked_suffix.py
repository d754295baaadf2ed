"""Every bit width through one stacked suffix, against the per-width replay and the naive loop.

References: the per-width replay (the stacked path switched off, measured in the same test) and
the naive loop written here (deep copy, the table's quantized weight written into one layer, full
forward). The stacked pass computes the same per-sample sums in a bigger batch; float32 kernels
may block them differently, so the two replays are compared to 1e-4 dB (float32 rounding of an
error power is about 1e-6 relative, 4e-6 dB), the naive loop to 0.01 dB as elsewhere.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from naive_loops import naive_weight_sqnr_db
from torch import nn

from qwidgets.model.replay import evaluating, trace
from qwidgets.planning import model_scope, stacked_suffix
from qwidgets.planning.confirm import ScanNote
from qwidgets.planning.scanning import scan


class _Residual(nn.Module):
    def __init__(self, width=6):
        super().__init__()
        self.stem = nn.Conv2d(3, width, 3, padding=1)
        self.a, self.b = nn.Conv2d(width, width, 3, padding=1), nn.Conv2d(width, width, 3, padding=1)
        self.bn = nn.BatchNorm2d(width)
        self.head = nn.Linear(width, 4)

    def forward(self, x):
        h = torch.relu(self.stem(x))
        h = torch.relu(self.bn(self.b(torch.relu(self.a(h)))) + h)  # a skip connection from before
        return self.head(h.mean(dim=(2, 3)))


class _BatchMean(nn.Module):
    """Subtracts the batch mean after the first layer: samples interact."""

    def __init__(self):
        super().__init__()
        self.a, self.b = nn.Linear(5, 16), nn.Linear(16, 3)

    def forward(self, x):
        h = self.a(x)
        return self.b(torch.relu(h - h.mean(dim=0, keepdim=True)))



def _per_width(monkeypatch):
    monkeypatch.setattr(model_scope, "stacked_suffix_noise", lambda *a, **k: None)


def test_stacked_suffix_equals_the_per_width_replay_and_the_naive_loop(monkeypatch):
    torch.manual_seed(0)
    net = _Residual().eval()
    with torch.no_grad():
        net.bn.running_mean.uniform_(-0.2, 0.2)
    x = torch.randn(5, 3, 10, 10, generator=torch.Generator().manual_seed(1))
    calls = []
    original = stacked_suffix.stacked_suffix_noise

    def counted(*args, **kwargs):
        out = original(*args, **kwargs)
        calls.append(out is not None)
        return out

    monkeypatch.setattr(model_scope, "stacked_suffix_noise", counted)
    stacked = scan(net, x, bits=(2, 4, 8), method="minmax", progress=False, scope="model")
    assert calls and all(calls)  # every entry through one stacked pass
    assert stacked.notes == ()
    _per_width(monkeypatch)
    with pytest.warns(ScanNote, match="one bit width at a time"):  # the slower path says so
        single = scan(net, x, bits=(2, 4, 8), method="minmax", progress=False, scope="model")
    np.testing.assert_allclose(stacked.sqnr_array("model"), single.sqnr_array("model"), rtol=0, atol=1e-4)
    for name in stacked.layers:
        assert stacked.model_pass(name) == "suffix"
        for b in stacked.bits:
            assert abs(stacked.sqnr_db(name, b) - naive_weight_sqnr_db(net, x, name, stacked.weight_grid(name, b))) < 0.01


def test_a_model_that_mixes_samples_is_replayed_one_width_at_a_time_and_says_so():
    torch.manual_seed(2)
    net = _BatchMean().eval()
    x = torch.randn(9, 5, generator=torch.Generator().manual_seed(3))
    with pytest.warns(ScanNote, match="one bit width at a time"):
        t = scan(net, x, bits=(3, 6), progress=False, scope="model")
    assert any("'a'" in n and "mixes samples" in n for n in t.notes)
    for b in t.bits:  # the fallback's numbers are the naive loop's
        assert abs(t.sqnr_db("a", b) - naive_weight_sqnr_db(net, x, "a", t.weight_grid("a", b))) < 0.01


def test_rerun_repeats_only_the_values_computed_from_the_batch():
    torch.manual_seed(4)
    net = _Residual().eval()
    x = torch.randn(3, 3, 8, 8)
    replay = trace(net)
    with evaluating(net):
        replay.record(x)
        ref = replay.rerun("a", lambda h: net.a(h))
        both = replay.rerun("a", lambda h: torch.cat([net.a(h), net.a(h)]), copies=2)
    assert both.shape == (6, 4)
    torch.testing.assert_close(both[:3], ref, rtol=0, atol=1e-6)  # float32 rounding of a batch of 6
    torch.testing.assert_close(both[3:], ref, rtol=0, atol=1e-6)
    params = {n for n in replay.nodes if n.op == "get_attr"}
    assert not any(replay.carries_batch(n) for n in params)


def test_stacking_is_skipped_beyond_the_memory_cap_and_says_so(monkeypatch):
    # the largest value after the layer (here the stem's 5 x 6 x 10 x 10 output), seven times, is
    # over a cap of 10 KiB: each width replayed alone, the same numbers
    torch.manual_seed(0)
    net = _Residual().eval()
    x = torch.randn(5, 3, 10, 10, generator=torch.Generator().manual_seed(1))
    stacked = scan(net, x, bits=(2, 4, 8), method="minmax", progress=False, scope="model")
    monkeypatch.setattr(stacked_suffix, "STACK_BYTES", 10 << 10)
    with pytest.warns(ScanNote, match="memory cap"):
        capped = scan(net, x, bits=(2, 4, 8), method="minmax", progress=False, scope="model")
    np.testing.assert_allclose(stacked.sqnr_array("model"), capped.sqnr_array("model"), rtol=0, atol=1e-4)
