"""Planning bits and granularity together, with block grids paying for their scales.

Outside checks: the planner against an exhaustive search over every (bits, granularity) per
entry written here; storage by the bits-per-weight formula of a block grid, code bits +
scale bits / g (+ zero-point bits / g when asymmetric) (common practice, GUIDE.md), and
today's rule for channel grids (a float32 scale and an int32 zero point per channel).
"""

from __future__ import annotations

import itertools
import json
import math

import pytest
import torch
from torch import nn

from qwidgets import DeviceRules, Plan, SensitivityTable, pareto_front, plan_budget, scan
from qwidgets.planning.costs import block_storage_bits

BITS = (2, 4, 8)
GRANS = ("channel", 8)


@pytest.fixture(scope="module")
def table():
    torch.manual_seed(1)
    net = nn.Sequential(nn.Linear(32, 16), nn.ReLU(), nn.Linear(16, 6), nn.ReLU(), nn.Linear(6, 4))
    with torch.no_grad():
        net[0].weight[:, 3] *= 10.0  # an outlying input column
    return scan(net, torch.randn(64, 32), bits=BITS, progress=False, granularity=GRANS, method="minmax")


def _storage(t, name, b, g, scale_bits=16):
    """Stored bits by hand: codes + 64 bits per channel, or + (scale bits + zero-point bits) per block."""
    shape = t.weight_shape(name)
    n = math.prod(shape)
    if g == "channel":
        return n * b + shape[0] * 64
    grid = t.weight_grid(name, b, granularity=g)
    blocks = shape[0] * -(-shape[1] // g)
    asym = bool((torch.as_tensor(grid.zero_point) != 0).any())
    return n * b + blocks * (scale_bits + (b if asym else 0))


def _options(t, name):
    return [(b, g) for g in GRANS for b in BITS if not math.isnan(t.sqnr_db(name, b, granularity=g))]


def _exhaustive(t, limit_bits):
    best = None
    for combo in itertools.product(*[_options(t, n) for n in t.layers]):
        cost = sum(_storage(t, n, b, g) for n, (b, g) in zip(t.layers, combo, strict=True))
        if cost > limit_bits:
            continue
        noise = sum(10 ** (-t.sqnr_db(n, b, granularity=g) / 10) for n, (b, g) in zip(t.layers, combo, strict=True))
        if best is None or noise < best[0]:
            best = (noise, dict(zip(t.layers, combo, strict=True)))
    return best


def test_block_storage_is_the_bits_per_weight_formula():
    # 4096 weights in blocks of 128: 4 + 16 / 128 bits a weight; asymmetric: + 4 / 128 more
    assert block_storage_bits(4096, 4, 32) / 4096 == 4 + 16 / 128
    assert block_storage_bits(4096, 4, 32, asymmetric=True) / 4096 == 4 + (16 + 4) / 128
    assert block_storage_bits(4096, 3, 128, scale_bits=32) / 4096 == 3 + 32 / 32


def test_the_skipped_option_is_not_offered(table):
    assert _options(table, "4") == [(2, "channel"), (4, "channel"), (8, "channel")]
    with pytest.raises(ValueError, match="skipped that granularity"):
        table.make_plan({"4": 4}, granularity=8)


@pytest.mark.parametrize("fraction", [0.16, 0.2, 0.28, 0.4])
def test_planner_equals_exhaustive_search_under_a_kib_budget(table, fraction):
    float_bits = 32 * sum(table.params(n) for n in table.layers)
    kib = fraction * float_bits / 8192
    want = _exhaustive(table, math.floor(kib * 8192))
    plan = plan_budget(table, planned_kib=kib)
    got = {n: (plan.bits[n], plan.granularity[n]) for n in table.layers}
    noise = sum(10 ** (-table.sqnr_db(n, b, granularity=g) / 10) for n, (b, g) in got.items())
    assert noise == pytest.approx(want[0], rel=1e-6)  # same optimum (ties may pick another plan)
    assert plan.planned_kib * 8192 == sum(_storage(table, n, b, g) for n, (b, g) in got.items())
    assert plan.planned_kib <= kib


def test_mean_bits_are_stored_bits_and_blocks_pay_for_scales(table):
    params = sum(table.params(n) for n in table.layers)
    for mean_bits in (5.0, 6.0, 8.0):
        want = _exhaustive(table, math.floor(mean_bits * params))
        plan = plan_budget(table, mean_bits=mean_bits)
        stored = sum(_storage(table, n, plan.bits[n], plan.granularity[n]) for n in table.layers)
        assert plan.mean_bits == stored / params <= mean_bits
        noise = sum(10 ** (-table.sqnr_db(n, plan.bits[n], granularity=plan.granularity[n]) / 10)
                    for n in table.layers)
        assert noise == pytest.approx(want[0], rel=1e-6)


def test_pins_and_granularity_menu(table):
    kib = 0.3 * 32 * sum(table.params(n) for n in table.layers) / 8192
    p = plan_budget(table, planned_kib=kib, fixed={"0": {"bits": 4, "granularity": 8}})
    assert (p.bits["0"], p.granularity["0"]) == (4, 8)
    q = plan_budget(table, planned_kib=kib, allowed_granularity=("channel",))
    assert set(q.granularity.values()) == {"channel"}
    with pytest.raises(ValueError, match="did not scan"):
        plan_budget(table, planned_kib=kib, allowed_granularity=(32,))
    with pytest.raises(ValueError, match="'bits', 'input_bits', 'granularity' and / or 'input_granularity'"):
        plan_budget(table, planned_kib=kib, fixed={"0": {"width": 4}})


def test_pareto_front_runs_over_bits_and_granularity(table):
    pts = pareto_front(table, "planned_kib", max_points=None)
    assert any(8 in p.granularity.values() for _, _, p in pts)
    for cost, sqnr, _ in pts:  # every point is the exhaustive optimum of its own cost
        want = _exhaustive(table, round(cost * 8192))
        assert -10 * math.log10(want[0]) == pytest.approx(sqnr, abs=1e-9)


def test_plan_file_round_trips_block_grids(table, tmp_path):
    plan = table.make_plan({n: 4 for n in table.layers}, granularity={"0": 8, "2": 8}, scale_bits=32)
    assert plan.granularity == {"0": 8, "2": 8, "4": "channel"}
    plan.save(tmp_path / "p.json")
    back = Plan.load(tmp_path / "p.json")
    assert back.granularity == plan.granularity and back.scale_bits == 32
    assert back.planned_kib == plan.planned_kib
    for n in table.layers:
        a, b = plan.layers[n].weight, back.layers[n].weight
        assert torch.equal(a.scale_tensor(), b.scale_tensor()) and a.block_size == b.block_size
    # a plan of per-channel grids keeps its old layout
    old = table.make_plan({n: 4 for n in table.layers})
    d = old.to_dict()
    assert "scale_bits" not in d and all("block_size" not in e["weight"] for e in d["layers"].values())
    assert Plan.from_json(old.to_json()).granularity == {n: "channel" for n in table.layers}


def test_scale_bits_from_the_rules_cost_the_plan(table):
    kib = 0.3 * 32 * sum(table.params(n) for n in table.layers) / 8192
    p = plan_budget(table, planned_kib=kib, fixed={"0": {"bits": 4, "granularity": 8}},
                    rules=DeviceRules(scale_bits=32))
    assert p.scale_bits == 32
    assert p.planned_kib * 8192 == sum(_storage(table, n, p.bits[n], p.granularity[n], 32) for n in table.layers)


def test_older_plan_and_table_versions_still_load(table):
    plan = table.make_plan({n: 4 for n in table.layers})
    d = json.loads(plan.to_json())
    assert d["version"] == 6
    # version 2: the same fields, its figures' mean bits counted code bits only
    d["version"] = 2
    d.pop("state_digests", None)  # version 5's field
    d["figures"]["mean_bits"] = 4.0
    assert Plan.from_json(json.dumps(d)).mean_bits == plan.mean_bits > 4.0
    d["figures"]["mean_bits"] = plan.mean_bits  # stored bits in a version 2 file: not its meaning
    with pytest.raises(ValueError, match="figures.mean_bits"):
        Plan.from_json(json.dumps(d))
    blocked = json.loads(table.make_plan({n: 4 for n in table.layers}, granularity={"0": 8}).to_json())
    blocked["version"] = 2
    blocked.pop("state_digests", None)
    with pytest.raises(ValueError, match="block grid, which plan files hold from version 4"):
        Plan.from_json(json.dumps(blocked))
    # a table of one granularity written as version 2 reads; granularity fields need version 4
    t = table.to_dict()
    assert t["version"] == 6 and "granularities" in t
    one = scan_one_granularity_dict(t)
    one["version"] = 2
    one.pop("state_digests", None)
    assert _load(one).granularities == ("channel",)
    t["version"] = 2
    with pytest.raises(ValueError, match="expected an object with fields"):
        _load(t)


def scan_one_granularity_dict(d):
    """The table's data with only its first granularity (what a version 2 file held)."""
    d = json.loads(json.dumps(d))
    del d["granularities"]
    for e in d["layers"]:
        del e["granularity_rows"]
    d["coverage"].pop("skipped_options", None)
    return d


def _load(d):
    import tempfile
    from pathlib import Path

    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "t.json"
        path.write_text(json.dumps(d))
        return SensitivityTable.load(path)


def test_planner_readout_names_each_entrys_granularity(table):
    from qwidgets.widgets.planner_text import layers_html

    plan = table.make_plan({n: 4 for n in table.layers}, granularity={"0": 8})
    html = layers_html(table, plan, {})
    assert "<th>granularity</th>" in html and "blocks of 8" in html and "per channel" in html
    # each row's "model SQNR alone" is the table's figure for that entry's own granularity
    assert f"{table.sqnr_db('0', 4, granularity=8):.1f}" in html
    assert [r["granularity"] for r in plan.to_rows()] == [8, "channel", "channel"]
