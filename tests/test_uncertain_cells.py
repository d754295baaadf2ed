"""Marks on gain-estimated cells whose first-order error may be large, and ``confirm=k``.

Outside checks: the marks against the rule computed here from the table's own arrays (a naive
loop: probed entry and layer-scope SQNR below 25 dB); the marks against the exact scan (every
cell the estimate misses by more than 1 dB is marked); the confirmed cells against the k
marked cells of largest relative layer error, sorted here, and their values against the exact
scan's (the same passes on the same grids: equal up to float32 summation order, 1e-3 dB).
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import nn

from qwidgets import ScanView, SensitivityTable, scan

BITS = (2, 3, 4, 6, 8)


class _Block(nn.Module):
    def __init__(self, c):
        super().__init__()
        self.a, self.b = nn.Conv2d(c, c, 3, padding=1), nn.Conv2d(c, c, 3, padding=1)

    def forward(self, x):
        return torch.relu(x + self.b(torch.relu(self.a(x))))


class _ResNet(nn.Module):
    def __init__(self):
        super().__init__()
        self.stem, self.b1, self.b2 = nn.Conv2d(3, 16, 3, padding=1), _Block(16), _Block(16)
        self.fc = nn.Linear(16, 10)

    def forward(self, x):
        return self.fc(self.b2(self.b1(torch.relu(self.stem(x)))).mean((2, 3)))


@pytest.fixture(scope="module")
def scans():
    torch.manual_seed(0)
    net, x = _ResNet().eval(), torch.randn(32, 3, 12, 12)
    exact = scan(net, x, bits=BITS, progress=False)
    gain = scan(net, x, bits=BITS, progress=False, estimate="gain")
    return net, x, exact, gain


def _naive_marks(t):
    layer = t.sqnr_array("layer")
    return np.array([[t.model_pass(n) == "probes" and layer[i, j] < 25.0 and (n, "weight", b) not in t.confirmed
                      for j, b in enumerate(t.bits)] for i, n in enumerate(t.layers)])


def test_marks_follow_the_stated_rule_and_cover_the_large_misses(scans):
    _, _, exact, gain = scans
    marks = gain.uncertain()
    assert marks.dtype == bool and np.array_equal(marks, _naive_marks(gain))
    assert marks[:, 0].all() and not marks[:, -1].any()  # every 2-bit cell, no 8-bit cell
    miss = np.abs(gain.sqnr_array("model") - exact.sqnr_array("model"))
    assert miss.max() > 1.0  # the estimate does miss on this model ...
    assert marks[miss > 1.0].all()  # ... and every such cell is marked
    assert not exact.uncertain().any()  # measured numbers carry no mark
    html = gain.to_html()
    assert html.count(">?</sup>") == marks.sum() and "below 25 dB" in html
    assert "?</sup>" not in exact.to_html()


def test_confirm_measures_the_most_uncertain_cells_exactly(scans, tmp_path):
    net, x, exact, gain = scans
    k = 3
    t = scan(net, x, bits=BITS, progress=False, estimate="gain", confirm=k)
    # naive: the marked cells sorted by relative layer error power (largest first)
    layer = gain.sqnr_array("layer")
    cand = [(10 ** (-layer[i, j] / 10), n, b) for i, n in enumerate(gain.layers)
            for j, b in enumerate(gain.bits) if gain.uncertain()[i, j]]
    want = {(n, "weight", b) for _, n, b in sorted(cand, reverse=True)[:k]}
    assert t.confirmed == want
    for n in t.layers:
        for b in t.bits:
            ref = exact if (n, "weight", b) in want else gain
            assert t.sqnr_db(n, b) == pytest.approx(ref.sqnr_db(n, b), abs=1e-3), (n, b)
    assert not any(t.uncertain()[t.layers.index(n), t.bits.index(b)] for n, _, b in want)
    assert t.uncertain().sum() == gain.uncertain().sum() - k
    html = t.to_html()
    assert html.count(">=</sup>") == k and f"measured exactly ({k} cells" in html
    view = ScanView(t, progress=False)
    assert view.table_html.value.count(">=</sup>") == k
    assert view.table_html.value.count(">?</sup>") == t.uncertain().sum()
    t.save(tmp_path / "t.json")
    assert SensitivityTable.load(tmp_path / "t.json").confirmed == want
    # more than are marked: every marked cell, no more
    every = scan(net, x, bits=BITS, progress=False, estimate="gain", confirm=1000)
    assert len(every.confirmed) == gain.uncertain().sum() and not every.uncertain().any()


def test_confirm_on_separate_input_rows_and_its_checks(scans):
    net, x, _, _ = scans
    sep = dict(bits=(2, 8), input_bits=(2, 8), quantize="separate", progress=False)
    exact = scan(net, x, **sep)
    t = scan(net, x, **sep, estimate="gain", confirm=100)
    for n, source, b in t.confirmed:
        assert t.sqnr_db(n, b, source=source) == pytest.approx(exact.sqnr_db(n, b, source=source), abs=1e-3)
    assert {s for _, s, _ in t.confirmed} == {"weight", "input"}
    with pytest.raises(ValueError, match="confirm=2 .* needs estimate='gain'"):
        scan(net, x, bits=(4,), confirm=2, progress=False)
    with pytest.raises(ValueError, match="confirm must be an int >= 0"):
        scan(net, x, bits=(4,), estimate="gain", confirm=-1, progress=False)
    with pytest.raises(TypeError, match="confirm must be an int"):
        scan(net, x, bits=(4,), estimate="gain", confirm=True, progress=False)
