"""Granularity in the widgets: the explorer's tensor / channel / block choice with its block
selector, the scan view's weight and input granularity rows, the planner's per-entry labels.

Driven as a person drives them (``set_state``, the messages a browser sends). Outside checks:
the block grid's figures against a loop over blocks written here (each block's values
quantized by hand with its own scale and offset) and slices of the weight written here.
"""

from __future__ import annotations

import re

import pytest
import torch
import traitlets
from attention_models import TokenMLP
from front_end import person_sets
from torch import nn

from qwidgets import (
    BudgetPlanner,
    GridExplorer,
    LayerSetting,
    ScanView,
    TokenGrid,
    UniformGrid,
    error_stats,
    scan,
)


def _text(html: str) -> str:
    return re.sub(r"\s+", " ", re.sub("<[^>]+>", " ", html))


@pytest.fixture
def explorer():
    torch.manual_seed(0)
    lin = nn.Linear(64, 16)
    with torch.no_grad():
        lin.weight[:, 5] *= 10.0  # an outlying input column
    return GridExplorer(lin, torch.randn(128, 64), bits=4, per_channel=True), lin.weight.detach().clone()


def _blocks_by_loop(w: torch.Tensor, grid, g: int) -> torch.Tensor:
    """Reference written here: each block of ``g`` inputs of each row on its own scale / offset."""
    out = torch.empty_like(w)
    s, o = grid.scale_tensor(), grid.offset_tensor().expand_as(grid.scale_tensor())
    for r in range(w.shape[0]):
        for b in range(s.shape[1]):
            x = w[r, b * g:(b + 1) * g]
            k = torch.clamp(torch.round((x - o[r, b]) / s[r, b]), grid.qmin, grid.qmax)
            out[r, b * g:(b + 1) * g] = k * s[r, b] + o[r, b]
    return out


def test_a_person_picks_blocks_and_a_block_and_the_readouts_follow(explorer):
    ex, w = explorer
    c = ex.controls
    assert [v for _, v in c["granularity"].options] == ["tensor", "channel", 8, 16, 32]
    assert c["block"].disabled  # per channel: no blocks yet
    person_sets(c["granularity"], 16)
    person_sets(c["channel"], 3)
    person_sets(c["block"], 2)
    ex.refresh()
    st, g = ex.state, ex.grid
    assert (st.granularity, g.granularity, g.block_size, g.axis, st.per_channel) == (16, 16, 16, 1, True)
    assert not c["block"].disabled and c["block"].max == 3 and c["per_channel"].value
    # the block shown: row 3, inputs 32-47 (a slice written here), on its own scale
    assert torch.equal(st.shown_values(), w[3, 32:48])
    assert st.shown_grid().scale == pytest.approx(float(g.scale[3, 2]))
    text = _text(ex.readout.value)
    assert "channel 3 of 16" in text and "block 2 of 4 (inputs 32-47)" in text and "blocks of 16" in text
    assert "steps of all blocks" in text
    # the whole tensor's figures: every block on its own grid (the loop above)
    assert ex.stats.sqnr_db == pytest.approx(error_stats(w, _blocks_by_loop(w, g, 16)).sqnr_db, abs=1e-9)
    assert ex.figure.ax_hist.get_title() == "Channel 3, block 2: 16 weights"


def test_a_step_typed_for_a_block_changes_that_block_only(explorer):
    ex, _ = explorer
    ex.state.granularity = 8
    ex.state.channel, ex.state.block = 1, 5
    before = ex.grid.scale_tensor().clone()
    person_sets(ex.controls["scale"].box, "0.25")
    after = ex.grid.scale_tensor()
    assert float(after[1, 5]) == 0.25
    changed = (after != before).nonzero().tolist()
    assert changed == [[1, 5]]


def test_per_channel_and_tensor_choices_leave_blocks(explorer):
    ex, _ = explorer
    c = ex.controls
    person_sets(c["granularity"], 32)
    person_sets(c["per_channel"], False)  # the quick toggle: one grid for the tensor
    assert ex.grid.granularity == "tensor" and c["granularity"].value == "tensor" and c["block"].disabled
    person_sets(c["per_channel"], True)
    assert ex.grid.granularity == "channel" and c["granularity"].value == "channel"
    person_sets(c["source"], "input")  # activations: one grid per tensor
    assert [v for _, v in c["granularity"].options] == ["tensor"] and c["granularity"].disabled
    with pytest.raises(traitlets.TraitError, match="only 'tensor' is offered for input"):
        ex.state.granularity = 16
    person_sets(c["source"], "weight")
    assert ex.grid.granularity == "channel"  # the weights kept theirs
    with pytest.raises(traitlets.TraitError, match="a block size of \\[8, 16, 32\\]"):
        ex.state.granularity = 64
    with pytest.raises(traitlets.TraitError, match="block must be in 0..0"):
        ex.state.block = 1


def test_a_token_input_is_not_explored_and_the_note_says_why():
    ex = GridExplorer(nn.Linear(64, 16), torch.randn(128, 64), bits=4)
    before = ex.state.grids.get("input")
    w = UniformGrid(4, 0.05, signed=True)
    ex.show_setting(LayerSetting(weight=w, input=TokenGrid(8)))  # a plan's entry with a token input
    assert ex.state.grids.get("weight") is w  # the weight grid is shown
    assert ex.state.grids.get("input") is before  # its scales come from each row at run time
    assert "per-token grid is computed at run time" in ex.message.text
    with pytest.raises(TypeError, match="a fixed grid to explore"):
        ex.state.set_grid(TokenGrid(8), "input")


@pytest.fixture(scope="module")
def token_table():
    torch.manual_seed(5)
    net = TokenMLP().eval()
    x = torch.randn(24, 6, 16) * torch.logspace(-1, 1.5, 6).reshape(1, 6, 1)
    t = scan(net, x, bits=(3, 4, 8), quantize="separate", input_bits=(4, 8), progress=False,
             granularity=("channel", 8), input_granularity=("tensor", "token"))
    return net, x, t


def test_scan_view_shows_the_granularity_chosen_and_opens_the_explorer_on_it(token_table):
    net, x, t = token_table
    v = ScanView(t, model=net, data=x)
    assert v.state.granularity == "channel" and v.state.input_granularity == "tensor"
    person_sets(v.controls["granularity"], 8)
    person_sets(v.controls["input_granularity"], "token")
    html_ = _text(v.table_html.value)
    assert "weights quantized, blocks of 8" in html_ and "layer inputs quantized per token" in html_
    # the figures shown are the table's rows of those options
    rows = re.findall(r"fc2 Linear 512 3,072 ([\d. ]+)", html_)
    assert [float(f) for f in rows[0].split()] == [round(t.sqnr_db("fc2", b, granularity=8), 1) for b in t.bits]
    assert [float(f) for f in rows[1].split()] == [
        round(t.sqnr_db("fc2", b, source="input", granularity="token"), 1) for b in t.input_bits]
    v.pick("fc2", bits=4)
    assert v.explorer.grid.block_size == 8 and torch.equal(v.explorer.grid.scale_tensor(),
                                                           t.weight_grid("fc2", 4, granularity=8).scale_tensor())
    assert "blocks of 8" in v.message.text
    with pytest.raises(traitlets.TraitError, match="one the table scanned"):
        v.state.granularity = 32


def test_planner_lists_each_entrys_weight_and_input_granularity(token_table):
    net, x, t = token_table
    p = BudgetPlanner(net, x, table=t)
    text = _text(p.table_html.value)
    for name, row in zip(t.layers, p.plan.to_rows(), strict=True):
        g = row["granularity"]
        label = f"per {g}" if isinstance(g, str) else f"blocks of {g}"
        inp = f"{row['input_bits']}{' per token' if row['input_granularity'] == 'token' else ''}"
        assert f"{name} {row['weight_bits']} {label} {inp} " in text
