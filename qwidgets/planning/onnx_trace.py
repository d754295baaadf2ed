"""Tracing a planned model for ONNX: the float graph, with each planned weight a named graph
input and each planned activation marked where it is quantized.

Weights are found by their place in the graph, never by their values: the export's own copy
of the model runs with each planned weight swapped for a traced input named after its
parameter (``layers.0.self_attn.in_proj_weight``), so two layers holding byte-identical
weights (a freshly initialised stack, a deep-copied block) stay two inputs, where the exporter
would merge equal initializers. Every activation the plan quantizes passes through a marker
(an autograd function whose ONNX symbolic is a ``Mark`` node carrying the point's tag), put
there by the same forward pre-hooks :func:`qwidgets.apply_plan` quantizes with; the rewrite
(:mod:`.onnx_graph`) turns each marker into ``QuantizeLinear`` / ``DequantizeLinear``.

:func:`quantization_points` is the one place that decides what is marked: a point is a tag
and a grid; a new kind of planned activation adds its markers there.
"""

from __future__ import annotations

import copy
import io
import warnings
from dataclasses import dataclass

import torch
from torch import nn

from ..core.grid import UniformGrid
from ..core.token_grid import TokenGrid
from ..model.entries import replace_inputs, tapped
from ..model.fastpath import attention_fastpath_off
from ..model.outputs import iter_tensors
from ..model.tap_quantize import EachTap
from ..model.taps import attach

__all__ = ["QuantPoint", "MARK_DOMAIN", "trace_float", "quantization_points", "graph_inputs"]

MARK_DOMAIN = "qwidgets.mark"
TRACE_OPSET = 18  # what the TorchScript exporter writes; converted to the file's opset afterwards


@dataclass(frozen=True)
class QuantPoint:
    """A planned activation quantization point: the tag its markers carry, its grid and the
    planned entry whose input it is."""

    tag: str
    grid: UniformGrid | TokenGrid
    entry: str = ""


class _Mark(torch.autograd.Function):
    """Identity in torch; a ``Mark`` node with the point's tag in the exported graph."""

    @staticmethod
    def forward(ctx, x, tag: str):
        return x.clone()

    @staticmethod
    def symbolic(g, x, tag: str):
        out = g.op(f"{MARK_DOMAIN}::Mark", x, tag_s=tag)
        out.setType(x.type())  # an identity: the exporter's shape inference keeps the input's type
        return out


def mark(x: torch.Tensor, tag: str, shapes: dict | None = None) -> torch.Tensor:
    """``x``, marked in a trace as quantization point ``tag`` (floating-point tensors only);
    ``shapes`` receives tag -> (rank, length of the last axis), for per-token grids (the
    example's sizes: only axis 0 is exported as dynamic)."""
    if not x.is_floating_point():
        return x
    if shapes is not None:
        shapes[tag] = (x.dim(), int(x.shape[-1]) if x.dim() else 1)
    return _Mark.apply(x, tag)


class _MarkInputs:
    """Forward pre-hook of the export's copy: marks the entry's inputs (apply_plan's
    ``_QuantizeInput`` quantizes the same arguments)."""

    def __init__(self, entry, tag: str, shapes: dict | None = None):
        self.entry, self.tag, self.shapes = entry, tag, shapes

    def __call__(self, module, args, kwargs):
        return replace_inputs(self.entry, args, kwargs, lambda v: mark(v, self.tag, self.shapes))


def quantization_points(net: nn.Module, plan, found: dict, shapes: dict | None = None) -> list[QuantPoint]:
    """Install the markers of every planned activation on ``net`` (the export's own copy).

    An entry whose input its owner module receives (a layer's input; an attention
    projection's query / key / value) is marked by a forward pre-hook; one reached by taps
    (:func:`qwidgets.model.entries.tapped`: an attention's query / key / value / probabilities,
    the context entering ``out_proj``, a ``scaled_dot_product_attention`` operand, the other
    operand of a weight found by use) is marked where the taps reach it, the attention then
    written out as :func:`qwidgets.apply_plan`'s copy computes it. A new kind of planned
    activation adds its markers here, tagged ``<entry>.input``.
    """
    points, through_taps = [], []
    for name, entry in found.items():
        grid = plan.layers[name].input
        if grid is None:
            continue
        tag = _tag(name)
        points.append(QuantPoint(tag, grid, name))
        if tapped(entry):
            through_taps.append(entry)
            continue
        owner = net.get_submodule(entry.module) if entry.module else net
        owner.register_forward_pre_hook(_MarkInputs(entry, tag, shapes), with_kwargs=True)
    if through_taps:
        attach(net, EachTap(through_taps, lambda name, t: mark(t, _tag(name), shapes)))
    return points


def _tag(name: str) -> str:
    return f"{name or 'model'}.input"


def graph_inputs(example_inputs) -> tuple[list[str], list[torch.Tensor], object]:
    """Names and tensors of the model's graph inputs, and how to rebuild the call from them.

    A tensor or a tuple: ``input_0``, ``input_1``, ... (non-tensor items are fixed in the
    graph); a dict (keyword inputs): its keys.
    """
    if isinstance(example_inputs, torch.Tensor):
        example_inputs = (example_inputs,)
    if isinstance(example_inputs, dict):
        keys = [k for k, v in example_inputs.items() if isinstance(v, torch.Tensor)]
        fixed = {k: v for k, v in example_inputs.items() if not isinstance(v, torch.Tensor)}

        def call(tensors):
            return (), {**fixed, **dict(zip(keys, tensors, strict=True))}
        return [str(k) for k in keys], [example_inputs[k] for k in keys], call
    where = [i for i, v in enumerate(example_inputs) if isinstance(v, torch.Tensor)]
    items = list(example_inputs)

    def call(tensors):
        args = list(items)
        for i, t in zip(where, tensors, strict=True):
            args[i] = t
        return tuple(args), {}
    return [f"input_{i}" for i in where], [items[i] for i in where], call


class _Traced(nn.Module):
    """The model called from flat tensors: its inputs, then the planned weights."""

    def __init__(self, net: nn.Module, call, n_inputs: int, places: list):
        super().__init__()
        self.net, self._call, self._n, self._places = net, call, n_inputs, places

    def forward(self, *tensors):
        inputs, weights = tensors[: self._n], tensors[self._n:]
        saved = []
        for spots, w in zip(self._places, weights, strict=True):
            for module, attr in spots:  # every place of a tied tensor
                saved.append((module, attr, module._parameters[attr]))
                module._parameters[attr] = w
        try:
            args, kwargs = self._call(inputs)
            out = self.net(*args, **kwargs)
        finally:
            for module, attr, p in reversed(saved):
                module._parameters[attr] = p
        flat = tuple(iter_tensors(out))
        if not flat:
            raise ValueError(f"the model's output holds no tensor (got {type(out).__name__}); "
                             "export_onnx writes the tensors of the output")
        return flat


def _places(net: nn.Module, pname: str) -> list:
    target = net.get_parameter(pname)
    spots = []
    for qname, p in net.named_parameters(remove_duplicate=False):
        if p is target:
            path, _, attr = qname.rpartition(".")
            spots.append((net.get_submodule(path) if path else net, attr))
    return spots


def trace_float(net: nn.Module, names: list[str], tensors: list, call, weights: list[str]):
    """Export ``net`` (the export's copy, markers installed) with the TorchScript exporter.

    Graph inputs: ``names`` (axis 0 dynamic), then the parameters ``weights`` under their own
    names; outputs ``output_0``, ... (every tensor of the model's output, in order).
    """
    import onnx

    clash = set(names) & set(weights)
    if clash:
        raise ValueError(f"example_inputs keys {sorted(clash)} clash with parameter names of the model")
    places = [_places(net, w) for w in weights]
    values = [net.get_parameter(w).detach() for w in weights]
    wrapper = _Traced(net, call, len(tensors), places)
    with torch.no_grad():
        n_out = len(wrapper(*tensors, *values))
    dynamic = {n: {0: "batch"} for n, t in zip(names, tensors, strict=True) if t.dim() >= 1}
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # deprecation notes and the markers' missing shape inference
        with torch.no_grad(), attention_fastpath_off():
            torch.onnx.export(wrapper, tuple(tensors) + tuple(values), buf, dynamo=False,
                              opset_version=TRACE_OPSET, do_constant_folding=False,
                              input_names=list(names) + list(weights),
                              output_names=[f"output_{i}" for i in range(n_out)], dynamic_axes=dynamic)
    return onnx.load_from_string(buf.getvalue())


def float32_copy(model: nn.Module) -> tuple[nn.Module, bool]:
    """The export's own copy in eval mode: float32 (True) when the model computes in another
    floating type (QuantizeLinear takes float32, float16 or bfloat16, and ONNX Runtime's CPU
    kernels run neither half type through every operator)."""
    net = copy.deepcopy(model).eval()
    kinds = {p.dtype for p in net.parameters() if p.is_floating_point()}
    if kinds and kinds != {torch.float32}:
        return net.float(), True
    return net, False
