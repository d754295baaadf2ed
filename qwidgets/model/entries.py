"""Entries: the quantizable weights of a model, one per distinct parameter tensor.

An entry is one weight matrix or kernel that gets its own grid, bit width and row in the
sensitivity table and the plan:

==========================  =====================================  =====  ==========
module                      entry name                             axis   inputs
==========================  =====================================  =====  ==========
Linear, Conv1d/2d/3d        ``<path>``                             0      yes (*)
ConvTranspose1d/2d/3d       ``<path>``                             1      yes (*)
MultiheadAttention          ``<path>.in_proj`` (query, key, value)  0      yes (**)
                            ``<path>.out_proj``                    0      the context
                            (``.q_proj/.k_proj/.v_proj`` when the
                            projections are separate: each its own
                            input)
                            ``<path>.query/.key/.value/.probs``    -      activations
LSTM, GRU, RNN              ``<path>.<parameter name>``            0      no
                            (e.g. ``rnn.weight_hh_l0_reverse``)
Embedding, EmbeddingBag     ``<path>`` (one grid per row)          0      no
==========================  =====================================  =====  ==========

(*) when the module runs as a module with a tensor input on the data; a Linear whose weight
its parent uses directly is a weight-only entry. (**) the attention module's query / key /
value arguments, when it runs as a module. The context entering ``out_proj`` and the
attention's activations (projected query / key / value, probabilities: kind
``"activation"``, no weight) are reached by taps (:mod:`qwidgets.model.taps`: the attention is
written out step by step when they are quantized), as are the entries found on data by
:mod:`qwidgets.model.usage` (weights used through ``F.linear`` / ``matmul`` / ``addmm`` / ...
in modules of other types, and ``F.scaled_dot_product_attention``'s operands).

Tied weights (one tensor used by several modules, e.g. a language model's embedding and output
layer) make one entry, named after its first owner in registration order; ``shared_with`` lists
the other places. Quantizing an entry quantizes the tensor everywhere it is used: measurements
substitute the quantized tensor for the parameter (``torch.func.functional_call`` with tied
weights kept tied) and never change the user's model.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass, field

import torch
from torch import nn

from .layers import is_quantizable, weight_axis

KINDS = ("layer", "attention", "recurrent", "embedding", "product", "activation")

_RECURRENT = (nn.RNNBase,)


_EMBEDDING = (nn.Embedding, nn.EmbeddingBag)


@dataclass(frozen=True)
class Entry:
    """One quantizable weight: where it lives and how it is quantized.

    ``name``: the entry's name (table rows, plan keys); ``kind``: ``"layer"`` (Linear / Conv /
    ConvTranspose), ``"attention"``, ``"recurrent"`` or ``"embedding"``; ``module``: the owner
    module's path; ``param``: the parameter's qualified name in ``model.named_parameters()``;
    ``axis``: the per-channel axis of its grids; ``runs_as_module``: the owner is a layer whose
    output can be computed functionally from its input (inputs can be quantized);
    ``type_name``: what the table shows; ``shape``; ``shared_with``: other places that use the
    same tensor; ``input_args``: the owner's call arguments that are the entry's inputs (a
    layer's first argument; an attention projection's query / key / value), empty for
    weight-only entries; ``via``: ``"tap"`` for inputs reached by taps (activations, the
    context of ``out_proj``, entries found by use), else ``"module"``. An activation
    (``kind="activation"``) has no weight: ``param`` is empty, ``shape`` is ``()``.

    >>> from torch import nn
    >>> [e.name for e in find_entries(nn.Sequential(nn.Embedding(10, 4), nn.LSTM(4, 3)))]
    ['0', '1.weight_ih_l0', '1.weight_hh_l0']
    """

    name: str
    kind: str
    module: str
    param: str
    axis: int
    runs_as_module: bool
    type_name: str
    shape: tuple
    shared_with: tuple = field(default=())
    input_args: tuple = field(default=())
    via: str = "module"  # "module": inputs by hooks on the owner; "tap": by taps (model.taps)

    @property
    def numel(self) -> int:
        """Weight values (none for an activation)."""
        return 0 if self.kind == "activation" else math.prod(self.shape)

    def parameter(self, model: nn.Module) -> torch.Tensor:
        """The entry's parameter in ``model`` (the same object wherever it is used)."""
        if self.kind == "activation":
            raise ValueError(f"{self.name!r} is an activation; it has no weight")
        return model.get_parameter(self.param)


@dataclass(frozen=True)
class Coverage:
    """How much of the model's floating-point weights a scan covers.

    ``scanned``: values in scanned entries; ``total``: values in every floating-point
    parameter of the model (tied tensors once); ``skipped``: ``(parameter name, reason)`` for
    every floating-point parameter not scanned.

    >>> c = Coverage(90, 100, (("fc.bias", "bias, kept in float"),))
    >>> c.fraction, str(c)
    (0.9, '90 of 100 weight values scanned (90.0%); 1 parameter(s) not scanned: fc.bias (bias, kept in float)')
    """

    scanned: int
    total: int
    skipped: tuple = ()
    total_bits: int = 0
    float_activations: tuple = ()  # activations left in float (residual additions, norms, ...)
    skipped_options: tuple = ()  # (entry, why it skipped a scanned option: blocks longer than its input axis)

    @property
    def fraction(self) -> float:
        return self.scanned / self.total if self.total else 1.0

    def to_dict(self) -> dict:
        d = {"scanned": self.scanned, "total": self.total,
             "skipped": [[n, r] for n, r in self.skipped], "total_bits": self.total_bits}
        if self.float_activations:
            d["float_activations"] = list(self.float_activations)
        if self.skipped_options:
            d["skipped_options"] = [[n, r] for n, r in self.skipped_options]
        return d

    def __str__(self) -> str:
        s = f"{self.scanned:,} of {self.total:,} weight values scanned ({100 * self.fraction:.1f}%)"
        if self.skipped:
            shown = ", ".join(f"{n} ({r})" for n, r in self.skipped[:6])
            more = f", ... ({len(self.skipped) - 6} more)" if len(self.skipped) > 6 else ""
            s += f"; {len(self.skipped)} parameter(s) not scanned: {shown}{more}"
        if self.float_activations:
            shown = "; ".join(self.float_activations[:4])
            more = f"; ... ({len(self.float_activations) - 4} more)" if len(self.float_activations) > 4 else ""
            s += f"; activations left in float: {shown}{more}"
        if self.skipped_options:
            s += "; options skipped: " + ", ".join(f"{n} ({r})" for n, r in self.skipped_options[:6])
            s += f", ... ({len(self.skipped_options) - 6} more)" if len(self.skipped_options) > 6 else ""
        return s


_ATTENTION_ARGS = ("query", "key", "value")  # nn.MultiheadAttention.forward's first three


ACTIVATION_ROLES = ("query", "key", "value", "probs")  # an attention's planned activations


def tapped(entry: Entry) -> bool:
    """Whether ``entry``'s input is reached by taps (not by hooks on its owner module)."""
    return entry.via == "tap" or entry.kind == "activation" or entry.input_args == ("context",)


def call_inputs(entry: Entry, args: tuple, kwargs: dict) -> list:
    """The tensors of one call of the entry's owner that are the entry's inputs (none for an
    entry reached by taps: its input is computed inside the owner, see :func:`tapped`)."""
    if tapped(entry):
        return []
    out = []
    for k, name in enumerate(entry.input_args):
        pos = _ATTENTION_ARGS.index(name) if name in _ATTENTION_ARGS else k
        v = args[pos] if pos < len(args) else kwargs.get(name)
        if v is None and not args and k == 0 and name == "input":
            v = next(iter(kwargs.values()), None)
        if isinstance(v, torch.Tensor):
            out.append(v)
    return out


def replace_inputs(entry: Entry, args: tuple, kwargs: dict, fn) -> tuple[tuple, dict]:
    """``(args, kwargs)`` with ``fn`` applied to each of the entry's input tensors (each distinct
    tensor once: self-attention passes the same tensor as query, key and value). An entry
    reached by taps (:func:`tapped`) has no input among its owner's arguments: unchanged (its
    input is reached with :mod:`qwidgets.model.taps`, e.g. ``attach(net, EachTap(entries, fn))``).
    """
    if tapped(entry):
        return tuple(args), dict(kwargs)
    args, kwargs = list(args), dict(kwargs)
    done: dict[int, torch.Tensor] = {}

    def apply(v):
        if not isinstance(v, torch.Tensor):
            return v
        if id(v) not in done:
            done[id(v)] = fn(v)
        return done[id(v)]

    for k, name in enumerate(entry.input_args):
        pos = _ATTENTION_ARGS.index(name) if name in _ATTENTION_ARGS else k
        if pos < len(args):
            args[pos] = apply(args[pos])
        elif name in kwargs:
            kwargs[name] = apply(kwargs[name])
        elif not args and k == 0 and name == "input" and kwargs:
            first = next(iter(kwargs))
            kwargs[first] = apply(kwargs[first])
    return tuple(args), kwargs


def _join(path: str, attr: str) -> str:
    return f"{path}.{attr}" if path else attr


def _candidates(model: nn.Module):
    """(name, kind, module path, attribute, axis, runs_as_module, type name) in registration order."""
    from .attention import supported

    attention_out = {}
    for path, m in model.named_modules():
        if isinstance(m, nn.MultiheadAttention):
            attention_out[_join(path, "out_proj")] = supported(m)
    for path, m in model.named_modules():
        if isinstance(m, nn.MultiheadAttention):
            if m.in_proj_weight is not None:
                yield _join(path, "in_proj"), "attention", path, "in_proj_weight", 0, False, \
                    "MultiheadAttention.in_proj", _ATTENTION_ARGS
            else:
                for k, arg in zip(("q", "k", "v"), _ATTENTION_ARGS, strict=True):
                    yield _join(path, f"{k}_proj"), "attention", path, f"{k}_proj_weight", 0, False, \
                        f"MultiheadAttention.{k}_proj", (arg,)
            if supported(m):  # the written-out attention's activations
                for role in ACTIVATION_ROLES:
                    yield _join(path, role), "activation", path, None, 0, False, \
                        f"MultiheadAttention.{role}", (role,)
        elif path in attention_out and isinstance(m, nn.Linear):
            tapped = attention_out[path]
            yield path, "attention", path, "weight", 0, False, "MultiheadAttention.out_proj", \
                ("context",) if tapped else ()
        elif isinstance(m, _RECURRENT):
            for attr in m._flat_weights_names:
                if attr.startswith("weight"):
                    yield _join(path, attr), "recurrent", path, attr, 0, False, type(m).__name__, ()
        elif isinstance(m, _EMBEDDING):
            yield path, "embedding", path, "weight", 0, False, type(m).__name__, ()
        elif is_quantizable(m):
            yield path, "layer", path, "weight", weight_axis(m), True, _base_name(m), ("input",)


def _base_name(m: nn.Module) -> str:
    from .layers import QUANTIZABLE_TYPES

    return next(t.__name__ for t in QUANTIZABLE_TYPES if isinstance(m, t))


def find_entries(model: nn.Module) -> list[Entry]:
    """Every quantizable weight of ``model`` as an :class:`Entry`, in registration order.

    One entry per distinct floating-point parameter tensor: a tensor used by several modules
    is named after its first owner, the others are listed in ``shared_with``.

    >>> from torch import nn
    >>> lm = nn.ModuleDict({"emb": nn.Embedding(50, 8), "head": nn.Linear(8, 50)})
    >>> lm["head"].weight = lm["emb"].weight
    >>> [(e.name, e.shared_with) for e in find_entries(lm)]
    [('emb', ('head',))]
    """
    if not isinstance(model, nn.Module):
        raise TypeError(f"model must be a torch.nn.Module, got {type(model).__name__}")
    by_tensor: dict[int, dict] = {}
    order: list[int] = []
    activations = []
    for name, kind, path, attr, axis, runs, type_name, input_args in _candidates(model):
        if kind == "activation":
            activations.append(Entry(name, kind, path, "", axis, runs, type_name, (),
                                     input_args=input_args, via="tap"))
            continue
        owner = model.get_submodule(path) if path else model
        p = getattr(owner, attr, None)
        # a registered parameter only: a weight computed from others (parametrizations, weight
        # norm) has no tensor of its own to substitute; its parameters show up as skipped
        if not isinstance(p, nn.Parameter) or not p.is_floating_point() or p.dim() < 2:
            continue
        key = id(p)
        if key in by_tensor:
            by_tensor[key]["shared"].append(name)
            continue
        by_tensor[key] = dict(name=name, kind=kind, module=path, param=_join(path, attr), axis=axis,
                              runs_as_module=runs, type_name=type_name, shape=tuple(p.shape),
                              input_args=input_args, shared=[],
                              via="tap" if input_args == ("context",) else "module")
        order.append(key)
    # other registered names of the same tensors (a parameter assigned to a second module)
    claimed = {d["param"] for d in by_tensor.values()}
    for pname, p in model.named_parameters(remove_duplicate=False):
        d = by_tensor.get(id(p))
        if d is None or pname in claimed:
            continue
        owner_path = pname.rsplit(".", 1)[0] if "." in pname else ""
        if owner_path not in d["shared"] and pname not in d["shared"] and owner_path != d["module"]:
            known = {e for e in d["shared"]}
            if not any(pname.startswith(k + ".") or pname == k for k in known):
                d["shared"].append(pname)
    entries = []
    for key in order:
        d = by_tensor[key]
        shared = tuple(d.pop("shared"))
        entries.append(Entry(**d, shared_with=shared))
    return entries + activations


def model_weight_values(model: nn.Module) -> dict[str, torch.Tensor]:
    """Every floating-point parameter of ``model``, tied tensors once (first name)."""
    return {n: p for n, p in model.named_parameters() if p.is_floating_point()}


def skip_reason(model: nn.Module, pname: str) -> str:
    """Why a floating-point parameter is not an entry (for :class:`Coverage`)."""
    owner_path, _, attr = pname.rpartition(".")
    owner = model.get_submodule(owner_path) if owner_path else model
    kind = type(owner).__name__
    if ".parametrizations." in f".{owner_path}.":
        return "a parametrized weight's parameter (the weight is computed from it), not quantized"
    if "bias" in attr:
        return f"bias of a {kind}, kept in float"
    norms = (nn.modules.batchnorm._NormBase, nn.LayerNorm, nn.GroupNorm, nn.LocalResponseNorm)
    if isinstance(owner, norms) or "norm" in kind.lower():
        return f"{kind} parameter, kept in float"
    p = owner.get_parameter(attr) if attr else None
    if p is not None and p.dim() < 2:
        return f"a {p.dim()}-d parameter of a {kind}, kept in float"
    return f"a parameter of a {kind}, a module type qwidgets does not quantize"


def coverage_of(model: nn.Module, scanned: Iterable[Entry], skipped_entries=(), *, notes=None,
                float_activations=()) -> Coverage:
    """:class:`Coverage` of ``scanned`` entries; ``skipped_entries`` are (Entry, reason) pairs;
    ``notes``: parameter name -> reason, for parameters that are no entry; ``float_activations``:
    descriptions of the activations left in float.

    >>> from torch import nn
    >>> net = nn.Sequential(nn.Linear(4, 3), nn.LayerNorm(3))
    >>> c = coverage_of(net, find_entries(net))
    >>> c.scanned, c.total, [n for n, _ in c.skipped]
    (12, 21, ['0.bias', '1.weight', '1.bias'])
    """
    scanned = list(scanned)
    done = {e.param for e in scanned}
    entry_reason = dict(notes or {})
    entry_reason.update({e.param: r for e, r in skipped_entries if e.param})
    total, total_bits, skipped = 0, 0, []
    for pname, p in model_weight_values(model).items():
        total += p.numel()
        total_bits += p.numel() * p.element_size() * 8
        if pname in done:
            continue
        skipped.append((pname, entry_reason.get(pname) or skip_reason(model, pname)))
    return Coverage(sum(e.numel for e in scanned), total, tuple(skipped), total_bits,
                    tuple(float_activations))


def weight_digest(t: torch.Tensor) -> str:
    """A short SHA-256 digest of a tensor's values (dtype, shape and bytes).

    >>> import torch
    >>> weight_digest(torch.zeros(2)) == weight_digest(torch.zeros(2)), len(weight_digest(torch.ones(1)))
    (True, 16)
    """
    import hashlib

    t = t.detach().to("cpu").contiguous()
    h = hashlib.sha256(f"{t.dtype}:{tuple(t.shape)}:".encode())
    h.update(t.reshape(-1).view(torch.uint8).numpy())  # the buffer itself, not a bytes copy
    return h.hexdigest()[:16]
