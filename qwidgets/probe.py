"""Probe a user's model: what each layer receives, and what quantizing it does to the output.

Nothing here changes the user's model. Every pass runs under ``torch.no_grad()`` with the model
in ``eval()`` mode (so BatchNorm running statistics and dropout are untouched); the training
flag of every submodule is restored exactly and every hook this module adds is removed in a
``finally`` block, also when the forward raises.

Conventions (one place, used by the scan, the explorer and the planner):

- quantizable layers are ``nn.Linear`` and ``nn.Conv1d/2d/3d`` and their subclasses;
- weights are quantized per output channel along axis ``WEIGHT_AXIS = 0``;
- a layer's output under quantization is computed functionally (``layer_output``) from its
  weight, bias and hyper-parameters, never by changing the layer.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from numbers import Integral, Real
from typing import Any

import torch
import torch.nn.functional as F
from torch import nn

from ._prep import as_input, grid_params
from .grid import UniformGrid
from .metrics import ErrorStats, error_stats
from .quantize import quantize
from .ranges import fit_range
from .setting import LayerSetting

__all__ = [
    "QUANTIZABLE_TYPES",
    "WEIGHT_AXIS",
    "ModelError",
    "capture_inputs",
    "fit_weight",
    "forward_float",
    "forward_quantized",
    "is_quantizable",
    "layer_error",
    "layer_macs",
    "layer_output",
    "model_error",
    "quantizable_layers",
]

# what a model is run on: model(tensor), model(*tuple), model(**dict)
Data = torch.Tensor | tuple | list | Mapping[str, Any]

QUANTIZABLE_TYPES: tuple[type[nn.Module], ...] = (nn.Linear, nn.Conv1d, nn.Conv2d, nn.Conv3d)
WEIGHT_AXIS = 0  # weights of Linear / Conv layers are quantized per output channel (axis 0)

_CONV = {nn.Conv1d: F.conv1d, nn.Conv2d: F.conv2d, nn.Conv3d: F.conv3d}


class LayerInputError(ValueError):
    """A problem found by one of our hooks inside the forward (reported as it is, not wrapped)."""


# ---------------------------------------------------------------------------- layers
def is_quantizable(module: nn.Module) -> bool:
    """True for ``nn.Linear`` and ``nn.Conv1d/2d/3d`` (and subclasses).

    >>> from torch import nn
    >>> is_quantizable(nn.Conv2d(1, 2, 3)), is_quantizable(nn.ReLU())
    (True, False)
    """
    return isinstance(module, QUANTIZABLE_TYPES)


def quantizable_layers(model: nn.Module, data: Data | None = None) -> list[str]:
    """Qualified names of the model's quantizable layers.

    Without ``data``: in registration order (``model.named_modules()``). With ``data``: in
    execution order of one forward pass on it (layers that do not run are left out), run like
    :func:`capture_inputs` (no_grad, eval, model untouched).

    >>> from torch import nn
    >>> quantizable_layers(nn.Sequential(nn.Linear(4, 3), nn.ReLU(), nn.Linear(3, 2)))
    ['0', '2']
    """
    check_model(model)
    if data is None:
        return [n for n, m in model.named_modules() if is_quantizable(m)]
    order: list[str] = []
    names = _name_of(model)
    targets = [m for _, m in model.named_modules() if is_quantizable(m)]
    if not targets:
        raise ValueError(_no_layers_message(model))

    def record(module, args, kwargs):
        name = names[id(module)]
        if name not in order:
            order.append(name)

    run_with_hooks(model, check_data(model, data, None), {m: record for m in targets}, pre=True)
    return order


def fit_weight(layer: nn.Module, bits: int, method: str = "mse", *, per_channel: bool = True,
               **options) -> UniformGrid:
    """Fit a grid to a Linear / Conv layer's weight (per output channel, axis 0, by default).

    ``options`` go to :func:`qwidgets.fit_range` (``symmetric``, ``style``, ``percentile``, ...).

    >>> import torch
    >>> from torch import nn
    >>> _ = torch.manual_seed(0)
    >>> g = fit_weight(nn.Linear(8, 3), 4, "minmax")
    >>> g.axis, tuple(g.scale.shape)
    (0, (3,))
    """
    check_layer(layer, "layer")
    return fit_range(layer.weight.detach(), bits, method,
                     axis=WEIGHT_AXIS if per_channel else None, **options)


def layer_output(
    layer: nn.Module,
    inputs: torch.Tensor,
    weight_grid: UniformGrid | None = None,
    input_grid: UniformGrid | None = None,
) -> torch.Tensor:
    """The layer's output on ``inputs``, with its weight and / or its inputs fake-quantized.

    Computed with ``torch.nn.functional`` from the layer's weight, bias, stride, padding
    (and padding mode), dilation and groups; the layer itself is not called and not changed.
    Subclasses of Linear / Conv are evaluated with the base class's arithmetic. No gradient
    is recorded.

    >>> import torch
    >>> from torch import nn
    >>> lin = nn.Linear(3, 2)
    >>> x = torch.randn(5, 3)
    >>> torch.allclose(layer_output(lin, x), lin(x))
    True
    """
    check_layer(layer, "layer")
    x = _check_tensor(inputs, "inputs")
    w = layer.weight.detach()
    with torch.no_grad():
        if input_grid is not None:
            _check_grid(input_grid, "input_grid")
            x = quantize(x, input_grid)
        if weight_grid is not None:
            _check_grid(weight_grid, "weight_grid")
            grid_params(w, weight_grid)  # shape check with a clear message
            w = quantize(w, weight_grid)
        return layer_forward(layer, x, w)


def layer_forward(layer: nn.Module, x: torch.Tensor, w: torch.Tensor, *, use_bias: bool = True
                ) -> torch.Tensor:
    b = None if (layer.bias is None or not use_bias) else layer.bias.detach()
    try:
        if isinstance(layer, nn.Linear):
            return F.linear(x, w, b)
        conv = next(f for t, f in _CONV.items() if isinstance(layer, t))
        padding = layer.padding
        if layer.padding_mode != "zeros":
            x = F.pad(x, layer._reversed_padding_repeated_twice, mode=layer.padding_mode)
            padding = 0
        return conv(x, w, b, layer.stride, padding, layer.dilation, layer.groups)
    except RuntimeError as e:
        raise ValueError(
            f"inputs of shape {tuple(x.shape)} (dtype {x.dtype}) do not fit {_describe(layer)}: {e}"
        ) from e


def layer_macs(layer: nn.Module, input_shape: Iterable[int]) -> int:
    """Multiply-accumulates of one call of ``layer`` on an input of ``input_shape``.

    Counts the whole shape given (pass a batch of 1 for a per-sample count); bias additions
    are not counted. Uses a shape-only ("meta") evaluation, so it costs no arithmetic.

    >>> from torch import nn
    >>> layer_macs(nn.Linear(10, 4), (1, 10)), layer_macs(nn.Conv2d(3, 8, 3, padding=1), (1, 3, 32, 32))
    (40, 221184)
    """
    check_layer(layer, "layer")
    shape = tuple(int(s) for s in input_shape)
    w = layer.weight
    x = torch.empty(shape, device="meta", dtype=w.dtype)
    out = layer_forward(layer, x, torch.empty(w.shape, device="meta", dtype=w.dtype), use_bias=False)
    if isinstance(layer, nn.Linear):
        return out.numel() * layer.in_features
    per_output = (layer.in_channels // layer.groups) * math.prod(layer.kernel_size)
    return out.numel() * per_output


# ---------------------------------------------------------------------------- capture
def capture_inputs(model: nn.Module, data: Data, layers: str | Iterable[str] | None = None, *,
                   max_samples: int | None = None) -> dict[str, torch.Tensor]:
    """The tensor each layer received when ``model`` ran once on ``data``.

    Parameters
    ----------
    model : the user's ``nn.Module`` (left bit-identical: parameters, buffers, training
        flags and hooks)
    data : a tensor (``model(data)``), a tuple / list (``model(*data)``) or a dict
        (``model(**data)``)
    layers : None for every quantizable layer (``nn.Linear``, ``nn.Conv1d/2d/3d``), or names
        from ``model.named_modules()`` (any module type; a single name may be given as a str)
    max_samples : keep only the first that many items along axis 0 of every data tensor
        (before the forward; so a layer called k times holds k * max_samples rows)

    Returns a dict from qualified name to a detached copy of the layer's first positional
    input, in execution order. Layers that did not run are left out (an error if named in
    ``layers``). A layer called several times gets the inputs of all calls concatenated
    along axis 0 (for a Linear layer whose calls differ in leading shape, each is flattened
    to ``(-1, in_features)`` first); if they cannot be joined the first call is kept, with
    a warning.

    >>> import torch
    >>> from torch import nn
    >>> net = nn.Sequential(nn.Linear(4, 3), nn.ReLU(), nn.Linear(3, 2))
    >>> seen = capture_inputs(net, torch.randn(10, 4), max_samples=6)
    >>> {k: tuple(v.shape) for k, v in seen.items()}
    {'0': (6, 4), '2': (6, 3)}
    """
    check_model(model)
    max_samples = check_max_samples(max_samples)
    targets = _resolve_layers(model, layers)
    data = check_data(model, data, max_samples)
    names = _name_of(model)
    calls: dict[str, list[torch.Tensor]] = {}

    def grab(module, args, kwargs):
        name = names[id(module)]
        x = first_input(module, name, args, kwargs)
        if x.is_floating_point():
            _finite_or_raise(x, f"the input of layer {name!r} ({_describe(module)})")
        calls.setdefault(name, []).append(x.detach().clone())

    run_with_hooks(model, data, {m: grab for m in targets}, pre=True)
    _require_called(targets, names, calls, explicit=layers is not None)
    return {name: _join(name, tensors, _module(model, name)) for name, tensors in calls.items()}


def _join(name: str, tensors: list[torch.Tensor], module: nn.Module) -> torch.Tensor:
    if len(tensors) == 1:
        return tensors[0]
    if all(t.dim() >= 1 and t.shape[1:] == tensors[0].shape[1:] for t in tensors):
        return torch.cat(tensors, dim=0)
    if isinstance(module, nn.Linear):
        return torch.cat([t.reshape(-1, t.shape[-1]) for t in tensors], dim=0)
    warnings.warn(
        f"layer {name!r} ran {len(tensors)} times on inputs of different shapes "
        f"({', '.join(str(tuple(t.shape)) for t in tensors[:3])}, ...); keeping the first call",
        stacklevel=3,
    )
    return tensors[0]


# ---------------------------------------------------------------------------- errors
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
    >>> e4 = layer_error(lin, x, weight_grid=fit_weight(lin, 4, "minmax"))
    >>> e8 = layer_error(lin, x, weight_grid=fit_weight(lin, 8, "minmax"))
    >>> e8.sqnr_db > e4.sqnr_db + 20
    True
    """
    check_layer(layer, "layer")
    x = _check_tensor(inputs, "inputs")
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
    names = _name_of(model)
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
            _finite_or_raise(x, f"the input of layer {name!r} ({_describe(module)})")
        if type(module).forward not in BASE_FORWARDS:
            check_same_math(module, name, x, output)
        if setting.input is not None:
            x = quantize(x, setting.input)
        w = weights.get(name, module.weight.detach())
        if name not in applied:
            applied.append(name)
        return layer_forward(module, x, w)

    out = run_with_hooks(model, data, {m: replace for m, _ in settings.values()}, pre=False)
    _require_called([m for m, _ in settings.values()], names, {n: 1 for n in applied}, explicit=True)
    return out, tuple(applied)


BASE_FORWARDS = {nn.Linear.forward, nn.Conv1d.forward, nn.Conv2d.forward, nn.Conv3d.forward}


def check_same_math(module, name, x, output) -> None:
    """A subclass that overrides forward must still compute what layer_output computes."""
    ref = layer_forward(module, x, module.weight.detach())
    if not isinstance(output, torch.Tensor) or output.shape != ref.shape or not torch.allclose(
        output, ref, rtol=1e-4, atol=1e-5 * float(ref.abs().max().clamp(min=1))
    ):
        raise LayerInputError(
            f"layer {name!r} ({type(module).__name__}) overrides forward and its output differs "
            f"from the {base_type_name(module)} arithmetic qwidgets evaluates; it cannot be "
            "evaluated functionally"
        )


# ---------------------------------------------------------------------------- running
def run_with_hooks(model: nn.Module, data, hooks: dict, *, pre: bool):
    """One forward pass under no_grad and eval(), with temporary hooks; model restored after."""
    flags = [(m, m.training) for m in model.modules()]
    handles = []
    try:
        for module, fn in hooks.items():
            if pre:
                handles.append(module.register_forward_pre_hook(fn, with_kwargs=True))
            else:  # run before the user's own forward hooks, so they see the quantized output
                handles.append(module.register_forward_hook(fn, with_kwargs=True, prepend=True))
        model.eval()
        with torch.no_grad():
            try:
                if isinstance(data, dict):
                    return model(**data)
                if isinstance(data, tuple):
                    return model(*data)
                return model(data)
            except LayerInputError:
                raise
            except Exception as e:
                raise RuntimeError(
                    f"the model's forward failed on the given data ({_describe_data(data)}): "
                    f"{type(e).__name__}: {e}"
                ) from e
    finally:
        for h in handles:
            h.remove()
        for m, flag in flags:
            m.training = flag


def first_input(module, name, args, kwargs) -> torch.Tensor:
    x = args[0] if args else kwargs.get("input", next(iter(kwargs.values()), None))
    if not isinstance(x, torch.Tensor):
        raise LayerInputError(
            f"layer {name!r} ({type(module).__name__}) was called without a tensor as its first "
            f"input (got {type(x).__name__}); qwidgets cannot capture it"
        )
    return x


def _require_called(targets, names, seen, *, explicit: bool) -> None:
    missing = [names[id(m)] for m in targets if names[id(m)] not in seen]
    if not missing:
        return
    if explicit or len(missing) == len(targets):
        raise ValueError(
            f"layer(s) {missing} did not run during the forward pass on this data (a module "
            "whose weight is used directly by its parent never runs as a layer)"
        )


def flat_output(out, which: str) -> torch.Tensor:
    parts = [t.detach().reshape(-1).double() for t in iter_tensors(out) if t.is_floating_point()]
    if not parts:
        raise ValueError(f"the model's {which} output holds no floating-point tensor to compare "
                         f"(got {type(out).__name__})")
    return parts[0] if len(parts) == 1 else torch.cat(parts)


def iter_tensors(obj):
    if isinstance(obj, torch.Tensor):
        yield obj
    elif isinstance(obj, Mapping):
        for v in obj.values():
            yield from iter_tensors(v)
    elif isinstance(obj, (list, tuple)):
        for v in obj:
            yield from iter_tensors(v)


def call_metric(metric, output, target) -> float:
    value = metric(output, target)
    if isinstance(value, torch.Tensor) and value.numel() == 1:
        value = value.item()
    if isinstance(value, bool) or not isinstance(value, Real):
        raise TypeError(f"metric(output, target) must return a float, got {type(value).__name__}")
    return float(value)


# ---------------------------------------------------------------------------- validation
def check_model(model) -> None:
    if not isinstance(model, nn.Module):
        raise TypeError(f"model must be a torch.nn.Module, got {type(model).__name__}")


def check_layer(layer, name: str) -> None:
    if not isinstance(layer, nn.Module):
        raise TypeError(f"{name} must be a torch.nn.Module, got {type(layer).__name__}")
    if not is_quantizable(layer):
        raise TypeError(
            f"{name} is a {type(layer).__name__}; qwidgets evaluates only nn.Linear and "
            "nn.Conv1d/2d/3d (and subclasses) functionally"
        )


def _check_grid(grid, name: str) -> None:
    if not isinstance(grid, UniformGrid):
        raise TypeError(f"{name} must be a UniformGrid or None, got {type(grid).__name__}")


def _check_tensor(x, name: str) -> torch.Tensor:
    if not isinstance(x, torch.Tensor):
        raise TypeError(f"{name} must be a torch.Tensor, got {type(x).__name__}")
    if x.numel() == 0:
        raise ValueError(f"{name} is empty (shape {tuple(x.shape)})")
    if x.is_floating_point():
        as_input(x, name)  # NaN / inf check with a count
    return x.detach()


def check_max_samples(n):
    if n is None:
        return None
    if isinstance(n, bool) or not isinstance(n, Integral) or n < 1:
        raise ValueError(f"max_samples must be None or an int >= 1, got {n!r}")
    return int(n)


def check_data(model: nn.Module, data, max_samples):
    """Data as a tensor, tuple of args or dict of kwargs; sliced, checked for device and finiteness."""
    if isinstance(data, list):
        data = tuple(data)
    if isinstance(data, torch.Tensor):
        items = [("data", data)]
    elif isinstance(data, tuple):
        items = [(f"data[{i}]", v) for i, v in enumerate(data)]
    elif isinstance(data, Mapping):
        data = dict(data)
        items = [(f"data[{k!r}]", v) for k, v in data.items()]
    else:
        raise TypeError(f"data must be a tensor, a tuple of tensors or a dict of tensors, got {type(data).__name__}")
    tensors = [(n, t) for n, t in items if isinstance(t, torch.Tensor)]
    if not tensors:
        raise ValueError("data holds no tensor; give a tensor, or a tuple / dict of tensors")
    for n, t in tensors:
        if t.numel() == 0:
            raise ValueError(f"{n} is empty (shape {tuple(t.shape)}); give at least one sample")
        if t.is_floating_point():
            _finite_or_raise(t, n)
    devices = {p.device for p in model.parameters()} | {b.device for b in model.buffers()}
    for n, t in tensors:
        if devices and t.device not in devices:
            raise ValueError(
                f"{n} is on {t.device} but the model's parameters are on "
                f"{', '.join(sorted(map(str, devices)))}; move one of them"
            )
    if max_samples is not None:
        def cut(v):
            return v[:max_samples] if isinstance(v, torch.Tensor) and v.dim() >= 1 else v
        if isinstance(data, torch.Tensor):
            data = cut(data)
        elif isinstance(data, tuple):
            data = tuple(cut(v) for v in data)
        else:
            data = {k: cut(v) for k, v in data.items()}
    return data


def _finite_or_raise(x: torch.Tensor, what: str) -> None:
    if bool(torch.isfinite(x.detach().sum())):
        return
    n_nan, n_inf = int(torch.isnan(x).sum()), int(torch.isinf(x).sum())
    if n_nan or n_inf:
        raise LayerInputError(f"{what} holds {n_nan} NaN and {n_inf} inf value(s) out of "
                               f"{x.numel()}; quantization needs finite numbers")


def _resolve_layers(model: nn.Module, layers) -> list[nn.Module]:
    modules = dict(model.named_modules())
    if layers is None:
        found = [m for m in modules.values() if is_quantizable(m)]
        if not found:
            raise ValueError(_no_layers_message(model))
        return found
    if isinstance(layers, str):
        layers = [layers]
    if not isinstance(layers, Iterable):
        raise TypeError(f"layers must be None or a list of layer names, got {type(layers).__name__}")
    layers = list(dict.fromkeys(layers))
    if not layers:
        raise ValueError("layers is empty; give None for every quantizable layer, or some names")
    bad = [n for n in layers if not isinstance(n, str) or n not in modules]
    if bad:
        raise ValueError(f"layers {bad} not found in the model; available: {_available(model)}")
    return [modules[n] for n in layers]


def _check_settings(model: nn.Module, settings) -> dict:
    if not isinstance(settings, Mapping):
        raise TypeError(f"settings must be a mapping from layer name to LayerSetting, got {type(settings).__name__}")
    modules = dict(model.named_modules())
    out = {}
    for name, s in settings.items():
        if not isinstance(name, str) or name not in modules:
            raise ValueError(f"settings names layer {name!r}, which is not in the model; available: {_available(model)}")
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


def _available(model: nn.Module) -> str:
    names = [n for n, m in model.named_modules() if is_quantizable(m)]
    return f"quantizable layers {names}" if names else f"modules {[n for n, _ in model.named_modules()]}"


def _no_layers_message(model: nn.Module) -> str:
    kinds = sorted({type(m).__name__ for m in model.modules()})
    return (f"model has no quantizable layers (nn.Linear, nn.Conv1d/2d/3d); it holds only "
            f"{', '.join(kinds)}")


def _name_of(model: nn.Module) -> dict[int, str]:
    return {id(m): n for n, m in reversed(list(model.named_modules()))}


def _module(model: nn.Module, name: str) -> nn.Module:
    return model.get_submodule(name) if name else model


def base_type_name(module) -> str:
    return next(t.__name__ for t in QUANTIZABLE_TYPES if isinstance(module, t))


def _describe(layer) -> str:
    if isinstance(layer, nn.Linear):
        return f"Linear(in_features={layer.in_features}, out_features={layer.out_features})"
    if isinstance(layer, QUANTIZABLE_TYPES):
        return (f"{base_type_name(layer)}(in_channels={layer.in_channels}, out_channels="
                f"{layer.out_channels}, kernel_size={layer.kernel_size})")
    return type(layer).__name__


def _describe_data(data) -> str:
    def one(t):
        return f"tensor of shape {tuple(t.shape)}, {t.dtype}" if isinstance(t, torch.Tensor) else type(t).__name__
    if isinstance(data, torch.Tensor):
        return one(data)
    if isinstance(data, tuple):
        return "args (" + "; ".join(one(v) for v in data) + ")"
    return "kwargs {" + "; ".join(f"{k}: {one(v)}" for k, v in data.items()) + "}"
