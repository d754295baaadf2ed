"""GridExplorer.show_setting: the explorer shows a refined plan's grids for one entry."""

from __future__ import annotations

import pytest
import torch
from torch import nn

from qwidgets import (
    GridExplorer,
    LayerSetting,
    UniformGrid,
    capture_inputs,
    layer_error,
    refine_plan,
)
from qwidgets.planning.plan import Plan, model_fingerprint


def _refined():
    torch.manual_seed(4)
    model = nn.Sequential(nn.Linear(6, 12), nn.ReLU(), nn.Linear(12, 3))
    x = torch.randn(64, 6)
    w0 = model[0].weight.detach()
    settings = {"0": LayerSetting(weight=UniformGrid(2, w0.abs().amax(dim=1), axis=0),  # too coarse
                                  input=UniformGrid(3, 0.8)),
                "2": LayerSetting(weight=UniformGrid(2, float(model[2].weight.detach().abs().max()) / 2))}
    plan = Plan(settings, {"0": 2, "2": 2}, fingerprint=model_fingerprint(model),
                weight_shapes={"0": (12, 6), "2": (3, 12)}, macs={"0": 72, "2": 36})
    return model, x, plan, refine_plan(model, x, plan, steps=40, progress=False)


def test_explorer_shows_the_refined_grids_of_an_entry():
    """Reference: layer_error on the layer's captured inputs with the refined grid."""
    model, x, plan, r = _refined()
    assert r.best_step > 0
    refined = r.plan.layers["0"]
    ex = GridExplorer(model, x, layer="0", bits=4)
    fitted = ex.grid
    ex.show_setting(refined)
    ex.refresh()
    assert ex.source == "weight" and ex.grid.bits == 2 and ex.grid.axis == 0
    assert torch.equal(ex.grid.scale_tensor(), refined.weight.scale_tensor())
    assert ex.controls["bits"].value == 2
    inputs = capture_inputs(model, x, ["0"])["0"]
    expected = layer_error(model[0], inputs, weight_grid=refined.weight)
    assert ex.layer_stats.sqnr_db == pytest.approx(expected.sqnr_db, abs=1e-9)
    got = ex.to_setting()
    assert torch.equal(got.input.scale_tensor(), refined.input.scale_tensor())
    assert not torch.equal(fitted.scale_tensor(), ex.grid.scale_tensor())  # the plan's, not the explorer's own


def test_show_setting_checks_its_input():
    model, x, plan, r = _refined()
    ex = GridExplorer(model, x, layer="2", bits=3)
    with pytest.raises(TypeError, match="setting must be a LayerSetting"):
        ex.show_setting(r.plan)
    with pytest.raises(ValueError, match="per-channel values"):
        ex.show_setting(r.plan.layers["0"])  # 12 per-channel scales for a 3-row weight
    given = UniformGrid(3, 0.5, signed=False)
    ex.show_setting(LayerSetting(input=given))
    got = ex.to_setting().input
    assert (got.bits, got.signed, float(got.scale)) == (3, False, 0.5)
