"""Plan.with_setting: a learned grid reaches apply_plan, evaluate_plan and export_codes.

Reference for every check: a naive loop written here (deep copy of the model, each planned
weight overwritten with round-to-nearest on its grid computed element by element with plain
tensor arithmetic, full forward), never the package's own quantizer.
"""

from __future__ import annotations

import copy
import math

import pytest
import torch
from torch import nn

from qwidgets import (
    LayerSetting,
    UniformGrid,
    apply_plan,
    capture_inputs,
    evaluate_plan,
    export_codes,
    learn_grid,
    plan_budget,
    scan,
)
from tests.stored_bits import mean_bits_for


def _naive_quantize(w: torch.Tensor, grid: UniformGrid) -> torch.Tensor:
    """Round to nearest on scale * k + offset, k clamped to the grid's integer range, in float64."""
    qmin, qmax = (-(2 ** (grid.bits - 1)), 2 ** (grid.bits - 1) - 1) if grid.signed else (0, 2 ** grid.bits - 1)
    s = torch.as_tensor(grid.scale, dtype=torch.float64)
    o = torch.as_tensor(grid.offset, dtype=torch.float64)
    if grid.axis is not None:
        shape = [1] * w.dim()
        shape[grid.axis] = -1
        s, o = s.reshape(shape), o.reshape(shape)
    k = torch.clamp(torch.round((w.double() - o) / s), qmin, qmax)
    return (k * s + o).to(w.dtype)


def _naive_planned(model: nn.Module, plan) -> nn.Module:
    new = copy.deepcopy(model)
    with torch.no_grad():
        for name, setting in plan.layers.items():
            layer = new.get_submodule(name)
            layer.weight.copy_(_naive_quantize(layer.weight, setting.weight))
    return new


def _sqnr_db(ref: torch.Tensor, out: torch.Tensor) -> float:
    ref, out = ref.double(), out.double()
    return 10 * math.log10(float((ref ** 2).sum()) / float(((ref - out) ** 2).sum()))


MODELS = {
    "linear": (lambda: nn.Sequential(nn.Linear(12, 24), nn.ReLU(), nn.Linear(24, 5)), (40, 12), "0"),
    "conv2d": (lambda: nn.Sequential(nn.Conv2d(2, 6, 3, padding=1), nn.ReLU(), nn.Flatten(),
                                     nn.Linear(6 * 6 * 6, 4)), (24, 2, 6, 6), "0"),
    "conv1d": (lambda: nn.Sequential(nn.Conv1d(1, 4, 5), nn.Tanh(), nn.Flatten(), nn.Linear(4 * 12, 3)),
               (30, 1, 16), "3"),
}


@pytest.mark.parametrize("family", sorted(MODELS))
def test_learned_grid_reaches_apply_evaluate_and_export(family):
    make, shape, layer = MODELS[family]
    torch.manual_seed(0)
    model = make().eval()
    x = torch.randn(*shape)
    state = {k: v.clone() for k, v in model.state_dict().items()}
    table = scan(model, x, (3, 4, 6), scope="model", progress=False)
    plan = plan_budget(table, mean_bits=mean_bits_for(table, 4.0))
    module = model.get_submodule(layer)
    inputs = capture_inputs(model, x, [layer])[layer]
    start = plan.layers[layer].weight
    # learning starts from a deliberately coarser grid, so the learned one differs from the scan's
    coarse = start.replace(scale=torch.as_tensor(start.scale) * 1.5)
    learned = learn_grid(module, inputs, coarse, steps=15, progress=False).grid
    assert not torch.equal(torch.as_tensor(learned.scale), torch.as_tensor(start.scale))
    new = plan.with_setting(layer, LayerSetting(weight=learned))

    # the new plan holds the learned grid; the old plan is unchanged; the prediction is withdrawn
    assert new.layers[layer].weight is not start and plan.layers[layer].weight is start
    assert torch.equal(torch.as_tensor(new.layers[layer].weight.scale), torch.as_tensor(learned.scale))
    assert new.predicted_sqnr_db is None and plan.predicted_sqnr_db is not None
    assert new.bits[layer] == learned.bits and {n: new.bits[n] for n in new.bits if n != layer} == \
        {n: plan.bits[n] for n in plan.bits if n != layer}

    naive = _naive_planned(model, new)  # reference: the naive loop
    applied = apply_plan(model, new)
    for name in new.layers:
        torch.testing.assert_close(applied.get_submodule(name).weight, naive.get_submodule(name).weight,
                                   rtol=0, atol=1e-6)
    with torch.no_grad():
        ref, out = model(x), naive(x)
    report = evaluate_plan(model, x, new)
    assert report.measured_sqnr_db == pytest.approx(_sqnr_db(ref, out), abs=1e-3)
    # the learned grid, not the scan's, is what was measured
    assert report.measured_sqnr_db != evaluate_plan(model, x, plan).measured_sqnr_db

    codes = export_codes(model, new)[layer]
    g = new.layers[layer].weight
    s = torch.as_tensor(g.scale, dtype=torch.float64)
    o = torch.as_tensor(g.offset, dtype=torch.float64)
    if g.axis is not None:
        view = [1] * module.weight.dim()
        view[g.axis] = -1
        s, o = s.reshape(view), o.reshape(view)
    decoded = (codes["codes"].double() * s + o).to(module.weight.dtype)  # plain arithmetic
    torch.testing.assert_close(decoded, naive.get_submodule(layer).weight, rtol=0, atol=1e-6)
    # the user's model is bit-identical
    assert all(torch.equal(v, state[k]) for k, v in model.state_dict().items())


def test_with_setting_bad_input():
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(4, 6), nn.ReLU(), nn.Linear(6, 2))
    table = scan(model, torch.randn(8, 4), (2, 4), scope="model", progress=False)
    plan = plan_budget(table, mean_bits=mean_bits_for(table, 4.0))
    with pytest.raises(ValueError, match="layer_name 'nope' is not in the plan"):
        plan.with_setting("nope", LayerSetting(weight=UniformGrid(4, 0.1)))
    with pytest.raises(TypeError, match="layer_name must be a str"):
        plan.with_setting(0, LayerSetting(weight=UniformGrid(4, 0.1)))
    with pytest.raises(TypeError, match="setting must be a LayerSetting"):
        plan.with_setting("0", UniformGrid(4, 0.1))
    with pytest.raises(ValueError, match="neither a weight nor an input grid"):
        plan.with_setting("0", LayerSetting())
    with pytest.raises(ValueError, match="has 3 channels on axis 0"):
        plan.with_setting("0", LayerSetting(weight=UniformGrid(4, torch.ones(3) * 0.1, axis=0)))
    # an input grid alone keeps the weight grid and adds input quantization
    both = plan.with_setting("0", LayerSetting(input=UniformGrid(8, 0.05)))
    assert both.layers["0"].weight is plan.layers["0"].weight and both.layers["0"].input.bits == 8
