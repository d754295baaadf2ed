"""The model's output with some layers quantized, compared with its float output."""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import torch
from torch import nn

from ..core.checks import finite_check
from ..core.grid import UniformGrid, grid_params
from ..core.metrics import ErrorStats, error_stats
from ..core.rounding import quantize
from ..core.setting import LayerSetting
from .layers import (
    BASE_FORWARDS,
    LayerInputError,
    check_layer,
    check_same_math,
    check_tensor,
    describe_layer,
    is_quantizable,
    layer_forward,
    layer_output,
)
from .running import (
    Data,
    available_layers,
    call_metric,
    check_data,
    check_model,
    first_input,
    flat_output,
    names_by_id,
    require_called,
    run_with_hooks,
)


def layer_error(
    layer: nn.Module,
    inputs: torch.Tensor,
    weight_grid: UniformGrid | None = None,
    input_grid: UniformGrid | None = None,
) -> ErrorStats:
    """How much quantizing the weights and / or the inputs perturbs ``layer``'s output.

    Compares :func:`layer_output` in float with :func:`layer_output` on the given grids,
    functionally, without calling or changing the layer.

    >>> import torch
    >>> from torch import nn
    >>> _ = torch.manual_seed(0)
    >>> lin, x = nn.Linear(16, 8), torch.randn(64, 16)
    >>> from qwidgets.model.layers import fit_weight
    >>> e4 = layer_error(lin, x, weight_grid=fit_weight(lin, 4, "minmax"))
    >>> e8 = layer_error(lin, x, weight_grid=fit_weight(lin, 8, "minmax"))
    >>> e8.sqnr_db > e4.sqnr_db + 20
    True
    """
    check_layer(layer, "layer")
    x = check_tensor(inputs, "inputs")
    ref = layer_output(layer, x)
    return error_stats(ref, layer_output(layer, x, weight_grid, input_grid))


@dataclass(frozen=True)
class ModelError:
    """The model's float output versus its output with some layers quantized.

    ``output``: :class:`ErrorStats` over every floating-point tensor of the output, flattened
    and joined; ``metric_float`` / ``metric_quantized``: ``metric(output, target)`` for each
    (None without a metric); ``layers``: the quantized layers, in execution order.

    >>> from qwidgets import error_stats
    >>> import torch
    >>> r = ModelError(error_stats(torch.ones(2), torch.ones(2)), 0.97, 0.96, ("fc",))
    >>> round(r.metric_change, 2), r.output.sqnr_db
    (-0.01, inf)
    """

    output: ErrorStats
    metric_float: float | None = None
    metric_quantized: float | None = None
    layers: tuple[str, ...] = ()

    @property
    def metric_change(self) -> float | None:
        """``metric_quantized - metric_float`` (None without a metric)."""
        if self.metric_float is None or self.metric_quantized is None:
            return None
        return self.metric_quantized - self.metric_float

    def __str__(self) -> str:
        s = f"output: {self.output}"
        if self.metric_float is not None:
            s += f"; metric {self.metric_float:.6g} -> {self.metric_quantized:.6g}"
        return s


def model_error(
    model: nn.Module,
    data: Data,
    settings: Mapping[str, LayerSetting],
    *,
    metric: Callable[[Any, Any], float] | None = None,
    target: Any = None,
) -> ModelError:
    """Run ``model`` on ``data`` in float and with the layers in ``settings`` quantized.

    ``settings`` maps layer names (from ``model.named_modules()``) to :class:`LayerSetting`.
    During the quantized pass a forward hook on each of those layers replaces its output by
    :func:`layer_output` with its weights and / or inputs on the given grids; the hooks are
    removed afterwards and the model is left bit-identical. ``metric(output, target) ->
    float`` (for example accuracy) is evaluated on both outputs when given.

    >>> import torch
    >>> from torch import nn
    >>> _ = torch.manual_seed(0)
    >>> net, x = nn.Sequential(nn.Linear(4, 8), nn.ReLU(), nn.Linear(8, 2)), torch.randn(32, 4)
    >>> from qwidgets import LayerSetting
    >>> from qwidgets.model.layers import fit_weight
    >>> res = model_error(net, x, {"0": LayerSetting(weight=fit_weight(net[0], 8, "minmax"))})
    >>> res.output.sqnr_db > 30, res.layers
    (True, ('0',))
    """
    if metric is not None and not callable(metric):
        raise TypeError(f"metric must be a callable metric(output, target) -> float, got {type(metric).__name__}")
    ref = forward_float(model, data)
    out, applied = _forward_quantized(model, data, settings)
    ref_t, out_t = flat_output(ref, "float"), flat_output(out, "quantized")
    stats = error_stats(ref_t, out_t)
    mf = mq = None
    if metric is not None:
        mf, mq = call_metric(metric, ref, target), call_metric(metric, out, target)
    return ModelError(stats, mf, mq, applied)


def forward_float(model: nn.Module, data: Data) -> Any:
    """The model's output on ``data`` under ``no_grad`` and ``eval()`` (model left untouched).

    The float reference that :func:`model_error` compares with; callers that evaluate many
    settings on the same data (the scan) compute it once.

    >>> import torch
    >>> from torch import nn
    >>> forward_float(nn.Linear(2, 1, bias=False), torch.zeros(3, 2)).shape
    torch.Size([3, 1])
    """
    check_model(model)
    return run_with_hooks(model, check_data(model, data, None), {}, pre=False)


def forward_quantized(model: nn.Module, data: Data, settings: Mapping[str, LayerSetting]) -> Any:
    """The model's output on ``data`` with the layers in ``settings`` quantized (see model_error).

    >>> import torch
    >>> from torch import nn
    >>> lin = nn.Linear(2, 1, bias=False)
    >>> s = {"": LayerSetting(input=UniformGrid(2, 1.0))}
    >>> forward_quantized(lin, torch.full((1, 2), 0.4), s).abs().item()
    0.0
    """
    return _forward_quantized(model, data, settings)[0]


def _forward_quantized(model, data, settings):
    check_model(model)
    settings = _check_settings(model, settings)
    data = check_data(model, data, None)
    names = names_by_id(model)
    weights = {}
    with torch.no_grad():
        for name, (module, s) in settings.items():
            if s.weight is not None:
                grid_params(module.weight, s.weight)  # per-channel size check, clear message
                weights[name] = quantize(module.weight.detach(), s.weight)
    applied: list[str] = []

    def replace(module, args, kwargs, output):
        name = names[id(module)]
        setting = settings[name][1]
        x = first_input(module, name, args, kwargs)
        if x.is_floating_point():
            finite_check(x, f"the input of layer {name!r} ({describe_layer(module)})", LayerInputError)
        if type(module).forward not in BASE_FORWARDS:
            check_same_math(module, name, x, output)
        if setting.input is not None:
            x = quantize(x, setting.input)
        w = weights.get(name, module.weight.detach())
        if name not in applied:
            applied.append(name)
        return layer_forward(module, x, w)

    out = run_with_hooks(model, data, {m: replace for m, _ in settings.values()}, pre=False)
    require_called([m for m, _ in settings.values()], names, {n: 1 for n in applied}, explicit=True)
    return out, tuple(applied)


def _check_settings(model: nn.Module, settings) -> dict:
    if not isinstance(settings, Mapping):
        raise TypeError(f"settings must be a mapping from layer name to LayerSetting, got {type(settings).__name__}")
    modules = dict(model.named_modules())
    out = {}
    for name, s in settings.items():
        if not isinstance(name, str) or name not in modules:
            raise ValueError(f"settings names layer {name!r}, which is not in the model; available: {available_layers(model)}")
        if not isinstance(s, LayerSetting):
            raise TypeError(f"settings[{name!r}] must be a LayerSetting, got {type(s).__name__}")
        module = modules[name]
        if not is_quantizable(module):
            raise TypeError(
                f"settings[{name!r}] is for a {type(module).__name__}; qwidgets evaluates only "
                "nn.Linear and nn.Conv1d/2d/3d (and subclasses) functionally"
            )
        if not s.is_empty:
            out[name] = (module, s)
    return out
