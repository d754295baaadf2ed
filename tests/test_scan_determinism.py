"""Scans are deterministic and say when they take a slower path.

- the same scan twice gives the same table, bit for bit (the JSON text and every array);
- the passes' thread count comes from the model and the machine (and ``set_scan_threads``),
  never from timing: counted inside a forward;
- a model that does not trace is measured with full forward passes, and the table and a
  warning say so; an exception that tracing is not expected to raise is not swallowed.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import fx, nn

from qwidgets.planning import threads as scan_threads
from qwidgets.planning.scanning import ScanNote, scan


class _Residual(nn.Module):
    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 8, 3, padding=1)
        self.a = nn.Conv2d(8, 8, 3, padding=1)
        self.b = nn.Conv2d(8, 8, 3, padding=1)
        self.head = nn.Linear(8, 4)

    def forward(self, x):
        x = torch.relu(self.stem(x))
        x = x + self.b(torch.relu(self.a(x)))
        return self.head(x.mean(dim=(2, 3)))


class _Branchy(_Residual):
    """Data-dependent control flow: symbolic tracing cannot follow it."""

    def forward(self, x):
        x = torch.relu(self.stem(x))
        if x.sum() > 0:
            x = x + self.b(torch.relu(self.a(x)))
        return self.head(x.mean(dim=(2, 3)))


class _Odd(Exception):
    pass


class _Strange(_Residual):
    """Raises an exception of its own when traced: not one tracing is expected to raise."""

    def forward(self, x):
        if isinstance(x, fx.Proxy):
            raise _Odd("not a tracing failure")
        return super().forward(x)


def _data():
    return torch.randn(6, 3, 10, 10, generator=torch.Generator().manual_seed(3))


@pytest.mark.parametrize("estimate", ["exact", "gain"])
def test_two_identical_scans_give_bit_identical_tables(estimate):
    torch.manual_seed(0)
    net, x = _Residual().eval(), _data()
    a = scan(net, x, bits=(2, 4, 8), progress=False, estimate=estimate)  # default method="mse"
    b = scan(net, x, bits=(2, 4, 8), progress=False, estimate=estimate)
    assert a.to_dict() == b.to_dict()
    for scope in a.scopes:
        assert np.array_equal(a.sqnr_array(scope), b.sqnr_array(scope))
    for name in a.layers:
        for bits in a.bits:
            assert torch.equal(a.weight_grid(name, bits).scale_tensor(), b.weight_grid(name, bits).scale_tensor())


def test_passes_threads_come_from_the_model_and_the_setting_not_timing(monkeypatch):
    torch.manual_seed(0)
    net, x = _Residual().eval(), _data()
    seen = []
    net.b.register_forward_pre_hook(lambda m, a: seen.append(torch.get_num_threads()))

    def no_clock():
        raise AssertionError("the scan read the clock")

    import time

    monkeypatch.setattr(time, "perf_counter", no_clock)
    before = torch.get_num_threads()
    try:
        torch.set_num_threads(2)
        scan(net, x, bits=(4,), progress=False, method="minmax")
        assert set(seen) == {1}  # a model under SMALL_MODEL_PARAMS: one thread
        seen.clear()
        scan_threads.set_scan_threads(2)
        scan(net, x, bits=(4,), progress=False, method="minmax")
        assert set(seen) == {2}
    finally:
        scan_threads.set_scan_threads(None)
        torch.set_num_threads(before)
    assert torch.get_num_threads() == before
    with pytest.raises(ValueError, match="passes must be None or an int >= 1"):
        scan_threads.set_scan_threads(0)


def test_a_model_that_does_not_trace_is_measured_with_forward_passes_and_says_so():
    torch.manual_seed(0)
    net, x = _Branchy().eval(), _data()
    with pytest.warns(ScanNote, match="does not trace with torch.fx") as record:
        t = scan(net, x, bits=(4,), progress=False, method="minmax")
    assert any("TraceError" in str(w.message) for w in record)
    assert any("does not trace" in n for n in t.notes)
    assert {t.model_pass(n) for n in t.layers} <= {"stacked", "per bit width"}
    # the notes travel with the table's JSON
    import json

    from qwidgets.planning.table import SensitivityTable
    from qwidgets.planning.table_json import table_from_text

    assert table_from_text(SensitivityTable, json.dumps(t.to_dict())).notes == t.notes


def test_a_traceable_model_takes_the_fast_path_without_notes():
    torch.manual_seed(0)
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("error", ScanNote)
        t = scan(_Residual().eval(), _data(), bits=(4,), progress=False, method="minmax")
    assert t.notes == ()
    assert {t.model_pass(n) for n in t.layers} == {"suffix"}


def test_an_unexpected_exception_while_tracing_is_not_swallowed():
    torch.manual_seed(0)
    with pytest.raises(_Odd):
        scan(_Strange().eval(), _data(), bits=(4,), progress=False, method="minmax")
