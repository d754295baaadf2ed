"""learn_grid: relaxed-quantization learning of one layer's grid (headless)."""

from __future__ import annotations

import math

import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st
from torch import nn

from qwidgets import LearnResult, UniformGrid, fit_range, layer_error, learn_grid
from qwidgets.learn.optim import Adam


def _layer(seed=0, n_in=24, n_out=12):
    torch.manual_seed(seed)
    layer = nn.Linear(n_in, n_out)
    x = torch.randn(96, n_in)
    return layer, x


def _snapshot(module: nn.Module):
    return (
        {k: v.detach().clone() for k, v in module.state_dict().items()},
        [(m.training) for m in module.modules()],
        [p.requires_grad for p in module.parameters()],
        [p.grad for p in module.parameters()],
    )


def _assert_untouched(module: nn.Module, snap) -> None:
    state, flags, req, grads = snap
    for k, v in module.state_dict().items():
        assert torch.equal(v, state[k]), k
    assert [m.training for m in module.modules()] == flags
    assert [p.requires_grad for p in module.parameters()] == req
    assert all(p.grad is None for p in module.parameters()) and all(g is None for g in grads)
    for m in module.modules():
        assert not m._forward_hooks and not m._forward_pre_hooks and not m._backward_hooks


# ---------------------------------------------------------------------------- outside reference
def test_adam_matches_torch_optim_adam():
    """Reference: torch.optim.Adam (Kingma & Ba 2015) with the same learning-rate sequence."""
    torch.manual_seed(3)
    a = torch.randn(5, requires_grad=True)
    b = a.detach().clone().requires_grad_(True)
    ours = Adam([a])
    ref = torch.optim.Adam([b], lr=0.1)
    for i in range(25):
        lr = 0.1 * (1 + math.cos(math.pi * i / 25)) / 2
        for p in (a, b):
            p.grad = None
            ((p - 1.5) ** 2 * torch.arange(1.0, 6.0)).sum().backward()
        ours.step(lr)
        for group in ref.param_groups:
            group["lr"] = lr
        ref.step()
        torch.testing.assert_close(a, b, rtol=1e-6, atol=1e-7)


def test_result_equals_probe_layer_error_for_the_returned_grid():
    """The hard statistics reported are layer_error's (probe module) for the same grid."""
    layer, x = _layer()
    start = fit_range(layer.weight.detach(), 3, "minmax")
    r = learn_grid(layer, x, start, steps=30, progress=False)
    assert r.stats == layer_error(layer, x, weight_grid=r.grid)
    assert r.start_stats == layer_error(layer, x, weight_grid=start)
    assert r.hard_sqnr_db[r.best_step] == r.stats.sqnr_db
    assert r.stats.sqnr_db == max(r.hard_sqnr_db)


# ---------------------------------------------------------------------------- the main job
@pytest.mark.parametrize("factor", [10.0, 0.1])
def test_learning_from_a_poor_scale_improves_the_hard_output_sqnr(factor):
    layer, x = _layer(1)
    good = fit_range(layer.weight.detach(), 4, "mse")
    poor = good.replace(scale=good.scale * factor)
    snap = _snapshot(layer)
    r = learn_grid(layer, x, poor, steps=150, progress=False)
    _assert_untouched(layer, snap)
    assert isinstance(r, LearnResult)
    assert r.stats.sqnr_db > r.start_stats.sqnr_db + 6.0  # a poor scale costs far more than 6 dB
    # and it gets near a fitted MSE range (within 3 dB of the layer-output SQNR it gives)
    assert r.stats.sqnr_db > layer_error(layer, x, weight_grid=good).sqnr_db - 3.0
    assert len(r.loss) == 150 and len(r.hard_sqnr_db) == 151
    assert r.improvement_db == pytest.approx(r.stats.sqnr_db - r.start_stats.sqnr_db)


def test_input_source_improves_a_poor_input_grid():
    layer, x = _layer(2)
    poor = fit_range(x, 4, "minmax").replace(scale=0.02)
    r = learn_grid(layer, x, poor, source="input", steps=100, progress=False)
    assert r.source == "input"
    assert r.stats == layer_error(layer, x, input_grid=r.grid)
    assert r.stats.sqnr_db > r.start_stats.sqnr_db + 6.0


def test_per_channel_grid_keeps_its_shape_and_never_gets_worse():
    layer, x = _layer(4)
    start = fit_range(layer.weight.detach(), 3, "minmax", axis=0)
    r = learn_grid(layer, x, start, steps=40, progress=False)
    assert r.grid.axis == 0 and r.grid.scale.shape == (12,) and r.grid.offset.shape == (12,)
    assert not r.grid.scale.requires_grad
    assert r.stats.sqnr_db >= r.start_stats.sqnr_db
    assert r.noise_width.shape == (12,)


def test_conv_layer():
    torch.manual_seed(5)
    conv = nn.Conv1d(3, 8, 5, padding=2)
    x = torch.randn(16, 3, 40)
    start = fit_range(conv.weight.detach(), 3, "mse").replace(scale=0.5)
    snap = _snapshot(conv)
    r = learn_grid(conv, x, start, steps=60, progress=False)
    _assert_untouched(conv, snap)
    assert r.stats == layer_error(conv, x, weight_grid=r.grid)
    assert r.stats.sqnr_db > r.start_stats.sqnr_db


@settings(max_examples=12, deadline=None)
@given(
    seed=st.integers(0, 1000),
    bits=st.integers(1, 6),
    factor=st.floats(0.05, 20.0),
    lr=st.floats(0.01, 2.0),
    source=st.sampled_from(["weight", "input"]),
)
def test_never_worse_than_the_start(seed, bits, factor, lr, source):
    """Property: whatever the learning rate, the returned grid is at least as good as the start."""
    layer, x = _layer(seed, 8, 5)
    target = layer.weight.detach() if source == "weight" else x
    start = fit_range(target, bits, "minmax")
    start = start.replace(scale=start.scale * factor)
    r = learn_grid(layer, x, start, source=source, steps=8, lr=lr, progress=False)
    assert r.stats.sqnr_db >= r.start_stats.sqnr_db
    assert r.grid.bits == bits and r.grid.signed == start.signed
    assert r.grid.scale > 0 and math.isfinite(r.grid.offset)


def test_repeatable_with_a_seed_and_zero_steps_returns_the_start():
    layer, x = _layer(6)
    start = UniformGrid(3, 0.05)
    a = learn_grid(layer, x, start, steps=20, progress=False, seed=7)
    b = learn_grid(layer, x, start, steps=20, progress=False, seed=7)
    assert a.loss == b.loss and a.grid.scale == b.grid.scale
    z = learn_grid(layer, x, start, steps=0, progress=False)
    assert z.grid.scale == start.scale and z.best_step == 0 and z.loss == []


def test_learn_offset_false_keeps_the_offset():
    layer, x = _layer(8)
    start = UniformGrid(3, 0.3, offset=0.0)  # far too coarse
    r = learn_grid(layer, x, start, steps=40, progress=False, learn_offset=False)
    assert r.grid.offset == 0.0
    assert r.grid.has_zero_point()


def test_callback_sees_every_step():
    layer, x = _layer(10)
    seen = []
    r = learn_grid(layer, x, UniformGrid(4, 0.2), steps=6, progress=False,
                   callback=lambda step, grid, noise, stats: seen.append((step, stats.sqnr_db)))
    assert [s for s, _ in seen] == [1, 2, 3, 4, 5, 6]
    assert [q for _, q in seen] == r.hard_sqnr_db[1:]
    with pytest.raises(TypeError, match="callback must be callable"):
        learn_grid(layer, x, UniformGrid(4, 0.2), callback=3)


def test_progress_bar_runs(capsys):
    layer, x = _layer(9)
    learn_grid(layer, x, UniformGrid(4, 0.05), steps=5, progress=True)
    assert "learning the grid" in capsys.readouterr().err


# ---------------------------------------------------------------------------- bad input
@pytest.mark.parametrize(
    "kwargs, error, words",
    [
        (dict(source="bias"), ValueError, "source must be 'weight' or 'input'"),
        (dict(steps=-1), ValueError, "steps must be an int >= 0"),
        (dict(steps=2.5), TypeError, "steps must be an int >= 0"),
        (dict(steps="3"), TypeError, "steps must be an int >= 0"),
        (dict(lr=0.0), ValueError, "lr must be > 0"),
        (dict(temperature=-1.0), ValueError, "temperature must be > 0"),
        (dict(noise_steps=0.001), ValueError, r"noise_steps must be >= 0.02 \(a fraction of the grid step\)"),
        (dict(noise_steps=float("nan")), ValueError, "noise_steps must be finite"),
        (dict(noise_steps="0.3"), TypeError, "noise_steps must be a float"),
        (dict(noise_steps=torch.tensor(0.3)), TypeError, "noise_steps must be a float"),
        (dict(window=4), ValueError, "window must be an odd int"),
    ],
)
def test_bad_arguments_are_named(kwargs, error, words):
    layer, x = _layer()
    with pytest.raises(error, match=words):
        learn_grid(layer, x, UniformGrid(4, 0.05), progress=False, **kwargs)


def test_noise_steps_is_a_fraction_of_the_step_and_noise_a_deprecated_alias():
    layer, x = _layer(11)
    grid = UniformGrid(4, 0.05)
    new = learn_grid(layer, x, grid, noise_steps=0.5, steps=3, progress=False)
    with pytest.warns(DeprecationWarning, match="noise_steps"):
        old = learn_grid(layer, x, grid, noise=0.5, steps=3, progress=False)
    assert old.loss == new.loss and old.noise_steps == new.noise_steps
    # the unit: the value-unit width the core functions take is noise_steps * scale
    assert new.noise_width == pytest.approx(new.noise_steps * new.grid.scale)
    with pytest.warns(DeprecationWarning, match="noise_steps"):
        assert new.noise == new.noise_steps
    with pytest.raises(TypeError, match="not both"):
        learn_grid(layer, x, grid, noise=0.5, noise_steps=0.5, progress=False)
    with pytest.warns(DeprecationWarning), pytest.raises(ValueError, match="noise must be >= 0.02"):
        learn_grid(layer, x, grid, noise=0.001, progress=False)


def test_bad_layer_grid_and_inputs():
    layer, x = _layer()
    with pytest.raises(TypeError, match="layer is a ReLU"):
        learn_grid(nn.ReLU(), x, UniformGrid(4, 0.05))
    with pytest.raises(TypeError, match="grid must be a UniformGrid"):
        learn_grid(layer, x, 0.05)
    bad = x.clone()
    bad[0, 0] = float("nan")
    with pytest.raises(ValueError, match="inputs holds 1 NaN"):
        learn_grid(layer, bad, UniformGrid(4, 0.05))
    with pytest.raises(ValueError, match="do not fit"):
        learn_grid(layer, torch.randn(4, 7), UniformGrid(4, 0.05), progress=False)
