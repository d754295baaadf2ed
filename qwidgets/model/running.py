"""Running the user's model: data checks, one forward pass with temporary hooks, its outputs.

Nothing here changes the user's model. Every pass runs under ``torch.no_grad()`` with the model
in ``eval()`` mode (so BatchNorm running statistics and dropout are untouched); the training
flag of every submodule is restored exactly and every hook added is removed in a ``finally``
block, also when the forward raises.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from numbers import Integral, Real
from typing import Any

import torch
from torch import nn

from ..core.checks import finite_check
from .layers import LayerInputError, is_quantizable

# what a model is run on: model(tensor), model(*tuple), model(**dict)
Data = torch.Tensor | tuple | list | Mapping[str, Any]


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
                    f"the model's forward failed on the given data ({describe_data(data)}): "
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


def require_called(targets, names, seen, *, explicit: bool) -> None:
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


def check_model(model) -> None:
    if not isinstance(model, nn.Module):
        raise TypeError(f"model must be a torch.nn.Module, got {type(model).__name__}")


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
            finite_check(t, n, LayerInputError)
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


def resolve_layers(model: nn.Module, layers) -> list[nn.Module]:
    modules = dict(model.named_modules())
    if layers is None:
        found = [m for m in modules.values() if is_quantizable(m)]
        if not found:
            raise ValueError(no_layers_message(model))
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
        raise ValueError(f"layers {bad} not found in the model; available: {available_layers(model)}")
    return [modules[n] for n in layers]


def available_layers(model: nn.Module) -> str:
    names = [n for n, m in model.named_modules() if is_quantizable(m)]
    return f"quantizable layers {names}" if names else f"modules {[n for n, _ in model.named_modules()]}"


def no_layers_message(model: nn.Module) -> str:
    kinds = sorted({type(m).__name__ for m in model.modules()})
    return (f"model has no quantizable layers (nn.Linear, nn.Conv1d/2d/3d); it holds only "
            f"{', '.join(kinds)}")


def names_by_id(model: nn.Module) -> dict[int, str]:
    return {id(m): n for n, m in reversed(list(model.named_modules()))}


def submodule(model: nn.Module, name: str) -> nn.Module:
    return model.get_submodule(name) if name else model


def describe_data(data) -> str:
    def one(t):
        return f"tensor of shape {tuple(t.shape)}, {t.dtype}" if isinstance(t, torch.Tensor) else type(t).__name__
    if isinstance(data, torch.Tensor):
        return one(data)
    if isinstance(data, tuple):
        return "args (" + "; ".join(one(v) for v in data) + ")"
    return "kwargs {" + "; ".join(f"{k}: {one(v)}" for k, v in data.items()) + "}"
