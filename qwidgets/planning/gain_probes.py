"""The gain estimate of a scan's model scope: every layer's output noise pulled through the rest
of the model by back-propagated probes, for all layers and bit widths at once.

Quantizing one layer adds an error ``e`` to its output; to first order the model's output moves
by ``J e``, where ``J`` is the Jacobian of the model output with respect to that layer output
(the additive-noise model of quantization: Widrow & Kollar 2008). The model-scope noise power
``||J e||^2`` of every layer and bit width is estimated from a few vector-Jacobian products
``g = J^T r`` (one backward pass each, giving ``g`` at every layer's output together):

* ``r`` runs over the one-hot directions of one sample's output (every sample at once) when
  a sample's output holds at most :data:`EXACT_VALUES` values. Then ``sum_r (g . e)^2`` equals
  ``||J e||^2`` exactly: the estimate is exact wherever the rest of the model is linear.
  (Where samples are not kept apart, the directions are those of the whole batch's output.)
* Otherwise ``r`` is standard normal and ``E[(r^T J e)^2] = ||J e||^2`` (Hutchinson's trace
  estimator applied to ``J^T J``): an unbiased estimate whose relative spread is about
  ``sqrt(2 / (probes x samples))`` when the samples contribute alike (:func:`probe_count` keeps
  that near 14%), more when a few samples carry most of the noise.

Samples are measured one by one (``g . e`` per sample, then squared) when the model keeps them
apart, which is checked: a probe on the first and on the last sample's output must reach only
that sample's row of every layer output. Otherwise one dot product per probe is taken over the
whole batch, with 32 random probes.

An embedding, or a weight tied between modules (a language model's embedding and output
layer), adds its error at each module that holds it (:func:`probe_places`); to first order the
output moves by the sum of what each place's error causes, so its dot products are summed over
the places before squaring.

So model scope costs one forward with gradients and ``probes`` backward passes per batch, for
all layers together, instead of one pass per layer and bit width. The probes are seeded per
sample, so a scan split across an executor's workers gives the serial numbers. The layer
errors of one pass are kept for the probes (one copy of each layer's output per bit width);
a batch for which they would pass :data:`ERROR_BYTES` is measured in pieces (samples kept
apart, the same estimate; a model that mixes samples is then measured exactly): the first
such batch runs one sample alone, which gives the bytes a sample keeps, and every later piece
is sized from them, so no forward is begun that the cap would stop. The linearisation is what
makes it an estimate: at 2-3 bits, where the error is large enough to switch ReLUs and
saturations, it departs from the exact model scope most.

When the model's output is a wide final ``nn.Linear`` (a language model's output layer), the
probes are drawn at its input instead, with the distribution a probe on the output has there,
and the layer's own error is taken from Gram matrices (:mod:`.gain_head`): no backward pass
through the output-wide product. An embedding's errors come from the rows it looked up.

The same errors give the layer scope of every probed layer (its output's power and each
config's error power, ``layer_powers=``): a scan with both scopes needs no second pass for them.
"""

from __future__ import annotations

import contextlib
import math

import numpy as np
import torch
from torch import nn

from ..core.rounding import quantize_unchecked
from ..model import layers
from ..model.batching import Batches, take_rows
from ..model.outputs import iter_tensors
from ..model.sources import batch_size, call_model
from .gain_dots import (
    Uses,
    batch_rows,
    dots,
    error_powers,
    keeps_samples_apart,
    layer_errors,
    looked_up_errors,
    one_hot,
    place_output,
    power,
    stacked,
    stacks_outputs,
)
from .gain_head import HeadShortcut, head_candidate

EXACT_VALUES = 64  # one-hot probes (exact) up to this many output values per sample
_TARGET = 96  # random probes: about this many (probe, sample) pairs over all samples
_MIN_PROBES, _MAX_PROBES = 4, 32
SEED = 17  # of every random probe (with the batch, sample, probe and output part)
ERROR_BYTES = 256 << 20  # layer errors kept for one pass at most; a larger batch is cut in pieces


def probe_count(n_samples: int) -> int:
    """Random probes per batch for ``n_samples`` samples in all: about 96 (probe, sample) pairs
    (relative spread ``sqrt(2 / 96)``, 14%, about 0.6 dB), at least 4 and at most 32.

    The cost is about ``2 x probes`` forward passes per batch, for every layer and bit width
    together: on the benchmark's 21-layer residual network with 8 images that is 12 probes."""
    return int(min(_MAX_PROBES, max(_MIN_PROBES, math.ceil(_TARGET / max(1, n_samples)))))


def probeable(entry) -> bool:
    """Entries whose error is the owner layer's output error, computed by ``layer_forward``."""
    return (entry.kind == "layer" and entry.runs_as_module and not entry.shared_with
            and bool(entry.module) and entry.param == f"{entry.module}.weight")


def probe_places(model: nn.Module, entry, configs) -> tuple[str, ...] | None:
    """The modules whose output errors carry the entry's error, or None (not probed).

    A :func:`probeable` layer: its own module. An embedding, or a weight tied between modules
    (a language model's embedding and output layer), quantized alone (no input grid): every
    module holding the tensor as its ``weight``, when each is a plain ``nn.Embedding`` (no
    ``max_norm``) or a quantizable layer with its base forward; the model's output error is
    then, to first order, the sum of what each place's output error causes. A use of the
    tensor outside these modules' calls (``F.linear(h, self.tok.weight)`` in a forward) is
    found on every batch and the entry is measured exactly instead (:func:`probe_noise`).
    """
    if probeable(entry):
        return (entry.module,)
    if entry.kind not in ("layer", "embedding") or not entry.module or any(ig is not None for _, ig in configs):
        return None
    p = entry.parameter(model)
    places = (entry.module, *entry.shared_with)
    for path in places:
        m = model.get_submodule(path) if path in dict(model.named_modules()) else None
        if m is None or m.__dict__.get("_parameters", {}).get("weight") is not p:
            return None
        plain_embedding = type(m).forward is nn.Embedding.forward and m.max_norm is None
        if not plain_embedding and type(m).forward not in layers.BASE_FORWARDS:
            return None
    return places


def probe_noise(model: nn.Module, source, entries: dict, configs: dict, output, n_samples: int,
                places: dict | None = None, layer_powers: dict | None = None) -> dict[str, np.ndarray]:
    """Estimated model-output error power of each entry at each config (float64 sums over
    batches), for ``entries`` (row -> entry); ``places``: row -> :func:`probe_places` (default:
    the entry's own module, for :func:`probeable` entries).

    An entry whose output does not reach the model's output through gradients (a detached or
    integer path), or whose tensor is used outside its places' calls, is left out of the
    result; the caller measures it exactly.

    ``layer_powers``: a dict to which ``row -> (scope, signal power, each config's error
    power)`` is written: ``"layer"``, the layer's own output (float64 sums over batches, as
    :func:`.passes.layer_scope_powers` gives them), for every :func:`probeable` entry whose
    layer runs its base forward (the layer scope from the errors the probes use);
    ``"weight"``, the weight's, for an entry at a final layer passed by :mod:`.gain_head` (the
    weight scope of an embedding tied to it, from the quantized copies made there).
    """
    places = places or {row: (e.module,) for row, e in entries.items()}
    by_module: dict[nn.Module, list] = {}
    for row in entries:
        for path in places[row]:
            by_module.setdefault(model.get_submodule(path), []).append(row)
    watched = {row: entries[row].parameter(model) for row in entries if places[row] != (entries[row].module,)
               or entries[row].kind != "layer"}  # tensors whose every use is counted
    noise = {row: np.zeros(len(configs[e.name])) for row, e in entries.items()}
    powers = {} if layer_powers is None else {
        row: [0.0, np.zeros(len(configs[e.name]))] for row, e in entries.items()
        if probeable(e) and type(model.get_submodule(e.module)).forward in layers.BASE_FORWARDS}
    # each config's quantized weight is made in the layer's hook and dropped after it: one
    # entry's quantized copies at a time, not every entry's (a weight's few quantizations per
    # batch cost little next to the batch's forward and backward passes)
    lost: set = set()
    probes = probe_count(n_samples)
    flags = [(m, m.training) for m in model.modules()]
    per_sample: list = [None]  # bytes of layer errors one sample keeps, once a sample was measured
    # a wide final Linear may be passed by probes drawn at its input (gain_head.py): candidates
    heads = {m: None for m in by_module if output is None
             and head_candidate(m, [configs[entries[r].name] for r in by_module[m]])}
    try:
        model.eval()
        for index, batch in enumerate(source):
            pending = [(batch, 0)]
            while pending:  # pieces of a batch whose layer errors would not fit in ERROR_BYTES
                piece, row0 = pending.pop()
                n = batch_size(piece)
                size = n if per_sample[0] is None else max(1, ERROR_BYTES // max(1, per_sample[0]))
                if size < n:  # cut ahead: no forward begun that the cap would stop
                    pending += [(p, row0 + i * size) for i, p in enumerate(Batches(piece, size))][::-1]
                    continue
                try:
                    kept = _one_batch(model, piece, (index, row0, piece is not batch), by_module, entries,
                                      configs, output, probes, noise, lost, watched, powers, heads,
                                      cap=n > 1)
                except _TooLarge:
                    # one sample first: what it keeps sizes the rest (halves once that is known,
                    # where a part without the sample axis made the estimate short)
                    cut = 1 if per_sample[0] is None else (n + 1) // 2
                    pending += [(take_rows(piece, cut, n), row0 + cut), (take_rows(piece, 0, cut), row0)]
                    continue
                if n == 1 and per_sample[0] is None:
                    per_sample[0] = kept
    finally:
        for m, flag in flags:
            m.training = flag
    if layer_powers is not None:
        layer_powers.update({row: ("layer", s, v) for row, (s, v) in powers.items()})
        for short in heads.values():
            if short is not None:
                layer_powers.update({row: ("weight", *v) for row, v in short.weight_powers.items()
                                     if row not in powers})
    return {row: v for row, v in noise.items() if row not in lost}


class _TooLarge(Exception):
    """The layer errors of this batch would pass :data:`ERROR_BYTES`."""


def _one_batch(model, batch, where, by_module, entries, configs, output, probes, noise,
               lost, watched, powers, heads, *, cap: bool) -> int:
    """Add this batch's estimates to ``noise`` and its layer powers to ``powers``; the bytes of
    layer errors it kept. ``where``: (batch index, its first row within the source's batch,
    whether it is a part of that batch). ``heads``: candidate final layers -> their
    :class:`.gain_head.HeadShortcut` (made here on first use)."""
    seen: dict = {row: [] for row in entries}  # row -> [(module, input, output, leaf)] per call
    kept = [0]
    weights = {m: m.weight.detach() for m in by_module}  # read here: the hooks run under Uses
    graph_in: dict = {}  # candidate head -> (its input in the graph, what the hook returned, calls)

    def hook(module, args, kwargs, out):
        x_in = args[0] if args else next(iter(kwargs.values()))
        x = x_in.detach()
        ref = out.detach()
        z = torch.zeros_like(ref, requires_grad=True)
        for row in by_module[module]:
            seen[row].append((module, x, ref, z))
            kept[0] += ref.numel() * len(configs[entries[row].name]) * 4
            if cap and kept[0] > ERROR_BYTES:
                raise _TooLarge
        result = out + z
        if module in heads:
            graph_in[module] = (x_in, result, graph_in.get(module, (None, None, 0))[2] + 1)
        return result

    handles = [m.register_forward_hook(hook, with_kwargs=True, prepend=True) for m in by_module]
    uses = Uses(watched.values())
    try:
        with torch.enable_grad(), (uses if watched else contextlib.nullcontext()):
            out = call_model(model, batch)
    except RuntimeError:  # no gradients here (e.g. data made under inference_mode): measure exactly
        lost.update(entries)
        powers.clear()  # nor the layer scope from this pass
        return kept[0]
    finally:
        for h in handles:
            h.remove()
    for row, p in watched.items():  # one use per call of a place, none elsewhere
        if uses.count[id(p)] != len(seen[row]):
            lost.add(row)
    if output is not None:
        out = output(out)
    parts = [t for t in iter_tensors(out) if t.is_floating_point() and t.requires_grad]
    # one leaf per call of a module
    leaves = list({id(it[3]): it[3] for items in seen.values() for it in items}.values())
    if not parts or not leaves:
        lost.update(entries)
        powers.clear()  # no errors computed: the layer scope is measured by its own pass
        return kept[0]
    n = batch_rows(parts, leaves)
    # a module output without the sample axis (a position embedding added to every sample)
    # gets one dot product per random probe over the whole batch: sum_i r_i . J_i e, unbiased
    # as the samples' probes are independent
    rowed = [z for z in leaves if n is not None and z.dim() >= 2 and z.shape[0] == n]
    per_sample = n is not None and keeps_samples_apart(parts, rowed, n)
    index, row0, part = where
    if part and not per_sample:  # samples that interact cannot be measured in parts: exactly
        lost.update(entries)
        powers.clear()
        return kept[0]
    values = sum(p[0].numel() if per_sample else p.numel() for p in parts)
    exact = values <= EXACT_VALUES
    head = _final_head(parts, graph_in, heads) if per_sample and not exact else None
    short = heads[head] if head is not None else None
    calls = {row: _calls(row, items, configs[entries[row].name], weights, head, short)
             for row, items in seen.items()}
    for row, acc in powers.items():  # the layer scope: the owner's output and its errors
        for (module, x, ref, _), (_, errs) in zip(seen[row], calls[row], strict=True):
            acc[0] += power(ref)
            own = short.own_power(row, configs[entries[row].name], x) if module is head else error_powers(errs)
            acc[1] += own.cpu().numpy()
    if exact and per_sample:  # one-hot directions are the same in every sample: a whole-batch
        # dot product would add the samples' terms before squaring, so such rows are measured
        for row, items in calls.items():
            if any(z.dim() < 2 or z.shape[0] != n for z, _ in items):
                lost.add(row)
    directions = values if exact else (probes if per_sample else _MAX_PROBES)
    gen = torch.Generator(device=parts[0].device)
    head_z = {id(it[3]) for items in seen.values() for it in items if it[0] is head}
    # an entry whose only place is the final layer: its output error is its own, ||dW x||^2
    alone = {row: bool(items) and all(it[0] is head for it in items) for row, items in seen.items()}
    back = [z for z in leaves if id(z) not in head_z]  # the leaves the backward passes reach
    h = graph_in[head][0] if head is not None else None
    # the gradients of several probes are kept and projected together: each layer's errors are
    # read once per group of probes (one matrix product), not once per probe
    stored = sum(z.numel() for z in back) + (h.numel() if h is not None else 0)
    step = max(1, min(directions, ERROR_BYTES // max(1, 4 * stored)))
    for k0 in range(0, directions, step):
        g_of: dict = {id(z): [] for z in leaves}
        for k in range(k0, min(directions, k0 + step)):
            if h is not None:  # drawn at the final layer's input (gain_head.py)
                g_h = short.probe(_random_probes([h], gen, index, row0, k, True)[0])
                grads = torch.autograd.grad([h], back, grad_outputs=[g_h], retain_graph=True, allow_unused=True) \
                    if back and h.requires_grad else [None] * len(back)
                for key in head_z:
                    g_of[key].append(g_h)
            else:
                rs = one_hot(parts, k, per_sample) if exact else _random_probes(parts, gen, index, row0, k, per_sample)
                grads = torch.autograd.grad(parts, back, grad_outputs=rs, retain_graph=True, allow_unused=True)
            for z, g in zip(back, grads, strict=True):
                g_of[id(z)].append(g)
        for row, items in calls.items():
            if alone.get(row):  # its error is the final layer's own alone: exact below
                continue
            if any(g is None for z, _ in items for g in g_of[id(z)]):
                lost.add(row)
                continue
            ds = [dots(g_of[id(z)], errs, per_sample and z.dim() >= 2 and z.shape[0] == n)
                  for z, errs in items]
            if len({d.shape[0] for d in ds}) > 1:  # per-sample and whole-batch terms: whole batch
                ds = [d.sum(0, keepdim=True) for d in ds]
            total = sum(ds)
            noise[row] += (total * total).sum(dim=(0, 1)).cpu().numpy() / (1.0 if exact else directions)
    for row, items in seen.items():  # the final layer's own error outside the probes' reach: exact
        if row not in lost:
            for module, x, _, _ in items:
                if module is head:
                    part_of = short.own_power if alone[row] else short.rest_power
                    noise[row] += part_of(row, configs[entries[row].name], x).cpu().numpy()
    return kept[0]


def _final_head(parts, graph_in, heads):
    """The candidate layer whose one call's output is the model's whole output, with a
    positive definite Gram matrix (its shortcut made on first use), else None."""
    if len(parts) != 1:
        return None
    for module, (_, result, n_calls) in graph_in.items():
        if result is parts[0] and n_calls == 1:
            if heads[module] is None:
                heads[module] = HeadShortcut(module)
            return module if heads[module].ok else None
    return None


def _calls(row, items, configs, weights, head, short) -> list:
    """[(leaf, errors)] of one entry's calls (:func:`_errors`), the final layer's own error as
    its probes see it where the shortcut applies."""
    if head is None or all(it[0] is not head for it in items):
        return _errors(items, configs, weights)
    rest = iter(_errors([it for it in items if it[0] is not head], configs, weights))
    return [(z, short.projected_errors(row, configs, x)) if module is head else next(rest)
            for module, x, _, z in items]


def _errors(items, configs, weights) -> list:
    """[(leaf, each config's output error)] of one entry's calls: each config's quantized weight
    made once for all its places (an embedding and the output layer tied to it) and dropped
    before the next. The scan checked the inputs (survey) and the weight once already."""
    if not items:
        return []
    w = weights[items[0][0]]
    module, x, ref, z = items[0]
    if len(items) == 1 and all(ig is None for _, ig in configs) and stacks_outputs(module, ref):
        with torch.no_grad():
            return [(z, layer_errors(module, x, w, configs))]
    if len(items) == 1 and isinstance(module, nn.Embedding):  # only the rows looked up
        with torch.no_grad():
            errs = looked_up_errors(module, x, w, ref, configs)
        if errs is not None:
            return [(z, stacked(errs))]
    errs: list = [[] for _ in items]
    with torch.no_grad():
        for wg, ig in configs:
            wq = w if wg is None else quantize_unchecked(w, wg)
            for j, (module, x, ref, _) in enumerate(items):
                errs[j].append(place_output(module, x if ig is None else quantize_unchecked(x, ig), wq) - ref)
            del wq
    return [(z, stacked(e)) for (_, _, _, z), e in zip(items, errs, strict=True)]


def _random_probes(parts, gen, index: int, row0: int, k: int, per_sample: bool) -> list:
    """Probe ``k``: standard normal values, drawn per sample from a seed of (batch, sample,
    probe) when samples are kept apart (so a batch measured in parts, or on another worker,
    gets the same probes), else per batch."""
    out = []
    for j, p in enumerate(parts):
        if not per_sample:
            gen.manual_seed(_seed(index, -1, k, j))
            out.append(torch.randn(p.shape, generator=gen, device=p.device, dtype=p.dtype))
            continue
        r = torch.empty_like(p)
        for i in range(p.shape[0]):
            gen.manual_seed(_seed(index, row0 + i, k, j))
            r[i] = torch.randn(p.shape[1:], generator=gen, device=p.device, dtype=p.dtype)
        out.append(r)
    return out


def _seed(*keys: int) -> int:
    h = SEED
    for v in keys:
        h = (h * 1_000_003 + v + 1) % (1 << 62)
    return h
