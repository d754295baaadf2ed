"""scan(..., granularity=...): every (bits, granularity) pair measured; the table and its JSON.

Outside checks: the layer-scope SQNR of a block grid is recomputed here with torch's own
``F.linear`` on the weight quantized by ``fit_range(..., block_size=g)`` (float64 sums); the
channel / tensor rows are compared with scans that know nothing of granularity.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch import nn

from qwidgets import SensitivityTable, fit_range, quantize, scan

BITS = (3, 4, 8)
GRANS = ("channel", 8, "tensor")


@pytest.fixture(scope="module")
def setup():
    torch.manual_seed(0)
    net = nn.Sequential(nn.Linear(24, 16), nn.ReLU(), nn.Linear(16, 6), nn.ReLU(), nn.Linear(6, 3))
    with torch.no_grad():
        net[0].weight[:, 5] *= 8.0  # an outlying input column: blocks help the first layer
    x = torch.randn(48, 24)
    t = scan(net, x, bits=BITS, progress=False, granularity=GRANS)
    return net, x, t


def _db(signal, noise):
    return 10 * math.log10(signal / noise)


def test_every_pair_is_measured_and_the_first_option_is_the_default(setup):
    net, x, t = setup
    assert t.granularities == GRANS
    plain = scan(net, x, bits=BITS, progress=False)
    per_tensor = scan(net, x, bits=BITS, progress=False, per_channel=False)
    assert plain.granularities == ("channel",) and per_tensor.granularities == ("tensor",)
    # same grids, only more columns in the passes: float32 rounding of the stacked passes only
    for scope in ("layer", "model"):
        np.testing.assert_allclose(t.sqnr_array(scope), plain.sqnr_array(scope), atol=1e-3)
        np.testing.assert_allclose(t.sqnr_array(scope, granularity="channel"), plain.sqnr_array(scope), atol=1e-3)
        np.testing.assert_allclose(t.sqnr_array(scope, granularity="tensor"), per_tensor.sqnr_array(scope),
                                   atol=1e-3)
    for b in BITS:
        assert t.weight_grid("0", b, granularity="tensor").axis is None


def test_block_rows_match_the_layer_output_recomputed_here(setup):
    net, x, t = setup
    w = net[0].weight.detach()
    ref = F.linear(x, w, net[0].bias.detach()).double()
    for b in BITS:
        grid = t.weight_grid("0", b, granularity=8)
        want = fit_range(w, b, "mse", axis=1, block_size=8)  # the scan's method and layout
        assert grid.block_size == 8 and torch.equal(grid.scale, want.scale)
        y = F.linear(x, quantize(w, want), net[0].bias.detach()).double()
        sqnr = _db(float(ref.square().sum()), float((y - ref).square().sum()))
        # float32 layer outputs computed in a different batch layout: a few 1e-4 dB
        assert t.sqnr_db("0", b, scope="layer", granularity=8) == pytest.approx(sqnr, abs=1e-3)
    # one scale per 8 inputs beats one per output row where a column is an outlier
    assert t.sqnr_db("0", 3, "layer", granularity=8) > t.sqnr_db("0", 3, "layer", granularity="channel") + 1


def test_entries_shorter_than_a_block_skip_it_and_coverage_says_so(setup):
    _, _, t = setup
    assert all(math.isnan(t.sqnr_db("4", b, granularity=8)) for b in BITS)
    assert t.weight_grid("4", 4, granularity=8) is None
    assert not math.isnan(t.sqnr_db("4", 4, granularity="tensor"))
    assert t.coverage.skipped_options == (("4", "blocks of 8: its input axis holds 6 values, fewer than a block"),)
    assert "options skipped: 4 (blocks of 8" in str(t.coverage)
    with pytest.raises(KeyError, match="granularity=32 was not scanned"):
        t.sqnr_db("0", 4, granularity=32)


def test_bad_granularity_arguments_are_refused(setup):
    net, x, _ = setup
    with pytest.raises(ValueError, match="per_channel=False or granularity="):
        scan(net, x, bits=(4,), progress=False, per_channel=False, granularity=("tensor", 8))
    with pytest.raises(ValueError, match="first option"):
        scan(net, x, bits=(4,), progress=False, granularity=(8, "channel"))
    with pytest.raises(ValueError, match="options are 'tensor', 'channel' or a block size"):
        scan(net, x, bits=(4,), progress=False, granularity=("channel", "row"))
    with pytest.raises(ValueError, match="block size must be"):
        scan(net, x, bits=(4,), progress=False, granularity=("channel", 0))
    with pytest.raises(ValueError, match="quantize='input' scans no weights"):
        scan(net, x, bits=(4,), progress=False, quantize="input", granularity=("channel", 8))


def test_table_json_round_trip_keeps_every_option(setup, tmp_path):
    _, _, t = setup
    t.save(tmp_path / "t.json")
    back = SensitivityTable.load(tmp_path / "t.json")
    assert back.granularities == GRANS and back.coverage == t.coverage
    for g in GRANS:
        for scope in ("layer", "model"):
            np.testing.assert_array_equal(back.sqnr_array(scope, granularity=g), t.sqnr_array(scope, granularity=g))
        for name in t.layers:
            for b in BITS:
                a, c = t.weight_grid(name, b, granularity=g), back.weight_grid(name, b, granularity=g)
                assert (a is None) == (c is None)
                if a is not None:
                    assert c.block_size == a.block_size and torch.equal(c.scale_tensor(), a.scale_tensor())
                    assert torch.equal(torch.as_tensor(c.zero_point), torch.as_tensor(a.zero_point))
    # a damaged file is refused by field
    data = json.loads((tmp_path / "t.json").read_text())
    del data["layers"][0]["granularity_rows"]["8"]
    (tmp_path / "bad.json").write_text(json.dumps(data))
    with pytest.raises(ValueError, match="granularity_rows must be an object with the options"):
        SensitivityTable.load(tmp_path / "bad.json")


def test_tables_of_one_granularity_keep_their_file_layout(setup, tmp_path):
    net, x, _ = setup
    t = scan(net, x, bits=(4,), progress=False)
    d = t.to_dict()
    assert "granularities" not in d and all("granularity_rows" not in e for e in d["layers"])
    t.save(tmp_path / "one.json")
    assert SensitivityTable.load(tmp_path / "one.json").granularities == ("channel",)
