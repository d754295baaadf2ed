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
a batch for which they would pass :data:`ERROR_BYTES` is measured in halves (samples kept apart,
the same estimate; a model that mixes samples is then measured exactly). The linearisation
is what makes it an estimate: at 2-3 bits, where the error is large enough to switch ReLUs and
saturations, it departs from the exact model scope most.
"""

from __future__ import annotations

import contextlib
import math

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn
from torch.overrides import TorchFunctionMode

from ..core.rounding import quantize_unchecked
from ..model import layers
from ..model.batching import Batches
from ..model.outputs import iter_tensors
from ..model.sources import batch_size, call_model

EXACT_VALUES = 64  # one-hot probes (exact) up to this many output values per sample
_TARGET = 96  # random probes: about this many (probe, sample) pairs over all samples
_MIN_PROBES, _MAX_PROBES = 4, 32
SEED = 17  # of every random probe (with the batch, sample, probe and output part)
ERROR_BYTES = 256 << 20  # layer errors kept for one pass at most; a larger batch is halved


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
                places: dict | None = None) -> dict[str, np.ndarray]:
    """Estimated model-output error power of each entry at each config (float64 sums over
    batches), for ``entries`` (row -> entry); ``places``: row -> :func:`probe_places` (default:
    the entry's own module, for :func:`probeable` entries).

    An entry whose output does not reach the model's output through gradients (a detached or
    integer path), or whose tensor is used outside its places' calls, is left out of the
    result; the caller measures it exactly.
    """
    places = places or {row: (e.module,) for row, e in entries.items()}
    by_module: dict[nn.Module, list] = {}
    for row in entries:
        for path in places[row]:
            by_module.setdefault(model.get_submodule(path), []).append(row)
    watched = {row: entries[row].parameter(model) for row in entries if places[row] != (entries[row].module,)
               or entries[row].kind != "layer"}  # tensors whose every use is counted
    noise = {row: np.zeros(len(configs[e.name])) for row, e in entries.items()}
    # each config's quantized weight is made in the layer's hook and dropped after it: one
    # entry's quantized copies at a time, not every entry's (a weight's few quantizations per
    # batch cost little next to the batch's forward and backward passes)
    lost: set = set()
    probes = probe_count(n_samples)
    flags = [(m, m.training) for m in model.modules()]
    try:
        model.eval()
        for index, batch in enumerate(source):
            pending = [(batch, 0)]
            while pending:  # halve a batch whose layer errors would not fit in ERROR_BYTES
                piece, row0 = pending.pop()
                n = batch_size(piece)
                try:
                    _one_batch(model, piece, (index, row0, piece is not batch), by_module, entries,
                               configs, output, probes, noise, lost, watched, cap=n > 1)
                except _TooLarge:
                    a, b = Batches(piece, (n + 1) // 2)
                    pending += [(b, row0 + (n + 1) // 2), (a, row0)]
    finally:
        for m, flag in flags:
            m.training = flag
    return {row: v for row, v in noise.items() if row not in lost}


class _TooLarge(Exception):
    """The layer errors of this batch would pass :data:`ERROR_BYTES`."""


def _one_batch(model, batch, where, by_module, entries, configs, output, probes, noise,
               lost, watched, *, cap: bool):
    """Add this batch's estimates to ``noise``. ``where``: (batch index, its first row within
    the source's batch, whether it is a part of that batch)."""
    seen: dict = {row: [] for row in entries}  # row -> [(module, input, output, leaf)] per call
    kept = [0]
    weights = {m: m.weight.detach() for m in by_module}  # read here: the hooks run under _Uses

    def hook(module, args, kwargs, out):
        x = (args[0] if args else next(iter(kwargs.values()))).detach()
        ref = out.detach()
        z = torch.zeros_like(ref, requires_grad=True)
        for row in by_module[module]:
            seen[row].append((module, x, ref, z))
            kept[0] += ref.numel() * len(configs[entries[row].name]) * 4
            if cap and kept[0] > ERROR_BYTES:
                raise _TooLarge
        return out + z

    handles = [m.register_forward_hook(hook, with_kwargs=True, prepend=True) for m in by_module]
    uses = _Uses(watched.values())
    try:
        with torch.enable_grad(), (uses if watched else contextlib.nullcontext()):
            out = call_model(model, batch)
    except RuntimeError:  # no gradients here (e.g. data made under inference_mode): measure exactly
        lost.update(entries)
        return
    finally:
        for h in handles:
            h.remove()
    for row, p in watched.items():  # one use per call of a place, none elsewhere
        if uses.count[id(p)] != len(seen[row]):
            lost.add(row)
    calls = {row: _errors(items, configs[entries[row].name], weights) for row, items in seen.items()}
    if output is not None:
        out = output(out)
    parts = [t for t in iter_tensors(out) if t.is_floating_point() and t.requires_grad]
    leaves = [z for row in calls for z, _ in calls[row]]
    if not parts or not leaves:
        lost.update(entries)
        return
    leaves = list({id(z): z for z in leaves}.values())  # one leaf per call of a module
    n = _batch_rows(parts, leaves)
    # a module output without the sample axis (a position embedding added to every sample)
    # gets one dot product per random probe over the whole batch: sum_i r_i . J_i e, unbiased
    # as the samples' probes are independent
    rowed = [z for z in leaves if n is not None and z.dim() >= 2 and z.shape[0] == n]
    per_sample = n is not None and _keeps_samples_apart(parts, rowed, n)
    index, row0, part = where
    if part and not per_sample:  # samples that interact cannot be measured in parts: exactly
        lost.update(entries)
        return
    values = sum(p[0].numel() if per_sample else p.numel() for p in parts)
    exact = values <= EXACT_VALUES
    if exact and per_sample:  # one-hot directions are the same in every sample: a whole-batch
        # dot product would add the samples' terms before squaring, so such rows are measured
        for row, items in calls.items():
            if any(z.dim() < 2 or z.shape[0] != n for z, _ in items):
                lost.add(row)
    directions = values if exact else (probes if per_sample else _MAX_PROBES)
    gen = torch.Generator(device=parts[0].device)
    # the gradients of several probes are kept and projected together: each layer's errors are
    # read once per group of probes (one matrix product), not once per probe
    step = max(1, min(directions, ERROR_BYTES // max(1, 4 * sum(z.numel() for z in leaves))))
    for k0 in range(0, directions, step):
        g_of: dict = {id(z): [] for z in leaves}
        for k in range(k0, min(directions, k0 + step)):
            rs = _one_hot(parts, k, per_sample) if exact else _random_probes(parts, gen, index, row0, k, per_sample)
            grads = torch.autograd.grad(parts, leaves, grad_outputs=rs, retain_graph=True, allow_unused=True)
            for z, g in zip(leaves, grads, strict=True):
                g_of[id(z)].append(g)
        for row, items in calls.items():
            if any(g is None for z, _ in items for g in g_of[id(z)]):
                lost.add(row)
                continue
            ds = [_dots(g_of[id(z)], errs, per_sample and z.dim() >= 2 and z.shape[0] == n)
                  for z, errs in items]
            if len({d.shape[0] for d in ds}) > 1:  # per-sample and whole-batch terms: whole batch
                ds = [d.sum(0, keepdim=True) for d in ds]
            dots = sum(ds)
            noise[row] += (dots * dots).sum(dim=(0, 1)).cpu().numpy() / (1.0 if exact else directions)


def _errors(items, configs, weights) -> list:
    """[(leaf, each config's output error)] of one entry's calls: each config's quantized weight
    made once for all its places (an embedding and the output layer tied to it) and dropped
    before the next. The scan checked the inputs (survey) and the weight once already."""
    if not items:
        return []
    w = weights[items[0][0]]
    module, x, ref, z = items[0]
    if len(items) == 1 and all(ig is None for _, ig in configs) and _stacks_outputs(module, ref):
        with torch.no_grad():
            return [(z, _layer_errors(module, x, w, configs))]
    errs: list = [[] for _ in items]
    with torch.no_grad():
        for wg, ig in configs:
            wq = w if wg is None else quantize_unchecked(w, wg)
            for j, (module, x, ref, _) in enumerate(items):
                errs[j].append(_place_output(module, x if ig is None else quantize_unchecked(x, ig), wq) - ref)
            del wq
    return [(z, _stacked(e)) for (_, _, _, z), e in zip(items, errs, strict=True)]


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


def _layer_errors(module, x: torch.Tensor, w: torch.Tensor, configs) -> torch.Tensor:
    """Each weight-only config's error of a layer's output, (rows, configs, values) float32.

    The layer is linear in its weight, so the error of ``w_q`` is the layer's output for
    ``w_q - w`` without bias, and every config's difference goes in one call (stacked along the
    output channels: the input read, and for a convolution unfolded, once), which is also more
    accurate than a difference of two outputs."""
    deltas = torch.cat([torch.zeros_like(w) if wg is None else quantize_unchecked(w, wg) - w
                        for wg, _ in configs])
    y = layers.layer_forward(module, x, deltas, use_bias=False)
    b = len(configs)
    if isinstance(module, nn.Linear):  # (rows, ..., configs * out) -> (rows, configs, ... x out)
        y = y.unflatten(-1, (b, -1)).movedim(-2, 1)
    return y.reshape(y.shape[0], b, -1).float()


def _stacks_outputs(module, ref: torch.Tensor) -> bool:
    """Whether configs' weights stack along the output channels: a Linear, or a convolution with
    one group and its channels on weight axis 0 (not an embedding), output rows along axis 0."""
    if ref.dim() < 2 or isinstance(module, nn.Embedding) or layers.weight_axis(module) != 0:
        return False
    return isinstance(module, nn.Linear) or (isinstance(module, (nn.Conv1d, nn.Conv2d, nn.Conv3d))
                                             and module.groups == 1)


def _stacked(errs) -> torch.Tensor:
    """Each config's output error in one (rows, configs, values) float32 tensor: rows along
    axis 0 of a layer output of two or more axes, else one row."""
    if errs[0].dim() < 2:
        return torch.stack([v.float().reshape(-1) for v in errs]).unsqueeze(0)
    return torch.stack([v.float().reshape(v.shape[0], -1) for v in errs], dim=1)


def _dots(gs: list, errs: torch.Tensor, per_sample: bool) -> torch.Tensor:
    """(rows, probes, configs) dot products of each probe's gradient with each config's error
    (one batched matrix product of float32 terms, the errors read as they lie), or
    (1, probes, configs) over the whole batch; float64."""
    rows = errs.shape[0]
    g = torch.stack([v.float().reshape(rows, -1) for v in gs], dim=1)  # (rows, probes, values)
    d = torch.bmm(g, errs.transpose(1, 2)).double()
    return d if per_sample else d.sum(0, keepdim=True)


def _batch_rows(parts, leaves) -> int | None:
    """The common length of axis 0 of every output part and of the layer outputs (of two or
    more axes) that have it, when that is the batch's; else None. A layer output whose axis 0
    differs (a position embedding's (positions, width)) is measured over the whole batch."""
    sizes = {t.shape[0] if t.dim() else None for t in parts}
    if len(sizes) != 1 or None in sizes:
        return None
    n = next(iter(sizes))
    if any(z.dim() < 2 for z in leaves) or not any(z.shape[0] == n for z in leaves):
        return None
    return n


def _place_output(module: nn.Module, x: torch.Tensor, w: torch.Tensor) -> torch.Tensor:
    """The module's output with weight ``w`` (:func:`probe_places`: an embedding or a layer)."""
    if isinstance(module, nn.Embedding):
        return F.embedding(x, w, module.padding_idx)
    return layers.layer_forward(module, x, w)


class _Uses(TorchFunctionMode):
    """Counts the torch calls that receive each watched tensor (as itself, not a copy)."""

    def __init__(self, tensors):
        super().__init__()
        self.count = {id(t): 0 for t in tensors}

    def __torch_function__(self, func, types, args=(), kwargs=None):
        kwargs = kwargs or {}
        for a in (*args, *kwargs.values()):
            if id(a) in self.count:
                self.count[id(a)] += 1
        return func(*args, **kwargs)


def _keeps_samples_apart(parts, leaves, n: int) -> bool:
    """A probe on output row i reaches only row i of every layer output (i = first and last)."""
    if n == 1:
        return True
    for i in {0, n - 1}:
        rs = []
        for p in parts:
            r = torch.zeros_like(p)
            r[i] = 1.0
            rs.append(r)
        grads = torch.autograd.grad(parts, leaves, grad_outputs=rs, retain_graph=True, allow_unused=True)
        for g in grads:
            if g is not None and (bool(g[:i].ne(0).any()) or bool(g[i + 1:].ne(0).any())):
                return False
    return True


def _one_hot(parts, k: int, per_sample: bool) -> list[torch.Tensor]:
    """Direction ``k`` of the output values (all parts in order): of one sample's values, on
    every sample at once, when ``per_sample``; else of the whole batch's."""
    rs = []
    for p in parts:
        r = torch.zeros_like(p)
        size = p[0].numel() if per_sample else p.numel()
        if 0 <= k < size:
            r.reshape(p.shape[0] if per_sample else 1, -1)[:, k] = 1.0
        k -= size
        rs.append(r)
    return rs
