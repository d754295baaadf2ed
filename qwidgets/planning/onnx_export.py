"""Export a planned model to the ONNX standard: integer weight codes and quantize / dequantize nodes.

The float model is exported with torch's TorchScript-based ONNX exporter (``dynamo=False``: it
needs no package beyond ``onnx``) with PyTorch's attention fast path off (its fused kernels
have no ONNX form; the user's setting is restored after), each planned weight a graph input
found by its place, never by its values (:mod:`.onnx_trace`), then converted to the requested
opset and rewritten (:mod:`.onnx_graph`):

- each planned weight (any entry: layers, attention projections, recurrent matrices,
  embeddings) is stored as integer codes (int4 / uint4 up to 4 bits, int8 / uint8 up to
  8, int16 / uint16 up to 16; the grid's own, possibly narrower, range is what the codes use)
  followed by ``DequantizeLinear`` with the plan's scale and zero point (``axis`` where the grid
  is per channel; ``axis`` and ``block_size``, the opset 21 blocked form, for a block grid), so
  the deployed weights are ``(q - Z) * S``, exactly ``apply_plan``'s;
- each planned input passes through ``QuantizeLinear`` then ``DequantizeLinear`` with the plan's
  scale and zero point (after a ``Clip`` to the grid's range when it is narrower than the
  integer type's, since ``QuantizeLinear`` saturates only at the type's ends); a per-token
  input (:class:`qwidgets.TokenGrid`) computes its scales in the graph (``Abs``,
  ``ReduceMax`` over the last axis, ``Div`` by qmax, ``Max`` with float32's smallest normal
  number) and passes through a blocked ``QuantizeLinear`` / ``DequantizeLinear`` whose
  ``block_size`` is the last axis (one scale per row; ``output_dtype`` signed, no zero point).
  Signed 8-bit codes of a fitted input grid are written as uint8 with the zero point + 128 (the
  same levels: ``QuantizeLinear`` rounds before it adds the zero point), which ONNX Runtime's
  default session loads on attention graphs where its own int8 rewrite failed. The activation
  points are recorded in the file's ``metadata_props`` for :func:`qwidgets.check_onnx`.

Opset 21 is the first with 4-bit and 16-bit integer types for these operators. The file is
written with IR version 10 (the lowest that holds opset 21), which runtimes that read only up to
an older IR version accept. A grid whose offset is not an integer multiple of its scale has no
integer zero point and cannot be written this way: it is refused (snap it with
``UniformGrid.snapped()``, or fit under :class:`qwidgets.DeviceRules`).

A model in float16, bfloat16 or float64 is written as a float32 file (a warning and the file's
``doc_string`` say so): QuantizeLinear takes no float64, and ONNX Runtime's CPU kernels do not
run bfloat16 QuantizeLinear nor every float16 operator. Its scales are the plan's, in float32.
"""

from __future__ import annotations

import os
import warnings
from numbers import Integral
from typing import TYPE_CHECKING, Any

import torch
from torch import nn

from ..core.rounding import to_codes
from ..core.token_grid import TokenGrid
from .apply import match_plan
from .onnx_graph import OnnxRewrite, check_onnx_grid, onnx_code_type, unmark
from .onnx_levels import write_points
from .onnx_trace import float32_copy, graph_inputs, quantization_points, trace_float
from .plan import Plan

if TYPE_CHECKING:  # onnx is imported when a file is written, not with qwidgets
    import onnx

__all__ = ["export_onnx", "onnx_code_type", "require_onnx"]

INSTALL = "pip install 'qwidgets[onnx]' (or: pip install onnx onnxruntime)"


def require_onnx(what: str, runtime: bool = False):
    """Import ``onnx`` (and ``onnxruntime`` when ``runtime``), or say what to install."""
    try:
        import onnx
        if runtime:
            import onnxruntime  # noqa: F401
    except ImportError as e:
        raise ImportError(f"{what} needs the 'onnx'{' and onnxruntime' if runtime else ''} "
                          f"package{'s' if runtime else ''} ({e.name} is missing): {INSTALL}") from e
    return onnx


def export_onnx(model: nn.Module, plan: Plan, path: str | os.PathLike,
                example_inputs: torch.Tensor | tuple[Any, ...] | dict[str, Any], *,
                opset: int = 21, allow_other_weights: bool = False) -> onnx.ModelProto:
    """Write ``model`` with ``plan`` applied as an ONNX file; return the ``onnx.ModelProto``.

    ``example_inputs``: a tensor, a tuple of positional inputs (graph inputs ``input_0``,
    ``input_1``, ...) or a dict of keyword inputs (graph inputs named by its keys); axis 0 of
    each tensor is exported as a dynamic batch axis (the other axes, a sequence length
    included, keep the example's sizes), other values are fixed in the graph. The
    graph's outputs ``output_0``, ... are the tensors of the model's output, in order (a
    tuple, dict or dataclass output flattened as :func:`qwidgets.evaluate_plan` reads it).
    ``model`` is not changed. Every planned grid must have an integer zero point that fits its
    integer type; others are refused with the layer named. A model whose weights or buffers
    differ from those the plan was made for is refused, naming them, unless
    ``allow_other_weights=True`` (as in :func:`qwidgets.apply_plan`). The exported model
    computes what ``apply_plan(model, plan)`` computes, up to the rounding order of the input quantization
    (ONNX rounds ``x / S`` and adds ``Z``); :func:`qwidgets.check_onnx` compares the two.
    Needs the ``onnx`` package (``pip install 'qwidgets[onnx]'``).

    >>> import os, tempfile, torch
    >>> from torch import nn
    >>> from qwidgets import LayerSetting, Plan, UniformGrid
    >>> from qwidgets.planning.plan import model_fingerprint
    >>> lin = nn.Linear(3, 2)
    >>> p = Plan({"": LayerSetting(weight=UniformGrid(4, 0.05))}, {"": 4},
    ...          fingerprint=model_fingerprint(lin), weight_shapes={"": (2, 3)}, macs={"": 6})
    >>> with tempfile.TemporaryDirectory() as d:
    ...     m = export_onnx(lin, p, os.path.join(d, "lin.onnx"), torch.zeros(1, 3))
    >>> [n.op_type for n in m.graph.node]
    ['DequantizeLinear', 'Gemm']
    """
    onnx = require_onnx("export_onnx")
    if isinstance(opset, bool) or not isinstance(opset, Integral):
        raise TypeError(f"opset must be an int, got {opset!r}")
    newest = onnx.defs.onnx_opset_version()
    if not 21 <= opset <= newest:
        raise ValueError(f"opset must be in 21..{newest} (21 adds the 4- and 16-bit integer types), "
                         f"got {opset}")
    if not isinstance(path, (str, os.PathLike)):
        raise TypeError(f"path must be a str or os.PathLike, got {type(path).__name__}")
    names, tensors, call = _check_inputs(example_inputs)
    found, _ = match_plan(model, plan, strict=True, allow_other_weights=allow_other_weights)
    for name in found:
        s = plan.layers[name]
        for role, grid in (("weight", s.weight), ("input", s.input)):
            if grid is not None and not isinstance(grid, TokenGrid):  # a token grid: scales in the graph
                check_onnx_grid(grid, f"layer {name!r} {role}")

    net, widened = float32_copy(model)
    if widened:
        tensors = [t.float() if t.is_floating_point() else t for t in tensors]
    shapes: dict = {}  # tag -> (rank, last axis) of each marked tensor, filled by the trace
    points = quantization_points(net, plan, found, shapes)
    weights = {e.param: name for name, e in found.items() if e.kind != "activation"}  # no weight
    proto = trace_float(net, names, tensors, call, list(weights))
    marked = unmark(proto)
    proto = onnx.version_converter.convert_version(proto, opset)
    graph = OnnxRewrite(proto)
    for pname, name in weights.items():
        grid = plan.layers[name].weight
        value = net.get_parameter(pname).detach()
        graph.weight(pname, value, grid, None if grid is None else to_codes(value, grid))
    by_tag = graph.marks(marked)
    places = []  # (entry, value quantized, its quantized value) of each point, in graph order
    for point in points:
        nodes = by_tag.pop(point.tag, [])
        if not nodes:
            raise ValueError(f"planned input {point.tag!r} is not computed in the exported graph (the "
                             "model's forward on example_inputs never reached it); its grid cannot be "
                             "exported")
        places += [(point.entry, n.input[0], n.output[0]) for n in nodes]
        graph.quantize_marks(point.tag, point.grid, nodes, shapes)
    graph.finish()
    write_points(proto, places)
    proto.ir_version = max(10, onnx.helper.find_min_ir_version_for(list(proto.opset_import)))
    if widened:
        kinds = sorted({str(p.dtype).replace("torch.", "") for p in model.parameters() if p.is_floating_point()})
        note = (f"the model computes in {', '.join(kinds)}; this file computes in float32 (its weights "
                "are the planned codes, its scales the plan's in float32)")
        proto.doc_string = note
        warnings.warn(f"export_onnx: {note}", UserWarning, stacklevel=2)
    onnx.checker.check_model(proto, full_check=True)
    onnx.save(proto, os.fspath(path))
    return proto


def _check_inputs(example_inputs):
    bad = TypeError("example_inputs must be a tensor, a non-empty tuple of positional inputs or a dict "
                    f"of keyword inputs holding at least one tensor, got {type(example_inputs).__name__}")
    if isinstance(example_inputs, dict):
        if not all(isinstance(k, str) for k in example_inputs):
            raise TypeError(f"example_inputs keys must be str (graph input names), got {list(example_inputs)}")
    elif not isinstance(example_inputs, (torch.Tensor, tuple)):
        raise bad
    names, tensors, call = graph_inputs(example_inputs)
    if not tensors:
        raise bad
    return names, tensors, call
