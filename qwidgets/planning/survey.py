"""The scan's first pass over the data: which entries run, in what order, on what inputs.

One streamed pass (batch by batch) records, per entry: whether its owner module ran, the order
of first calls, the input shape and multiply-accumulates of layers run as modules, a
:class:`~qwidgets.model.statistics.RangeSample` of their inputs (when inputs are scanned), and
the float model's output per batch (kept for the model scope: the model's outputs, not its
activations).

The survey is where the scan checks each layer's input for NaN / inf, once (the batch's own
tensors were checked by its data source; ``inputs_checked``: a survey of the same model and
data has checked them already); the later passes trust these values.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import torch
from torch import nn

from ..core.checks import finite_check
from ..model import layers, outputs, running
from ..model.entries import Entry, call_inputs, tapped
from ..model.finite_state import check_layer_input
from ..model.sources import DataSource, batch_size, batch_tensors
from ..model.statistics import RangeSample
from ..model.tap_quantize import EachTap
from ..model.taps import tapping


class TapSurvey(EachTap):
    """The survey's taps: order, shapes, multiply-accumulates and input samples of the entries
    reached by taps; the model's own output is kept (the attention is only observed)."""

    keep_output = True

    def __init__(self, facts, entries, first_call, first_batch, checked, want_inputs, inputs_checked):
        super().__init__(entries, self._seen)
        self.facts, self.first_call, self.first_batch = facts, first_call, first_batch
        self.checked, self.want, self.inputs_checked = checked, want_inputs, inputs_checked

    def operand(self, name, x, w, param, recompute, axis):
        f = self._observe(name, x)
        if f is not None and self.first_batch[0]:
            f.macs += int(recompute.macs(x, w))
        return x

    def product(self, a, b, macs):
        if not self.first_batch[0]:
            return
        for me, other in ((a, b), (b, a)):
            f = self.facts.get(me) if me is not None else None
            if f is not None and f.entry.kind == "activation":
                f.macs += int(macs)
                f.partner = other

    def _seen(self, name, t):
        self._observe(name, t)
        return t

    def _observe(self, name, t):
        f = self.facts.get(name)
        if f is None:
            return None
        self.first_call.setdefault(("tap", name), len(self.first_call))
        if t.is_floating_point() and id(t) not in self.checked and not self.inputs_checked:
            finite_check(t, f"the input of {name!r}", layers.LayerInputError)
        f.has_input = True
        if self.first_batch[0] and f.input_shape is None:
            f.input_shape = tuple(t.shape[1:])
        if self.want:
            f.inputs = f.inputs or RangeSample()
            f.inputs.add(t.detach())
        return f


@dataclass
class EntryFacts:
    entry: Entry
    ran: bool = False  # the owner (or, for a layer used by its parent, the parent) ran
    has_input: bool = False  # ran as a module with a tensor input
    order: tuple = (1 << 62, 0)
    input_shape: tuple | None = None
    macs: int = 0
    shared_macs: int = 0  # of the layers that use a tied entry's tensor at other places
    inputs: RangeSample | None = None
    partner: str | None = None  # an activation: the other operand of its product (None: float)


@dataclass
class Survey:
    facts: list  # EntryFacts of the entries that ran, in execution order
    skipped: list  # (Entry, reason)
    refs: list = field(default_factory=list)  # float parts of the model's output per batch
    reference: outputs.OutputComparison = field(default_factory=outputs.OutputComparison)
    n_samples: int = 0


def survey(model: nn.Module, source: DataSource, entries: list[Entry], *, want_inputs: bool,
           keep_refs: bool, output=None, inputs_checked: bool = False) -> Survey:
    modules = dict(model.named_modules())
    first_call: dict[int, int] = {}
    call_shapes: dict[int, list] = {}  # module id -> input shapes of the first batch's calls
    facts = {e.name: EntryFacts(e) for e in entries}
    layer_of: dict[int, list] = {}  # owner id -> facts of the entries whose inputs it receives
    for e in entries:
        if e.input_args and not tapped(e):
            layer_of.setdefault(id(modules[e.module]), []).append(facts[e.name])
    shared_of: dict[int, list] = {}  # a tied place's module id -> facts of the entry it uses
    for e in entries:
        for place in e.shared_with:
            m = modules.get(place)
            if isinstance(m, layers.QUANTIZABLE_TYPES):  # e.g. an output layer tied to an embedding
                shared_of.setdefault(id(m), []).append(facts[e.name])
    result = Survey([], [])
    first_batch = [True]

    def pre(module, args, kwargs):
        key = id(module)
        if key not in first_call:
            first_call[key] = len(first_call)
        x = args[0] if args else next(iter(kwargs.values()), None)
        if first_batch[0] and isinstance(x, torch.Tensor):
            call_shapes.setdefault(key, []).append(tuple(x.shape))
            for f in shared_of.get(key, ()):  # the tied tensor's multiplications there count too
                f.shared_macs += layers.layer_macs(module, tuple(x.shape))
        seen = set(checked)  # the batch's own tensors (checked by the source), then this call's
        for f in layer_of.get(key, ()):
            xs = call_inputs(f.entry, args, kwargs)
            if not xs:
                continue
            for v in xs:  # each tensor once (self-attention: one tensor, thrice)
                if v.is_floating_point() and id(v) not in seen and not inputs_checked:
                    check_layer_input(v, f"the input of layer {f.entry.name!r} ({layers.describe_layer(module)})",
                                      model)
                seen.add(id(v))
            f.has_input = True
            if first_batch[0]:
                f.input_shape = f.input_shape or tuple(xs[0].shape[1:])
                if f.entry.kind == "layer":
                    f.macs += layers.layer_macs(module, tuple(xs[0].shape))
            if want_inputs:
                f.inputs = f.inputs or RangeSample()
                for v in {id(v): v for v in xs}.values():  # self-attention: one tensor, thrice
                    f.inputs.add(v)
        return None

    hooks = {m: pre for m in modules.values()}
    n_first = 1
    checked: set[int] = set()  # ids of this batch's tensors (alive while it runs)
    taps = [e for e in entries if tapped(e)]
    tap = TapSurvey(facts, taps, first_call, first_batch, checked, want_inputs, inputs_checked) \
        if taps else None
    for batch in source:
        checked.clear()
        checked.update(id(t) for _, t in batch_tensors(batch))
        if tap is None:
            out = running.run_with_hooks(model, batch, hooks, pre=True)
        else:
            with tapping(model, tap):
                out = running.run_with_hooks(model, batch, hooks, pre=True)
        parts = outputs.float_parts(out, "float", output)
        result.reference.add_reference(parts)
        if keep_refs:
            result.refs.append(parts)
        if first_batch[0]:
            n_first = max(1, batch_size(batch))
        first_batch[0] = False
        result.n_samples += batch_size(batch)

    for reg, e in enumerate(entries):
        f = facts[e.name]
        owner = modules[e.module]
        key = id(owner)
        if ("tap", e.name) in first_call:  # reached by taps: where its input was computed
            f.ran, f.order = True, (first_call[("tap", e.name)], reg)
        elif key in first_call:
            f.ran, f.order = True, (first_call[key], reg)
        elif e.runs_as_module or e.kind == "attention":
            parent = _ran_parent(e.module, modules, first_call)
            if parent is not None:
                f.ran, f.order = True, (first_call[id(modules[parent])], reg)
        if not f.ran:
            result.skipped.append((e, f"its module {e.module!r} did not run on this data"))
            continue
        f.has_input = f.has_input and bool(e.input_args)
        if not f.has_input:
            f.input_shape = None
        if e.kind in ("activation", "product"):
            pass  # counted by the taps
        elif e.kind != "layer" or not f.has_input:
            f.macs = _weight_only_macs(e, modules, first_call, call_shapes)
        f.macs = (f.macs + f.shared_macs) // n_first  # per sample
        result.facts.append(f)
    result.facts.sort(key=lambda f: f.order)
    return result


def _ran_parent(path: str, modules, first_call) -> str | None:
    while path:
        path = path.rpartition(".")[0]
        if id(modules[path]) in first_call:
            return path
    return None


def _weight_only_macs(e: Entry, modules, first_call, call_shapes) -> int:
    """Multiply-accumulates of a weight-only entry in the first batch: positions it is applied to
    (tokens, time steps; estimated from its owner's, or its parent's, input) times its values."""
    if e.kind == "embedding":
        return 0  # a lookup, no multiplications
    path = e.module
    key = id(modules[path])
    if key not in call_shapes:
        parent = _ran_parent(path, modules, first_call)
        key = id(modules[parent]) if parent is not None else None
    shapes = call_shapes.get(key, [])
    positions = 0
    for s in shapes:
        if len(s) >= 2:
            positions += _prod(s[:-1])  # every position along all axes but the features
        elif len(s) == 1:
            positions += 1
    return positions * e.numel


def _prod(t) -> int:
    out = 1
    for v in t:
        out *= int(v)
    return out
