"""Entries found on data, by how the model uses its tensors, not by module class.

One forward pass with taps (:mod:`qwidgets.model.taps`) finds:

- every floating-point parameter of 2 or more axes, not already an entry of a known module
  class, that reaches ``F.linear``, ``torch.matmul`` / ``@``, ``torch.mm``, ``torch.bmm``,
  ``torch.addmm`` or a convolution as the weight operand (itself or a view of all of it, like
  ``W.t()``): an entry of kind ``"product"``, named like the other entries (the module's path
  for a parameter called ``weight``, else the parameter's path), its per-channel axis the
  parameter's axis that holds the product's output channels (an ``[in, out]`` weight of
  ``x @ W``: axis 1), its input the other operand;
- the operands of each ``F.scaled_dot_product_attention`` call: activations
  ``<module>.sdpa.query`` / ``.key`` / ``.value`` (``sdpa_2`` ... for later calls in one forward of
  ``<module>``);
- what stays in float around them (for :class:`~qwidgets.model.entries.Coverage`): residual
  additions, normalisations, the attention scores entering the softmax.

:func:`entries_named` rebuilds such entries from their names alone (a plan applied without data).
"""

from __future__ import annotations

from dataclasses import dataclass, field

from torch import nn

from .entries import Entry, find_entries
from .running import run_with_hooks
from .taps import Tap, sdpa_name, tapping

_NORMS = (nn.LayerNorm, nn.GroupNorm, nn.modules.batchnorm._NormBase, nn.LocalResponseNorm)


@dataclass
class Usage:
    """What one forward showed: entries found by use (in first-use order), parameters used in a
    product that cannot be entries (name -> reason), and activations left in float."""

    entries: list = field(default_factory=list)
    unusable: dict = field(default_factory=dict)
    float_activations: list = field(default_factory=list)


class _Recorder(Tap):
    keep_output = True

    def __init__(self, model: nn.Module, static: list):
        self.model = model
        self.modules = dict(model.named_modules())
        self.mha = {e.module for e in static if e.kind == "activation"}
        claimed = set()
        by_id = {id(p): n for n, p in model.named_parameters(remove_duplicate=False)}
        for e in static:
            if e.kind != "activation":
                claimed.add(id(e.parameter(model)))
        self.free = {i: n for i, n in by_id.items() if i not in claimed}
        self.found: dict[str, Entry] = {}
        self.unusable: dict[str, str] = {}
        self.sdpa: dict[str, Entry] = {}
        self.floats: list[str] = []

    def parameters(self, named):
        return {id(t): n for n, t in named.items()
                if id(t) in self.free and t.is_floating_point() and t.dim() >= 2}

    def attention(self, path):
        if path in self.mha:
            self._float(f"{path}: attention scores (softmax input), kept in float")
        return False

    def activation(self, name, t):
        if name not in self.sdpa:
            e = _sdpa_entry(name, self.modules)
            if e is not None:
                self.sdpa[name] = e
                if name.endswith(".query"):
                    where = name.rpartition(".")[0]
                    self._float(f"{where}: attention scores and probabilities, kept in float")
        return t

    def operand(self, name, x, w, param, recompute, axis):
        if name in self.found or name in self.unusable:
            return x
        if axis is None or not param.is_contiguous():
            self.unusable[name] = "used in a product through a view that reorders its values; not quantized"
            return x
        owner, _, attr = name.rpartition(".")
        entry_name = owner if attr == "weight" else name
        op = getattr(recompute, "op_name", "product")
        self.found[name] = Entry(entry_name, "product", owner, name, axis, False, f"{op} weight",
                                 tuple(param.shape), input_args=("input",), via="tap")
        return x

    def note_module(self, path: str, module: nn.Module) -> None:
        if isinstance(module, _NORMS) or "norm" in type(module).__name__.lower():
            self._float(f"{path}: {type(module).__name__} input, kept in float")

    def note_add(self, path: str) -> None:
        self._float(f"{path or '(model)'}: residual addition, kept in float")

    def _float(self, text: str) -> None:
        if text not in self.floats:
            self.floats.append(text)


def find_usage(model: nn.Module, batch) -> Usage:
    """Entries found by use in one forward of ``model`` on ``batch`` (one checked batch of a data
    source), with the parameters that cannot be entries and the activations left in float.

    >>> import torch
    >>> from torch import nn
    >>> class Block(nn.Module):
    ...     def __init__(self):
    ...         super().__init__()
    ...         self.weight = nn.Parameter(torch.randn(4, 3))   # stored [in, out]
    ...         self.bias = nn.Parameter(torch.zeros(3))
    ...     def forward(self, x):
    ...         return torch.addmm(self.bias, x, self.weight)
    >>> net = nn.Sequential(Block())
    >>> [(e.name, e.axis, e.param) for e in find_usage(net, torch.randn(2, 4)).entries]
    [('0', 1, '0.weight')]
    """
    static = find_entries(model)
    rec = _Recorder(model, static)
    names = {id(m): n for n, m in reversed(list(model.named_modules()))}

    def note(module, args, kwargs):
        rec.note_module(names.get(id(module), ""), module)

    with tapping(model, rec) as mode:
        mode.on_add = lambda: rec.note_add(mode.stack[-1][1] if mode.stack else "")
        run_with_hooks(model, batch, {m: note for m in model.modules()}, pre=True)
    return Usage(list(rec.found.values()) + list(rec.sdpa.values()), dict(rec.unusable), rec.floats)


def entries_on(model: nn.Module, batch) -> tuple[list[Entry], Usage]:
    """Every entry of ``model``: its known modules' (:func:`find_entries`), then those found by
    use on ``batch``."""
    usage = find_usage(model, batch)
    return find_entries(model) + usage.entries, usage


def entries_named(model: nn.Module, names) -> dict[str, Entry]:
    """Entries for ``names`` that are not entries of known module classes, rebuilt from their
    names: ``<module>.sdpa[_k].query|key|value`` activations, and parameters of 2 or more axes
    (``<module>`` for its ``weight``, or the parameter's path) as product entries. Names that are
    neither are left out."""
    out = {}
    modules = dict(model.named_modules())
    claimed = {id(e.parameter(model)) for e in find_entries(model) if e.kind != "activation"}
    params = {n: p for n, p in model.named_parameters() if id(p) not in claimed}
    for name in names:
        e = _sdpa_entry(name, modules)
        if e is None:
            e = _product_entry(name, params)
        if e is not None:
            out[name] = e
    return out


def _sdpa_entry(name: str, modules) -> Entry | None:
    path, _, role = name.rpartition(".")
    if role not in ("query", "key", "value"):
        return None
    owner, _, level = path.rpartition(".")
    if not path.startswith("sdpa") and not level.startswith("sdpa"):
        return None
    level = level if owner or path != level else path
    if level != "sdpa" and not (level.startswith("sdpa_") and level[5:].isdigit() and int(level[5:]) >= 2):
        return None
    if owner not in modules:
        return None
    k = 1 if level == "sdpa" else int(level[5:])
    if sdpa_name(owner, k, role) != name:
        return None
    return Entry(name, "activation", owner, "", 0, False, f"scaled_dot_product_attention.{role}", (),
                 input_args=(role,), via="tap")


def _product_entry(name: str, params) -> Entry | None:
    pname = name if name in params else (f"{name}.weight" if name else "weight")
    p = params.get(pname)
    if p is None or not p.is_floating_point() or p.dim() < 2:
        return None
    owner = pname.rpartition(".")[0]
    return Entry(name, "product", owner, pname, 0, False, "product weight", tuple(p.shape),
                 input_args=("input",), via="tap")

