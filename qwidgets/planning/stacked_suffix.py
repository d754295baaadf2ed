"""Every bit width of one layer through one replayed suffix: the versions stacked along the batch.

The exact model scope reruns what follows a layer once per bit width (:func:`.passes.suffix_noise`).
Here the layer's output at every width, and a float copy, are stacked along axis 0 and the rest
of the model runs once on the bigger batch (:meth:`~qwidgets.model.replay.GraphReplay.rerun` with
``copies``): one pass of larger tensor operations instead of one per width. That is valid when
the rest of the model keeps samples apart along axis 0; the float copy is the check (it must
give the float model's output, to far below the smallest quantization noise, as in
:func:`.passes.model_scope_noise`'s stacked pass). The stacked pass computes the same sums in
bigger batches: float32 kernels may block them differently, so the noise powers agree with the
per-width replay to float32 rounding (about 1e-6 relative), not bit for bit.
"""

from __future__ import annotations

import torch

from ..core.rounding import quantize_unchecked as _quantize
from ..model import layers
from ..model import outputs as model_outputs
from . import passes

STACK_BYTES = 256 << 20  # the largest value of the stacked rerun at most (an attention's scores, ...)
CHECK_RATIO = 1e-3  # the float copy's error power at most this much of the smallest noise power

# what a stacked pass over a graph that does not batch along axis 0 raises (shape mismatches)
_STACK_ERRORS = (RuntimeError, ValueError, IndexError)


def stacked_suffix_noise(replay, layer, name: str, configs, ref_parts, output=None,
                         gram: dict | None = None) -> list[float] | None:
    """Model-output error power of each config from one stacked rerun after layer ``name``, or
    None when it does not apply (one config, too large, the rest of the model mixes samples, or
    its output does not carry the batch on axis 0): then measure one config at a time."""
    b = len(configs)
    x = _layer_input(replay, name)
    if b < 2 or x is None:
        return None
    w = layer.weight.detach()
    first = replay.values[replay.layer_nodes[name][0]]  # the recorded float output
    if not isinstance(first, torch.Tensor) or first.dim() == 0:
        return None
    if replay.largest_after(name) * (b + 1) > STACK_BYTES:  # every value after it, b + 1 times
        return None
    order: list = list(range(b))
    order.insert(b // 2, None)  # the float copy, between the configs
    n = len(order)

    def replace(_recorded_input):
        outs = []
        for i in order:
            if i is None:
                outs.append(first)
                continue
            wg, ig = configs[i]
            outs.append(layers.layer_forward(layer, x if ig is None else _quantize(x, ig),
                                             w if wg is None else _quantize(w, wg)))
        return torch.cat(outs, dim=0)

    head = replay.final_linear() if output is None and len(ref_parts) == 1 else None
    try:
        if head is not None and head[0] != name:
            g = passes.head_gram(replay, head[0], gram)
            ref_in = replay.values[head[1]]
            stacked = replay.rerun(name, replace, until=head[1], copies=n)
            if stacked.shape != (n * ref_in.shape[0],) + tuple(ref_in.shape[1:]):
                return None
            errs = []
            for chunk in stacked.chunk(n, dim=0):
                d = (chunk - ref_in).reshape(-1, g.shape[0]).double()
                errs.append(float(((d @ g) * d).sum()))
        else:
            parts = model_outputs.float_parts(replay.rerun(name, replace, copies=n), "quantized", output)
            if len(parts) != len(ref_parts) or any(
                    p.dim() == 0 or tuple(p.shape) != (n * r.shape[0],) + tuple(r.shape[1:])
                    for p, r in zip(parts, ref_parts, strict=True)):
                return None
            errs = [passes.error_power(ref_parts, [p.chunk(n, dim=0)[k] for p in parts]) for k in range(n)]
    except _STACK_ERRORS:
        return None
    noises = [e for e, i in zip(errs, order, strict=True) if i is not None]
    check = errs[order.index(None)]
    positive = [e for e in noises if e > 0]
    if check > 0 and (not positive or check > CHECK_RATIO * min(positive)):
        return None  # the rest of the model mixes the stacked samples
    return noises


def _layer_input(replay, name: str):
    """The recorded input of the layer's only call, when it carries the batch; else None."""
    nodes = replay.layer_nodes.get(name, [])
    if len(nodes) != 1 or len(nodes[0].args) != 1 or nodes[0].kwargs:
        return None
    arg = nodes[0].args[0]
    x = replay.values.get(arg)
    return x if isinstance(x, torch.Tensor) and replay.carries_batch(arg) else None
