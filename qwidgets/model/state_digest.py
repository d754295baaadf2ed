"""Digests of everything a plan's numbers depend on: every persistent floating-point entry of
the model's ``state_dict`` (parameters and buffers such as BatchNorm statistics; integer
counters and boolean masks are left out). A scan records them; applying, evaluating or
exporting a plan compares them with the model given, and names the entries that differ.

Each tensor is hashed once per call: names that share one tensor (tied weights) share its
digest.
"""

from __future__ import annotations

import torch
from torch import nn

from ..core.grid_cache import tensor_digest

__all__ = ["state_digests", "state_differences"]


def state_digests(model: nn.Module) -> dict[str, str]:
    """``{state_dict name: digest}`` of every persistent floating-point entry of ``model``.

    >>> import torch
    >>> from torch import nn
    >>> net = nn.Sequential(nn.Linear(2, 2), nn.BatchNorm1d(2))
    >>> sorted(state_digests(net))  # num_batches_tracked is an integer counter: not included
    ['0.bias', '0.weight', '1.bias', '1.running_mean', '1.running_var', '1.weight']
    """
    out: dict[str, str] = {}
    done: dict[tuple, str] = {}
    for name, t in model.state_dict(keep_vars=True).items():
        if not isinstance(t, torch.Tensor) or not t.is_floating_point():
            continue
        key = (t.device, t.dtype, t.untyped_storage().data_ptr(), t.storage_offset(),
               tuple(t.shape), t.stride())
        if key not in done:
            done[key] = tensor_digest(t)  # the grid cache's key too: a scan hashes a weight once
        out[name] = done[key]
    return out


def state_differences(recorded: dict[str, str], model: nn.Module, *, strict: bool = True) -> list[str]:
    """The entries of ``model``'s state that differ from ``recorded`` (``state_digests`` of the
    model a plan was made for), each with how: ``"'bn.running_var' (other values)"``,
    ``"'extra' (not in the planned model)"``, ``"'gone' (missing)"``. ``strict=False`` compares
    only the names both hold.

    >>> import torch
    >>> from torch import nn
    >>> a = nn.Linear(2, 2)
    >>> before = state_digests(a)
    >>> with torch.no_grad():
    ...     a.bias += 1
    >>> state_differences(before, a)
    ["'bias' (other values)"]
    """
    now = state_digests(model)
    out = [f"{n!r} (other values)" for n, d in now.items() if n in recorded and recorded[n] != d]
    if strict:
        out += [f"{n!r} (not in the planned model)" for n in now if n not in recorded]
        out += [f"{n!r} (missing)" for n in recorded if n not in now]
    return out
