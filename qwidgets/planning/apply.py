"""Applying a plan to a copy of the model, and exporting its integer weight codes."""

from __future__ import annotations

import copy
import warnings

import torch
from torch import nn

from ..core.checks import finite_check
from ..core.grid import UniformGrid
from ..core.grid_cache import tensor_digest
from ..core.rounding import quantize_unchecked, to_codes
from ..core.token_grid import TokenGrid
from ..model.entries import find_entries, replace_inputs, tapped, weight_digest
from ..model.finite_state import check_layer_input
from ..model.state_digest import state_differences
from ..model.tap_quantize import QuantizeTap
from ..model.taps import attach
from ..model.usage import entries_named
from .plan import Plan, model_fingerprint


def match_plan(model: nn.Module, plan: Plan, strict: bool, allow_other_weights: bool = False
               ) -> tuple[dict, list[str]]:
    """Planned entries found in ``model`` (name -> :class:`Entry`) and the skipped ones, with reasons.

    ``strict=True`` raises on any planned entry missing from the model (or of another shape)
    and on a model with other parameter names or shapes; ``strict=False`` skips those. Unless
    ``allow_other_weights``, a planned entry whose weight values differ from those the plan was
    made for (its digest) is refused: the plan belongs to another checkpoint.
    """
    if not isinstance(model, nn.Module):
        raise TypeError(f"model must be a torch.nn.Module, got {type(model).__name__}")
    if not isinstance(plan, Plan):
        raise TypeError(f"plan must be a Plan, got {type(plan).__name__}")
    if not isinstance(strict, bool):
        raise TypeError(f"strict must be True or False, got {strict!r}")
    if not isinstance(allow_other_weights, bool):
        raise TypeError(f"allow_other_weights must be True or False, got {allow_other_weights!r}")

    entries = {e.name: e for e in find_entries(model)}
    entries.update(entries_named(model, [n for n in plan.layers if n not in entries]))
    modules = dict(model.named_modules())
    found, skipped = {}, []
    for name in plan.layers:
        e = entries.get(name)
        if e is None:
            m = modules.get(name)
            why = "not in the model" if m is None else f"a {type(m).__name__}, not a quantizable weight"
            skipped.append(f"{name!r} ({why})")
        elif e.kind == "activation" and plan.layers[name].weight is not None:
            skipped.append(f"{name!r} (a weight grid for an activation, {e.type_name})")
        elif e.kind != "activation" and e.shape != plan.weight_shapes[name]:
            skipped.append(f"{name!r} (weight shape {e.shape} in the model, "
                           f"{plan.weight_shapes[name]} in the plan)")
        elif plan.layers[name].input is not None and not e.input_args:
            skipped.append(f"{name!r} (an input grid for a weight-only entry, {e.type_name})")
        else:
            found[name] = e
    if strict and skipped:
        first = ", ".join(skipped[:3]) + (", ..." if len(skipped) > 3 else "")
        raise ValueError(f"the plan was made for another model ({len(skipped)} planned "
                         f"entr{'y is' if len(skipped) == 1 else 'ies are'} missing from this model "
                         f"or do not match: {first}). Pass strict=False to "
                         "apply the entries that match by name and shape")
    if strict and model_fingerprint(model) != plan.fingerprint:
        raise ValueError(f"the plan was made for another model (fingerprint {plan.fingerprint[:12]}..., "
                         f"this model {model_fingerprint(model)[:12]}...); every planned layer matches "
                         "by name and shape, but other parameters of the model differ (added, removed, "
                         "renamed or reshaped). Pass strict=False to apply the layers that match")
    if not found:
        raise ValueError(f"no planned layer matches the model by name and shape: {', '.join(skipped)}")
    if not allow_other_weights and plan.state_digests is not None:
        differ = state_differences(plan.state_digests, model, strict=strict)
        if differ:
            listed = ", ".join(differ[:8]) + (f", ... ({len(differ)} in all)" if len(differ) > 8 else "")
            raise ValueError(
                f"the model's weights or buffers differ from those the plan was made for: {listed} "
                "(another checkpoint of the same architecture?); the plan's grids and predictions "
                "depend on every weight and buffer. Scan this model again, or pass "
                "allow_other_weights=True to apply the plan anyway")
    elif not allow_other_weights:  # a plan from before whole-state digests: its weights only
        for name, e in found.items():
            if e.kind == "activation":
                continue
            want = plan.weight_digest(name)
            digest = weight_digest if want is not None and len(want) == 16 else tensor_digest  # older: SHA-256
            if want is not None and digest(e.parameter(model)) != want:
                raise ValueError(
                    f"the weights of planned entry {name!r} differ from those the plan was made for "
                    "(another checkpoint of the same architecture?); the plan's grids were fitted "
                    "to other values. Scan this model again, or pass allow_other_weights=True to "
                    "apply the plan anyway")
    return found, skipped


class _QuantizeInput:
    """Forward pre-hook of a planned copy: fake-quantizes the entry's inputs (a layer's first
    argument; an attention projection's query / key / value)."""

    def __init__(self, entry, grid: UniformGrid, checked, model, observe=None):
        self.entry, self.grid, self.checked, self.model = entry, grid, checked, model
        self.observe = observe

    def __call__(self, module, args, kwargs):
        return replace_inputs(self.entry, args, kwargs, self._quantize)

    def _quantize(self, v):
        if id(v) not in self.checked:  # the caller checked these values (a batch of evaluate_plan)
            check_layer_input(v, f"the input of layer {self.entry.name!r}", self.model)
        q = quantize_unchecked(v, self.grid)
        if self.observe is not None:
            self.observe(self.entry.name, v, q)
        return q


def apply_plan(model: nn.Module, plan: Plan, *, strict: bool = True,
               allow_other_weights: bool = False) -> nn.Module:
    """A deep copy of ``model`` with the plan's entries fake-quantized; ``model`` is untouched.

    In the copy each planned entry's weight holds its fake-quantized values (a tied tensor is
    quantized everywhere it is used) and, where the plan has an input grid, a forward pre-hook
    quantizes the layer's input on every call. ``strict=True`` refuses a plan with an entry
    missing from the model or made for a model with other parameter names or shapes (naming
    the first mismatching entries); ``strict=False`` applies the entries that match by name and
    weight shape, warns about the rest and lists them in the copy's ``qwidgets_skipped``
    attribute (``qwidgets_applied`` lists the applied ones). A model whose floating-point
    weights or buffers (BatchNorm statistics included) differ from those the plan was made for
    is refused, naming them, unless ``allow_other_weights=True``.

    >>> import torch
    >>> from torch import nn
    >>> from qwidgets import LayerSetting, Plan, UniformGrid
    >>> from qwidgets.planning.plan import model_fingerprint
    >>> lin = nn.Linear(3, 2)
    >>> p = Plan({"": LayerSetting(weight=UniformGrid(2, 0.5))}, {"": 2},
    ...          fingerprint=model_fingerprint(lin), weight_shapes={"": (2, 3)}, macs={"": 6})
    >>> q = apply_plan(lin, p)
    >>> set((q.weight.detach() / 0.5).flatten().tolist()) <= {-2.0, -1.0, 0.0, 1.0}, q is lin
    (True, False)
    """
    new, skipped = planned_copy(model, plan, strict=strict, allow_other_weights=allow_other_weights)
    if skipped:
        warnings.warn(f"apply_plan skipped {len(skipped)} planned layer(s): {', '.join(skipped)}",
                      stacklevel=2)
    return new


def planned_copy(model: nn.Module, plan: Plan, *, strict: bool, allow_other_weights: bool,
                 checked=frozenset(), observe=None) -> tuple[nn.Module, list[str]]:
    """:func:`apply_plan`'s copy and the skipped entries, without the warning.

    ``checked``: a set of ``id`` of tensors whose values the caller checked already
    (:func:`evaluate_plan` puts each batch's tensors in it before running the copy): the copy's
    input hooks quantize those without a second NaN / inf scan. The weights' values are
    checked here, once, when they are quantized. ``observe(entry name, value, quantized)``:
    called on every input the copy quantizes, in the order it quantizes them
    (:func:`qwidgets.check_onnx` compares them with the file's).
    """
    found, skipped = match_plan(model, plan, strict, allow_other_weights)
    new = copy.deepcopy(model)
    through_taps = {}
    with torch.no_grad():
        for name, e in found.items():
            setting = plan.layers[name]
            if setting.weight is not None:
                w = e.parameter(new)  # the copy keeps tied parameters tied
                finite_check(w.detach(), f"weight {e.param!r}")
                w.copy_(quantize_unchecked(w.detach(), setting.weight))
            if setting.input is not None and tapped(e):
                through_taps[e] = setting.input
            elif setting.input is not None:
                owner = new.get_submodule(e.module) if e.module else new
                owner.register_forward_pre_hook(_QuantizeInput(e, setting.input, checked, new, observe),
                                                with_kwargs=True)
    if through_taps:  # attention activations, out_proj's context, inputs of weights found by use
        attach(new, QuantizeTap(through_taps, checked=checked, observe=observe))
    new.qwidgets_applied = tuple(found)
    new.qwidgets_skipped = tuple(skipped)
    return new, skipped


def _code_dtype(grid: UniformGrid) -> torch.dtype:
    for dt in (torch.int8, torch.uint8, torch.int16, torch.int32):
        info = torch.iinfo(dt)
        if info.min <= grid.qmin and grid.qmax <= info.max:
            return dt
    return torch.int64  # not reached for bits <= 16


def export_codes(model: nn.Module, plan: Plan, *, strict: bool = True,
                 allow_other_weights: bool = False) -> dict:
    """Integer weight codes of each planned entry, with what is needed to decode them.

    One item per entry (a tied tensor once, under its entry's name; ``shared_with`` lists the
    other places that use it). ``strict`` and ``allow_other_weights`` as in :func:`apply_plan`.

    Per layer: ``codes`` (smallest integer dtype holding the grid's range: int8 / uint8 up to
    8 bits, int16 up to 16 signed or 15 unsigned, else int32), ``scale`` and ``offset``
    (float32 tensors, per channel when ``axis`` is set), ``zero_point`` (int32 tensor, or None
    when the grid has no integer zero point: see :attr:`UniformGrid.zero_point`), ``axis``,
    ``block_size`` (None, or g for a block grid: then ``scale``, ``offset`` and ``zero_point``
    have the weight's rank and shape, ``axis`` divided by g rounded up, the ONNX opset 21
    blocked layout, and each value applies to its block of g codes along ``axis``), ``bits``,
    ``signed``, and ``input`` (the input grid as a dict of the same fields, or None; a
    per-token input, :class:`qwidgets.TokenGrid`, has ``"granularity": "token"``, ``axis`` -1
    and no scale, offset or zero point: they are computed from each row at run time).

    Where ``zero_point`` is given, ``(codes - zero_point) * scale`` in float64, cast to the
    weight's dtype, is exactly the weight of :func:`apply_plan`'s model (integer arithmetic,
    then one rounding; for a block grid with ``scale`` and ``zero_point`` repeated over each
    block); without one, :func:`qwidgets.from_codes` with the grid decodes them
    (``codes * scale + offset`` in the weight's dtype for a per-tensor grid).

    >>> import torch
    >>> from torch import nn
    >>> from qwidgets import LayerSetting, Plan, UniformGrid
    >>> from qwidgets.planning.plan import model_fingerprint
    >>> lin = nn.Linear(3, 2)
    >>> p = Plan({"": LayerSetting(weight=UniformGrid(4, 0.05))}, {"": 4},
    ...          fingerprint=model_fingerprint(lin), weight_shapes={"": (2, 3)}, macs={"": 6})
    >>> out = export_codes(lin, p)[""]
    >>> out["codes"].dtype, out["bits"], out["zero_point"].tolist()
    (torch.int8, 4, 0)
    """
    found, skipped = match_plan(model, plan, strict, allow_other_weights)
    out = {}
    for name, e in found.items():
        s = plan.layers[name]
        entry = {"codes": None, **_grid_fields(s.weight)} if s.weight is not None else {
            "codes": None, "scale": None, "offset": None, "zero_point": None, "axis": None,
            "block_size": None, "bits": None, "signed": None}
        if s.weight is not None:
            w = e.parameter(model).detach()
            finite_check(w, f"weight {e.param!r}")
            codes = to_codes(w, s.weight)
            entry["codes"] = codes.to(_code_dtype(s.weight))
        entry["input"] = None if s.input is None else _grid_fields(s.input)
        entry["shared_with"] = list(e.shared_with)
        out[name] = entry
    if skipped:
        warnings.warn(f"export_codes skipped {len(skipped)} planned layer(s): {', '.join(skipped)}",
                      stacklevel=2)
    return out


def _grid_fields(g: UniformGrid | TokenGrid) -> dict:
    if isinstance(g, TokenGrid):  # nothing stored: each row's scale is computed at run time
        return {"scale": None, "offset": None, "zero_point": None, "axis": g.axis, "block_size": None,
                "bits": g.bits, "signed": True, "granularity": "token"}
    g = g.detached()
    scale = g.scale_tensor().to(torch.float32).clone()
    offset = g.offset_tensor().to(torch.float32).clone()
    zp = None
    if g.has_zero_point():
        zp = torch.as_tensor(g.zero_point, dtype=torch.int32).clone()
        if g.axis is not None and zp.dim() == 0:
            zp = zp.expand(scale.shape).clone()
    return {"scale": scale, "offset": offset, "zero_point": zp, "axis": g.axis, "block_size": g.block_size,
            "bits": g.bits, "signed": g.signed}
