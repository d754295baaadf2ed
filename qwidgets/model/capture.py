"""What each layer receives: the inputs captured in one forward pass."""

from __future__ import annotations

import warnings
from collections.abc import Callable, Iterable

import torch
from torch import nn

from .finite_state import check_layer_input
from .layers import describe_layer, is_quantizable
from .picking import split_data
from .running import (
    Data,
    check_max_samples,
    check_model,
    first_input,
    names_by_id,
    no_layers_message,
    require_called,
    resolve_layers,
    run_with_hooks,
    submodule,
)
from .sources import data_source


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
    names = names_by_id(model)
    targets = [m for _, m in model.named_modules() if is_quantizable(m)]
    if not targets:
        raise ValueError(no_layers_message(model))

    def record(module, args, kwargs):
        name = names[id(module)]
        if name not in order:
            order.append(name)

    for batch in data_source(model, data):
        run_with_hooks(model, batch, {m: record for m in targets}, pre=True)
        break  # the order of one batch
    return order


def capture_inputs(model: nn.Module, data: Data, layers: str | Iterable[str] | None = None, *,
                   max_samples: int | None = None, inputs: int | str | Callable | None = None) -> dict[str, torch.Tensor]:
    """The tensor each layer received when ``model`` ran once on ``data``.

    Parameters
    ----------
    model : the user's ``nn.Module`` (left bit-identical: parameters, buffers, training
        flags and hooks)
    data : a tensor (``model(data)``), a tuple / list (``model(*data)``), a dict
        (``model(**data)``), a numpy array, or a ``DataLoader`` / iterable of such batches
        (read batch by batch; the inputs of all batches are joined along axis 0)
    layers : None for every quantizable layer (``nn.Linear``, ``nn.Conv1d/2d/3d``), or names
        from ``model.named_modules()`` (any module type; a single name may be given as a str)
    max_samples : read only the first that many samples (axis 0 of every data tensor, across
        batches; before the forward, so a layer called k times holds k * max_samples rows)
    inputs : an index, a key or a function picking the model's inputs from each batch
        (``inputs=0`` for batches of ``(x, y)`` pairs)

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
    targets = resolve_layers(model, layers)
    data, _ = split_data(data, inputs)
    source = data_source(model, data, max_samples)
    names = names_by_id(model)
    calls: dict[str, list[torch.Tensor]] = {}

    def grab(module, args, kwargs):
        name = names[id(module)]
        x = first_input(module, name, args, kwargs)
        if x.is_floating_point():
            check_layer_input(x, f"the input of layer {name!r} ({describe_layer(module)})", model)
        calls.setdefault(name, []).append(x.detach().clone())

    for batch in source:
        run_with_hooks(model, batch, {m: grab for m in targets}, pre=True)
    require_called(targets, names, calls, explicit=layers is not None)
    return {name: _join(name, tensors, submodule(model, name)) for name, tensors in calls.items()}


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
