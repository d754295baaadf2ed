"""Folding BatchNorm into the convolution or linear layer it directly follows.

A deployed network carries the folded layer: in eval mode ``BN(conv(x))`` is a convolution
with the weight scaled per output channel and the bias shifted,

    w' = w * gamma / sqrt(var + eps),   b' = (b - mean) * gamma / sqrt(var + eps) + beta

(common practice). A Linear / Conv weight has its output channels on axis 0; a transposed
convolution's weight is (in_channels, out_channels / groups, *kernel): output channel
``g * out_channels / groups + j`` is column ``j`` of group ``g``'s rows, so the factor is
applied along axis 1, group by group. The folded weight's per-channel ranges differ from the
unfolded one's, the folded weight's per-channel ranges differ from the unfolded one's,
so a plan should be scanned and fitted on the folded model. Pairs are found in the graph
``torch.fx`` traces where the model traces, else from the module order inside each
``nn.Sequential``; BatchNorm layers that neither finds are left as they are and named in a
warning.
"""

from __future__ import annotations

import copy
import warnings

import torch
from torch import nn

__all__ = ["fold_batchnorm", "foldable_batchnorm"]

_FOLDABLE = (nn.Linear, nn.Conv1d, nn.Conv2d, nn.Conv3d,
             nn.ConvTranspose1d, nn.ConvTranspose2d, nn.ConvTranspose3d)
_BN = (nn.BatchNorm1d, nn.BatchNorm2d, nn.BatchNorm3d)


def foldable_batchnorm(model: nn.Module) -> dict[str, str]:
    """The BatchNorm layers :func:`fold_batchnorm` folds: ``{bn name: layer name}``.

    Exactly those it would fold (after a Linear, Conv or ConvTranspose layer, with running
    statistics), found as it finds them (traced graph, else ``nn.Sequential`` order); every
    other BatchNorm is one its warning names with the reason. Empty when there is nothing to
    fold (for example on the output of :func:`fold_batchnorm`).

    >>> from torch import nn
    >>> net = nn.Sequential(nn.Conv2d(3, 4, 3), nn.BatchNorm2d(4), nn.ReLU())
    >>> foldable_batchnorm(net), foldable_batchnorm(fold_batchnorm(net))
    ({'1': '0'}, {})
    """
    if not isinstance(model, nn.Module):
        raise TypeError(f"model must be a torch.nn.Module, got {type(model).__name__}")
    pairs, _, _ = _find_pairs(model)
    modules = dict(model.named_modules())
    return {bn: layer for layer, bn in pairs if _unfoldable(modules[bn]) is None}


def fold_batchnorm(model: nn.Module) -> nn.Module:
    """An eval-mode copy of ``model`` with every BatchNorm that directly follows a Linear,
    Conv1d/2d/3d or ConvTranspose1d/2d/3d layer folded into that layer (and replaced by ``nn.Identity``).

    The copy's outputs equal the original's in eval mode within float rounding; ``model`` itself
    is untouched. A BatchNorm that cannot be folded (after another kind of layer, after a layer
    whose output is also used elsewhere, without running statistics, or not found because the
    model does not trace and it is not in an ``nn.Sequential`` after the layer) stays, and a
    warning names it and why.

    >>> import torch
    >>> from torch import nn
    >>> net = nn.Sequential(nn.Linear(4, 3), nn.BatchNorm1d(3)).eval()
    >>> folded = fold_batchnorm(net)
    >>> type(folded[1]).__name__, torch.allclose(folded(torch.ones(2, 4)), net(torch.ones(2, 4)))
    ('Identity', True)
    """
    if not isinstance(model, nn.Module):
        raise TypeError(f"model must be a torch.nn.Module, got {type(model).__name__}")
    new = copy.deepcopy(model).eval()
    pairs, left, how = _find_pairs(new)
    modules = dict(new.named_modules())
    done = set()
    for layer_name, bn_name in pairs:
        reason = _unfoldable(modules[bn_name])
        if reason:
            left[bn_name] = reason
            continue
        _fold_into(modules[layer_name], modules[bn_name])
        _replace(new, bn_name, nn.Identity())
        done.add(bn_name)
    if left:
        listed = "; ".join(f"{n!r} ({why})" for n, why in left.items())
        warnings.warn(f"fold_batchnorm left {len(left)} BatchNorm layer(s) unfolded ({how}): {listed}",
                      stacklevel=2)
    new.qwidgets_folded = tuple(sorted(done))
    return new


# ---------------------------------------------------------------------------- finding pairs
def _find_pairs(model: nn.Module):
    """([(layer name, bn name)], {bn name: why it is not paired}, how the pairs were found)."""
    bns = [n for n, m in model.named_modules() if isinstance(m, _BN)]
    if not bns:
        return [], {}, "no BatchNorm"
    try:
        graph = torch.fx.symbolic_trace(model).graph
    except Exception:  # noqa: BLE001 - any tracing failure means: fall back to module order
        pairs = _sequential_pairs(model)
        paired = {bn for _, bn in pairs}
        left = {n: "the model does not trace with torch.fx and it does not follow a Linear / Conv "
                   "/ ConvTranspose layer inside an nn.Sequential" for n in bns if n not in paired}
        return pairs, left, "found from nn.Sequential order"
    return (*_traced_pairs(model, graph, bns), "found from the torch.fx graph")


def _traced_pairs(model: nn.Module, graph, bns):
    modules = dict(model.named_modules())
    calls: dict[str, int] = {}
    for node in graph.nodes:
        if node.op == "call_module":
            calls[node.target] = calls.get(node.target, 0) + 1
    pairs, left = [], {}
    for node in graph.nodes:
        if node.op != "call_module" or not isinstance(modules.get(node.target), _BN):
            continue
        bn = node.target
        src = node.args[0] if node.args else None
        layer = modules.get(src.target) if getattr(src, "op", None) == "call_module" else None
        if not isinstance(layer, _FOLDABLE):
            left[bn] = _what_precedes(src, layer)
        elif calls.get(bn, 0) != 1 or calls.get(src.target, 0) != 1:
            left[bn] = "the layer or the BatchNorm is called more than once"
        elif len(src.users) != 1:
            left[bn] = f"the output of {src.target!r} is also used elsewhere"
        elif not _channels_match(layer, modules[bn]):
            left[bn] = f"its {modules[bn].num_features} features do not match {src.target!r}'s outputs"
        else:
            pairs.append((src.target, bn))
    for bn in bns:  # BatchNorm modules the forward never calls
        if bn not in left and all(bn != b for _, b in pairs):
            left[bn] = "not called by the traced forward"
    return pairs, left


def _what_precedes(src, layer) -> str:
    """Why a BatchNorm after ``src`` (a graph node; ``layer`` its module, if one) cannot be folded."""
    if layer is not None:
        return (f"it follows {src.target!r}, a {type(layer).__name__}, which has no per-channel "
                "weight to fold it into")
    if getattr(src, "op", None) == "placeholder":
        return "it is applied to the model's input, not to a layer's output"
    what = getattr(src, "target", src)
    what = getattr(what, "__name__", what)
    return f"it follows the operation {what!r}, not a Linear / Conv / ConvTranspose layer"


def _sequential_pairs(model: nn.Module):
    pairs = []
    for prefix, m in model.named_modules():
        if not isinstance(m, nn.Sequential):
            continue
        items = list(m.named_children())
        for (a_name, a), (b_name, b) in zip(items, items[1:], strict=False):
            if isinstance(a, _FOLDABLE) and isinstance(b, _BN) and _channels_match(a, b):
                join = (prefix + ".") if prefix else ""
                pairs.append((join + a_name, join + b_name))
    return pairs


def _channels_match(layer: nn.Module, bn: nn.Module) -> bool:
    out = layer.out_features if isinstance(layer, nn.Linear) else layer.out_channels
    return bn.num_features == out


# ---------------------------------------------------------------------------- folding
def _unfoldable(bn) -> str | None:
    if bn.running_mean is None or bn.running_var is None:
        return "it has no running statistics (track_running_stats=False), so eval uses batch statistics"
    return None


def _fold_into(layer: nn.Module, bn: nn.Module) -> None:
    """w' = w * gamma / sqrt(var + eps) per output channel, b' = (b - mean) * that + beta."""
    with torch.no_grad():
        w = layer.weight
        var, mean = bn.running_var.double(), bn.running_mean.double()
        gamma = bn.weight.double() if bn.weight is not None else torch.ones_like(var)
        beta = bn.bias.double() if bn.bias is not None else torch.zeros_like(var)
        factor = gamma / torch.sqrt(var + bn.eps)
        if isinstance(layer, nn.modules.conv._ConvTransposeNd):
            # (in, out / groups, *k): group g's rows feed output channels g * out / groups + j
            g = layer.groups
            wg = w.double().reshape(g, w.shape[0] // g, *w.shape[1:])
            f = factor.reshape(g, 1, w.shape[1], *(1,) * (w.dim() - 2))
            new_w = (wg * f).reshape(w.shape).to(w.dtype)
        else:
            new_w = (w.double() * factor.reshape((-1,) + (1,) * (w.dim() - 1))).to(w.dtype)
        b = layer.bias.double() if layer.bias is not None else torch.zeros_like(var)
        new_b = ((b - mean) * factor + beta).to(w.dtype)
        layer.weight.copy_(new_w)
        if layer.bias is None:
            layer.bias = nn.Parameter(new_b.to(w.device), requires_grad=w.requires_grad)
        else:
            layer.bias.copy_(new_b)


def _replace(model: nn.Module, name: str, new: nn.Module) -> None:
    parent_name, _, attr = name.rpartition(".")
    parent = model.get_submodule(parent_name) if parent_name else model
    setattr(parent, attr, new)
