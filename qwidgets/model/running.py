"""Running the user's model: data checks, one forward pass with temporary hooks, its outputs.

Nothing here changes the user's model. Every pass runs under ``torch.no_grad()`` with the model
in ``eval()`` mode (so BatchNorm running statistics and dropout are untouched); the training
flag of every submodule is restored exactly and every hook added is removed in a ``finally``
block, also when the forward raises.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping

import torch
from torch import nn

from ..core.checks import finite_check
from .fastpath import attention_fastpath_off
from .layers import LayerInputError, is_quantizable
from .outputs import call_metric, flat_output, iter_tensors  # noqa: F401  (public here too)
from .sources import Data, call_model, check_max_samples  # noqa: F401


def run_with_hooks(model: nn.Module, data, hooks: dict, *, pre: bool, params: dict | None = None):
    """One forward pass under no_grad and eval(), with temporary hooks; model restored after.

    ``params`` (qualified parameter name -> tensor) are substituted for the model's own for
    this pass only (``torch.func.functional_call``, tied parameters kept tied); the model's
    parameters are never written.
    """
    flags = [(m, m.training) for m in model.modules()]
    handles = []
    try:
        for module, fn in hooks.items():
            if pre:
                handles.append(module.register_forward_pre_hook(fn, with_kwargs=True))
            else:  # run before the user's own forward hooks, so they see the quantized output
                handles.append(module.register_forward_hook(fn, with_kwargs=True, prepend=True))
        model.eval()
        with torch.no_grad(), attention_fastpath_off():  # the decomposed attention, hooks see it
            try:
                if params:
                    from torch.func import functional_call

                    args, kwargs = ((), data) if isinstance(data, dict) else (
                        (data if isinstance(data, tuple) else (data,)), {})
                    return functional_call(model, params, args, kwargs, tie_weights=True, strict=False)
                return call_model(model, data)
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





def check_model(model) -> None:
    if not isinstance(model, nn.Module):
        raise TypeError(f"model must be a torch.nn.Module, got {type(model).__name__}")



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
