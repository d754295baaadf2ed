"""A person's move always lands: the three reproductions of the widget-state issue, driven
through ``Widget.set_state``, the entry ipywidgets uses for a message from a browser.

The browser is stood in for by `front_end.FrontEnd` (what the ipywidgets 8 front end sends).
"""

from __future__ import annotations

import pytest
import torch
from front_end import FrontEnd, person_sets
from torch import nn

from qwidgets import grid_usage
from qwidgets.planning.scanning import scan
from qwidgets.widgets.explorer import GridExplorer
from qwidgets.widgets.planner import BudgetPlanner
from tests.stored_bits import mean_bits_for


@pytest.fixture
def explorer():
    torch.manual_seed(3)
    return GridExplorer(nn.Linear(24, 12), torch.randn(40, 24), bits=4)


def test_bits_moved_back_to_a_width_the_kernel_set_earlier_is_kept(explorer):
    ex = explorer
    browser = FrontEnd(*ex.controls.values())
    ex.controls["bits"].value = 6  # a script (or the scan view, a loaded setting) sets 6
    ex.controls["bits"].value = 2  # and then 2
    browser.deliver()
    person_sets(ex.controls["bits"], 6)  # the person moves the control back to 6
    ex.refresh()
    assert ex.grid.bits == 6 and ex.controls["bits"].value == 6
    assert ex.readouts["bits"].startswith("6 ")


def test_signed_codes_unticked_after_the_kernel_toggled_them_is_kept(explorer):
    ex = explorer
    browser = FrontEnd(*ex.controls.values())
    ex.controls["signed"].value = False  # switching sources can do this
    ex.controls["signed"].value = True
    browser.deliver()
    person_sets(ex.controls["signed"], False)  # the person unticks it
    ex.refresh()
    assert ex.grid.signed is False and ex.controls["signed"].value is False
    person_sets(ex.controls["signed"], True)  # and it can be ticked and unticked again
    person_sets(ex.controls["signed"], False)
    assert ex.grid.signed is False


def test_budget_unit_switch_in_the_browser_keeps_a_plan_with_a_learned_grid():
    torch.manual_seed(0)
    net = nn.Sequential(nn.Linear(16, 32), nn.ReLU(), nn.Linear(32, 24), nn.ReLU(),
                        nn.Linear(24, 4)).eval()
    x = torch.randn(64, 16)
    table = scan(net, x, (2, 3, 4, 6, 8), progress=False)
    p = BudgetPlanner(net, x, table=table)
    p.set_budget("mean_bits", mean_bits_for(table, 3.0))  # stored bits: 3 for the codes, plus scales
    layer = max(p.plan.layers, key=table.params)
    ex = GridExplorer(net, x, layer=layer, bits=p.plan.bits[layer])
    ex.learn(steps=5)
    p.use_grid(ex)
    plan, learned = p.plan, p.plan.layers[layer].weight
    browser = FrontEnd(*p.controls.values())
    browser.deliver()
    for kind in ("bops", "planned_kib", "model_kib", "mean_bits"):
        person_sets(p.controls["kind"], kind)  # the person switches "budget in"
        browser.deliver()  # what the browser sent meanwhile
        p.refresh()
        assert p.plan is plan, kind  # the plan of the browser is the plan of the code
        assert p.plan.layers[layer].weight is learned
        assert not p.message.is_error, p.message.text


def test_unsigned_codes_on_signed_values_are_warned_about(explorer):
    ex = explorer
    person_sets(ex.controls["signed"], False)
    ex.refresh()
    # the share of negative weights, counted here, and the clipped share the core measures
    below = float((ex.subject.values["weight"] < 0).double().mean())
    clipped = grid_usage(ex.subject.values["weight"], ex.grid).clipped_fraction
    assert clipped > 0.05
    assert ex.message.text == (f"warning: this grid clips {100 * clipped:.3g} % of the values (unsigned "
                               f"codes on signed values: {100 * below:.3g} % are negative)")
    assert "unsigned codes on signed values" in ex.readouts["warning"]


def test_readouts_name_the_grid_shown_and_the_codes_drawn(explorer):
    ex = explorer
    person_sets(ex.controls["method"], "percentile")  # the next fit: not the grid shown yet
    ex.refresh()
    assert ex.readouts["grid shown"] == "fitted, MSE-optimal"
    ex.controls["fit"].click()
    ex.refresh()
    assert ex.readouts["grid shown"] == "fitted, percentile (99.99)"
    person_sets(ex.controls["source"], "input")  # the input's grid: fitted when it was made
    ex.refresh()
    assert ex.readouts["grid shown"] == "fitted, MSE-optimal"
    person_sets(ex.controls["offset"].box, "10m")
    ex.refresh()
    assert ex.readouts["grid shown"] == "edited by hand" and ex.readouts["offset"] == "10m"
    assert "codes drawn in the bin map" in ex.readouts


def test_a_grid_edited_by_hand_stays_until_the_person_replaces_it(explorer):
    ex = explorer
    person_sets(ex.controls["scale"].box, "20m")
    edited = ex.grid
    person_sets(ex.controls["bits"], 6)
    person_sets(ex.controls["bits"], 4)  # back: the edited grid, not a refit
    assert ex.grid is edited and ex.state.scale == 0.02
    ex.controls["reset"].click()  # the person replaces it
    assert ex.grid is not edited and ex.readouts["grid shown"].startswith("fitted")


def test_a_typed_value_the_state_refuses_is_said_and_the_box_shows_the_state(explorer):
    ex = explorer
    before = ex.grid
    person_sets(ex.controls["scale"].box, "-3")
    assert ex.message.is_error and "scale must be a finite number > 0" in ex.message.text
    assert ex.grid is before and ex.controls["scale"].box.value == ex.readouts["step"]
    person_sets(ex.controls["temperature"].box, "warm")
    assert "expected a number" in ex.message.text and ex.controls["temperature"].box.value == "0.5"
