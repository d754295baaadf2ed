"""The measuring passes of the scan: layer scope from captured inputs, model scope by hooks.

The scan checks every value these passes quantize once, before they run (each weight when
its grids are fitted, each layer's input in the survey's float pass over the same batches),
so they quantize without a second NaN / inf scan (``quantize_unchecked``).
"""

from __future__ import annotations

import math

import torch
import torch.nn.functional as F
from torch import nn

from ..core.rounding import quantize_unchecked as _quantize
from ..core.setting import LayerSetting
from ..model import forward, layers, running
from ..model import outputs as model_outputs


def layer_scope_powers(layer: nn.Module, x: torch.Tensor, configs) -> tuple[float, list[float]]:
    """(output power, error power of each config) of ``layer`` on the input ``x`` (float64
    sums, so the powers of several batches add up).

    Configs that quantize only the weights share one call of the layer: their weights (and
    the float weight, for the reference) are stacked along the output channels, so the input
    is read, and for convolutions unfolded, once for all of them.
    """
    with torch.no_grad():
        w = layer.weight.detach()
        if all(ig is None for _, ig in configs) and _stacks_weights(layer):
            weights = [w] + [w if wg is None else _quantize(w, wg) for wg, _ in configs]
            signal, errors = _stacked_weight_errors(layer, x, weights)
            return signal, errors[1:]
        ref = layers.layer_forward(layer, x, w)
        signal = _power(ref)
        out = []
        for wg, ig in configs:
            y = layers.layer_forward(layer, x if ig is None else _quantize(x, ig),
                                  w if wg is None else _quantize(w, wg))
            out.append(_power(y - ref))
        return signal, out


def attention_scope_powers(mha: nn.Module, entry, xs, configs) -> tuple[float, list[float]]:
    """(output power, error power of each config) of an attention module's input projection(s)
    on its query / key / value ``xs``: ``x @ W_i.T + b_i`` for each, summed."""
    w = getattr(mha, entry.param.rpartition(".")[2]).detach()
    bias = None if mha.in_proj_bias is None else mha.in_proj_bias.detach()
    if len(entry.input_args) == 3:  # packed: rows [query; key; value]
        parts = list(zip(xs if len(xs) == 3 else xs * 3, range(3), strict=True))
    else:
        parts = [(xs[0], ("query", "key", "value").index(entry.input_args[0]))]
    e = mha.embed_dim

    def project(weight, grid_in):
        outs = []
        for x, k in parts:
            rows = weight if len(entry.input_args) == 1 else weight[k * e : (k + 1) * e]
            b = None if bias is None else bias[k * e : (k + 1) * e]
            outs.append(F.linear(x if grid_in is None else _quantize(x, grid_in), rows, b))
        return outs

    with torch.no_grad():
        ref = project(w, None)
        signal = sum(_power(r) for r in ref)
        noises = []
        for wg, ig in configs:
            out = project(w if wg is None else _quantize(w, wg), ig)
            noises.append(sum(_power(o - r) for o, r in zip(out, ref, strict=True)))
    return signal, noises


def weight_scope_powers(w: torch.Tensor, configs) -> tuple[float, list[float]]:
    """(weight power, error power of each weight grid): the layer scope of a weight-only entry."""
    with torch.no_grad():
        return _power(w), [0.0 if wg is None else _power(_quantize(w, wg) - w) for wg, _ in configs]


def _power(t: torch.Tensor) -> float:
    """Sum of squares, accumulated in float64."""
    return float(torch.linalg.vector_norm(t, dtype=torch.float64)) ** 2


_CHANNELS_LAST = {4: torch.channels_last, 5: torch.channels_last_3d}


_STACK_ELEMENTS = 1 << 24  # at most this many output values (64 MiB in float32) per stacked call


def _stacks_weights(layer: nn.Module) -> bool:
    # transposed convolutions keep output channels on weight axis 1: not stacked along axis 0
    if layers.weight_axis(layer) != 0:
        return False
    return isinstance(layer, nn.Linear) or getattr(layer, "groups", 1) == 1


def _stacked_weight_errors(layer: nn.Module, x: torch.Tensor, weights: list) -> tuple[float, list]:
    """Output power for ``weights[0]`` and the error power of each weight's output against it.

    The layer is linear in its weight, so the error of weight ``w_q`` is the layer's output for
    ``w_q - w`` with no bias: one call computes it directly (more accurately than a difference
    of two outputs). Several weights go in one call (output channels stacked), and the powers of
    a call come from one reduction over everything but the stacking axis.
    """
    linear = isinstance(layer, nn.Linear)
    per_out = max(1, _out_numel(layer, x))
    group = max(1, _STACK_ELEMENTS // per_out)
    w = weights[0]
    stacked = [w] + [q - w for q in weights[1:]]
    # Many output channels in one call run several times faster in channels-last layout on
    # the CPU (measured 3x for 112 x 16 x 3 x 3 on 64 x 16 x 32 x 32); the results are the same.
    layout = _CHANNELS_LAST.get(x.dim())
    if layout is not None:
        x = x.contiguous(memory_format=layout)
    signal, errors = 0.0, [0.0]
    for i in range(0, len(stacked), group):
        ws = torch.cat(stacked[i : i + group], dim=0)
        if layout is not None:
            ws = ws.contiguous(memory_format=layout)
        y = layers.layer_forward(layer, x, ws, use_bias=False)
        ws = stacked[i : i + group]
        axis = y.dim() - 1 if linear else 1
        y = y.unflatten(axis, (len(ws), -1))  # (..., config, out) or (N, config, C, ...)
        first = 0
        if i == 0:
            ref = y.select(axis, 0)
            if layer.bias is not None:
                b = layer.bias.detach()
                ref = ref + (b if linear else b.reshape((-1,) + (1,) * (ref.dim() - 2)))
            signal = _power(ref)
            first = 1
        part = y.narrow(axis, first, len(ws) - first)
        # float32 sums over each sample's values (short, accurate), then float64 across them:
        # a float32 sum over the whole batch drifts by ~1e-5, and a float64 copy costs more
        inner = tuple(d for d in range(1, y.dim()) if d != axis) if axis != 0 else ()
        partial = part.square().sum(dim=inner) if inner else part.square()
        outer = tuple(d for d in range(partial.dim()) if d != (1 if axis != 0 else 0))
        errors.extend(partial.double().sum(dim=outer).tolist())
    return signal, errors


def _out_numel(layer: nn.Module, x: torch.Tensor) -> int:
    if isinstance(layer, nn.Linear):
        return x.numel() // layer.in_features * layer.out_features
    return layers.layer_macs(layer, tuple(x.shape)) // max(1, layer.weight[0].numel())


class _NotStackable(Exception):
    """The stacked model-scope pass does not apply to this layer; measure one config at a time."""


def model_scope_noise(model, batch, entry, configs, ref_parts, *, stackable: bool, output=None
                      ) -> tuple[list[float], str]:
    """Model-output error power of each config on one batch, and how it was measured.

    ``stackable`` entries (a layer run as a module, its weight used nowhere else) try one
    stacked pass for all configs; otherwise, or when that does not apply, one pass per config
    with the entry's quantized weight substituted for its parameter (everywhere it is used).
    """
    if stackable:
        layer = model.get_submodule(entry.module) if entry.module else model
        try:
            return _model_scope_stacked(model, batch, entry.name, layer, configs, ref_parts,
                                        output), "stacked"
        except _NotStackable:
            pass
    out = []
    w = None if entry.kind == "activation" else entry.parameter(model).detach()
    for wg, ig in configs:
        params = {} if wg is None else {entry.param: _quantize(w, wg)}
        q, _ = forward.quantized_call(model, batch, {entry: LayerSetting(weight=wg, input=ig)},
                                      params=params, inputs_checked=True)
        parts = model_outputs.float_parts(q, "quantized", output)
        out.append(error_power(ref_parts, parts))
    return out, "per bit width"


def error_power(ref_parts, parts) -> float:
    if len(parts) != len(ref_parts):
        raise ValueError(f"the quantized output holds {len(parts)} floating-point tensors, the float "
                         f"output {len(ref_parts)}")
    total = 0.0
    for r, a in zip(ref_parts, parts, strict=True):
        if r.shape != a.shape:
            raise ValueError(f"output shapes differ: float {tuple(r.shape)}, quantized {tuple(a.shape)}")
        total += _square_sum((a - r).reshape(-1))  # the difference in the outputs' precision
    return total


def _square_sum(d: torch.Tensor) -> float:
    """sum(d**2) in float64, a block of float32 values at a time (no float64 copy of the whole)."""
    total = 0.0
    for part in d.split(1 << 20):
        total += float(torch.sum(part.double().square_()))
    return total


def _model_scope_stacked(model, data, name, layer, configs, ref_parts, output=None) -> list[float]:
    """Model-output error power of every config from one forward with the layer's output stacked.

    The stack along the batch axis holds every config and a float copy between them (two
    configs or more: [config 1, ..., float, ..., config B]; one config: [float, config, float]).
    The float copy is the check that the rest of the model keeps samples apart: an operation
    mixing them, in either direction along the batch, changes it. One copy rather than one at
    each end keeps the extra work of the check to 1 / B.
    """
    b = len(configs)
    float_at = [b // 2] if b >= 2 else [0, 2]
    order: list = list(range(b))  # config indices, with None where a float copy goes
    for k in float_at:
        order.insert(k, None)
    n_copies = len(order)
    w = layer.weight.detach()
    with torch.no_grad():
        quantized = [w if wg is None else _quantize(w, wg) for wg, _ in configs]
    weights = [w if i is None else quantized[i] for i in order]
    inputs = [None if i is None else configs[i][1] for i in order]
    calls = [0]
    if not ref_parts or any(t.dim() == 0 for t in ref_parts):
        raise _NotStackable

    def outputs(parts):
        return [layers.layer_forward(layer, p if ig is None else _quantize(p, ig), wq)
                for p, ig, wq in zip(parts, inputs, weights, strict=True)]

    def hook(module, args, kwargs, output):
        x = running.first_input(module, name, args, kwargs)
        calls[0] += 1
        if calls[0] == 1:
            if type(module).forward not in layers.BASE_FORWARDS:
                try:
                    layers.check_same_math(module, name, x, output)
                except layers.LayerInputError:
                    raise _NotStackable from None
            if not isinstance(output, torch.Tensor) or output.dim() == 0:
                raise _NotStackable
            return torch.cat(outputs([x] * n_copies), dim=0)
        # a layer called again within the same forward sees the stacked batch: one part each
        if x.dim() == 0 or x.shape[0] % n_copies:
            raise _NotStackable
        return torch.cat(outputs(x.chunk(n_copies, dim=0)), dim=0)

    try:
        out = running.run_with_hooks(model, data, {layer: hook}, pre=False)
    except _NotStackable:
        raise
    except (RuntimeError, ValueError) as e:
        if isinstance(e, layers.LayerInputError):
            raise
        raise _NotStackable from e
    try:
        parts = model_outputs.float_parts(out, "quantized", output)
    except ValueError as e:
        raise _NotStackable from e
    if len(parts) != len(ref_parts):
        raise _NotStackable
    per_copy = [[] for _ in range(n_copies)]
    for t, r in zip(parts, ref_parts, strict=True):
        if t.dim() == 0 or tuple(t.shape) != (n_copies * r.shape[0],) + tuple(r.shape[1:]):
            raise _NotStackable
        for k, chunk in enumerate(t.reshape((n_copies,) + tuple(r.shape))):
            per_copy[k].append(chunk.reshape(-1).double())
    ref_flat = torch.cat([r.reshape(-1).double() for r in ref_parts])
    errs = [float((torch.cat(p) - ref_flat).pow(2).sum()) for p in per_copy]
    checks = [e for e, i in zip(errs, order, strict=True) if i is None]
    noises = [e for e, i in zip(errs, order, strict=True) if i is not None]  # in config order
    # the float copies must reproduce the float model far below the smallest quantization noise
    positive = [e for e in noises if e > 0]
    for c in checks:
        if c > 0 and (not positive or c > 1e-3 * min(positive)):
            raise _NotStackable
    return noises


def db(signal: float, noise: float) -> float:
    if noise == 0.0:
        return math.inf
    if signal == 0.0:
        return -math.inf
    return 10.0 * math.log10(signal / noise)


# ---------------------------------------------------------------------------- from a recorded pass
def suffix_noise(replay, layer: nn.Module, name: str, configs, ref_parts, output=None,
                 gram: dict | None = None) -> list[float]:
    """Model-output error power of each config, rerunning only what follows layer ``name``.

    ``replay`` (:class:`~qwidgets.model.replay.GraphReplay`) recorded this batch; skip
    connections from before the layer read the record. Call inside ``replay.evaluating``.
    When the model's whole output is a final ``nn.Linear`` (weight ``W``) and ``output`` is the
    default, the rerun stops at that layer's input: a change ``d`` there moves the output by
    ``d W^T``, whose power is ``sum d (W^T W) d^T`` (the Gram matrix once per model, kept in
    ``gram``), instead of an output-wide product and error sum per config.
    """
    w = layer.weight.detach()
    head = replay.final_linear() if output is None and len(ref_parts) == 1 else None
    if head is not None and head[0] != name:
        g = head_gram(replay, head[0], gram)
        ref_in = replay.values[head[1]]
    out = []
    for wg, ig in configs:
        wq = w if wg is None else _quantize(w, wg)

        def replace(x, wq=wq, ig=ig):
            return layers.layer_forward(layer, x if ig is None else _quantize(x, ig), wq)

        if head is not None and head[0] != name:
            d = (replay.rerun(name, replace, until=head[1]) - ref_in).reshape(-1, g.shape[0]).double()
            out.append(float(((d @ g) * d).sum()))
            continue
        parts = model_outputs.float_parts(replay.rerun(name, replace), "quantized", output)
        out.append(error_power(ref_parts, parts))
    return out


def head_gram(replay, head: str, cache: dict | None):
    """W^T W of the final layer (float32 product, float64 after), made once per scan."""
    key = (id(replay), head)
    if cache is not None and key in cache:
        return cache[key]
    w = replay.model.get_submodule(head).weight.detach()
    g = (w.t() @ w).double()
    if cache is not None:
        cache[key] = g
    return g
