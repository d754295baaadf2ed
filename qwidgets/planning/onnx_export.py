"""Export a planned model to the ONNX standard: integer weight codes and quantize / dequantize nodes.

The float model is exported with torch's TorchScript-based ONNX exporter (``dynamo=False``: it
needs no package beyond ``onnx``), then converted to the requested opset and rewritten:

- each planned weight (any entry: layers, attention projections, recurrent matrices,
  embeddings) is stored as integer codes (int4 / uint4 up to 4 bits, int8 / uint8 up to
  8, int16 / uint16 up to 16; the grid's own, possibly narrower, range is what the codes use)
  followed by ``DequantizeLinear`` with the plan's scale and zero point (``axis`` where the grid
  is per channel), so the deployed weights are ``(q - Z) * S``, exactly ``apply_plan``'s;
- each planned input passes through ``QuantizeLinear`` then ``DequantizeLinear`` with the plan's
  scale and zero point (after a ``Clip`` to the grid's range when it is narrower than the
  integer type's, since ``QuantizeLinear`` saturates only at the type's ends).

Opset 21 is the first with 4-bit and 16-bit integer types for these operators. The file is
written with IR version 10 (the lowest that holds opset 21), which runtimes that read only up to
an older IR version accept. A grid whose offset is not an integer multiple of its scale has no
integer zero point and cannot be written this way: it is refused (snap it with
``UniformGrid.snapped()``, or fit under :class:`qwidgets.DeviceRules`).
"""

from __future__ import annotations

import copy
import io
import os
import warnings
from numbers import Integral
from typing import TYPE_CHECKING

import numpy as np
import torch
from torch import nn

from ..core.grid import UniformGrid
from ..core.rounding import to_codes
from .apply import match_plan
from .plan import Plan

if TYPE_CHECKING:  # onnx is imported when a file is written, not with qwidgets
    import onnx

__all__ = ["export_onnx", "onnx_code_type"]

_TRACE_OPSET = 18  # what the TorchScript exporter writes; converted to ``opset`` afterwards
_PASS_THROUGH = ("Identity", "Transpose", "Cast", "Reshape", "Unsqueeze", "Squeeze")
_USERS = ("Conv", "ConvTranspose", "Gemm", "MatMul")


def onnx_code_type(grid: UniformGrid) -> str:
    """The ONNX integer type that stores the grid's codes: ``"int4"``, ``"uint8"``, ...

    >>> onnx_code_type(UniformGrid(3, 0.1)), onnx_code_type(UniformGrid(12, 0.1, signed=False))
    ('int4', 'uint16')
    """
    width = 4 if grid.bits <= 4 else 8 if grid.bits <= 8 else 16
    return f"{'' if grid.signed else 'u'}int{width}"


def export_onnx(model: nn.Module, plan: Plan, path: str | os.PathLike,
                example_inputs: torch.Tensor | tuple[torch.Tensor, ...], *,
                opset: int = 21) -> onnx.ModelProto:
    """Write ``model`` with ``plan`` applied as an ONNX file; return the ``onnx.ModelProto``.

    ``example_inputs``: a tensor or a tuple of tensors the model accepts (their first axis is
    exported as a dynamic batch axis). ``model`` is not changed. Every planned grid must have an
    integer zero point that fits its integer type; others are refused with the layer named.
    The exported model computes what ``apply_plan(model, plan)`` computes, up to the rounding
    order of the input quantization (ONNX rounds ``x / S`` and adds ``Z``).

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
    try:
        import onnx
    except ImportError as e:  # pragma: no cover - onnx is a declared dependency of export
        raise ImportError("export_onnx needs the 'onnx' package (pip install onnx)") from e
    if isinstance(opset, bool) or not isinstance(opset, Integral):
        raise TypeError(f"opset must be an int, got {opset!r}")
    newest = onnx.defs.onnx_opset_version()
    if not 21 <= opset <= newest:
        raise ValueError(f"opset must be in 21..{newest} (21 adds the 4- and 16-bit integer types), "
                         f"got {opset}")
    if not isinstance(path, (str, os.PathLike)):
        raise TypeError(f"path must be a str or os.PathLike, got {type(path).__name__}")
    args = _check_inputs(example_inputs)
    found, _ = match_plan(model, plan, strict=True)
    for name in found:
        s = plan.layers[name]
        for role, grid in (("weight", s.weight), ("input", s.input)):
            if grid is not None:
                _check_grid(grid, f"layer {name!r} {role}")

    proto = _export_float(model, args)
    proto = onnx.version_converter.convert_version(proto, opset)
    graph = _Graph(proto)
    for name, entry in found.items():
        setting = plan.layers[name]
        weight = entry.parameter(model).detach()
        wname = graph.weight_name(name, entry.param, weight)
        users = graph.users_of(wname) if setting.input is not None else []
        if setting.input is not None and not users:
            raise ValueError(f"the exported graph does not use {name!r}'s weight in a Conv, "
                             "ConvTranspose, Gemm or MatMul node; its input grid cannot be exported")
        if setting.weight is not None:
            codes = to_codes(weight, setting.weight)
            graph.dequantized_weight(wname, codes, setting.weight, weight.dim())
        if setting.input is not None:
            for node, data_index in users:
                graph.quantized_input(node, data_index, setting.input, f"{name or 'model'}.input")
    graph.finish()
    proto.ir_version = max(10, onnx.helper.find_min_ir_version_for(list(proto.opset_import)))
    onnx.checker.check_model(proto, full_check=True)
    onnx.save(proto, os.fspath(path))
    return proto


# ---------------------------------------------------------------------------- checks
def _check_inputs(example_inputs) -> tuple:
    args = (example_inputs,) if isinstance(example_inputs, torch.Tensor) else example_inputs
    if not isinstance(args, tuple) or not args or not all(isinstance(a, torch.Tensor) for a in args):
        raise TypeError("example_inputs must be a tensor or a non-empty tuple of tensors, got "
                        f"{type(example_inputs).__name__}")
    return args


def _check_grid(grid: UniformGrid, where: str) -> None:
    if not grid.has_zero_point():
        raise ValueError(f"{where}: the grid's offset is not an integer multiple of its scale, so it "
                         "has no integer zero point and ONNX cannot express it; snap it with "
                         "UniformGrid.snapped() or fit it under DeviceRules")
    lo, hi = _type_range(grid)
    z = torch.as_tensor(grid.zero_point)
    if bool((z < lo).any() or (z > hi).any()):
        raise ValueError(f"{where}: zero point {z.tolist()} does not fit {onnx_code_type(grid)} "
                         f"([{lo}, {hi}])")


def _type_range(grid: UniformGrid) -> tuple[int, int]:
    width = int(onnx_code_type(grid).lstrip("uint"))
    return (-(2 ** (width - 1)), 2 ** (width - 1) - 1) if grid.signed else (0, 2**width - 1)


# ---------------------------------------------------------------------------- export
def _export_float(model: nn.Module, args: tuple):
    import onnx

    net = copy.deepcopy(model).eval()
    names = [f"input_{i}" for i in range(len(args))]
    dynamic = {n: {0: "batch"} for n, a in zip(names, args, strict=True) if a.dim() >= 1}
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", category=DeprecationWarning)
        warnings.simplefilter("ignore", category=FutureWarning)
        with torch.no_grad():
            torch.onnx.export(net, args, buf, dynamo=False, opset_version=_TRACE_OPSET,
                              do_constant_folding=False, input_names=names, dynamic_axes=dynamic)
    return onnx.load_from_string(buf.getvalue())


class _Graph:
    """Rewrites one exported graph in place."""

    def __init__(self, proto):
        self.proto, self.graph = proto, proto.graph
        self.inits = {t.name: t for t in self.graph.initializer}
        self.nodes = list(self.graph.node)  # edited here, written back by finish()
        self._fresh = 0

    def finish(self) -> None:
        del self.graph.node[:]
        self.graph.node.extend(self.nodes)

    def weight_name(self, layer_name: str, param: str, weight: torch.Tensor) -> str:
        from onnx import numpy_helper

        if param in self.inits:
            return param
        w = weight.cpu().numpy()  # renamed by the exporter: find it by value
        hits = [n for n, t in self.inits.items() if tuple(t.dims) == w.shape
                and np.array_equal(numpy_helper.to_array(t), w)]
        if len(hits) != 1:
            raise ValueError(f"cannot find layer {layer_name!r}'s weight in the exported graph "
                             f"({len(hits)} initializers hold its values)")
        return hits[0]

    def users_of(self, wname: str) -> list:
        """(node, index of its data input) of each Conv / Gemm / MatMul fed by the weight."""
        derived, users = {wname}, []
        for node in self.nodes:
            hit = [i for i, v in enumerate(node.input) if v in derived]
            if not hit:
                continue
            if node.op_type in _PASS_THROUGH and hit == [0]:
                derived.update(node.output)
            elif node.op_type in _USERS:
                data = [i for i in range(min(2, len(node.input))) if i not in hit]
                if len(data) == 1:
                    users.append((node, data[0]))
        return users

    def name(self, base: str) -> str:
        self._fresh += 1
        return f"{base}_{self._fresh}"

    def _constant(self, name: str, array: np.ndarray, onnx_type: str | None = None) -> str:
        from onnx import TensorProto, helper, numpy_helper

        if onnx_type is None:
            t = numpy_helper.from_array(array, name)
        else:
            dt = getattr(TensorProto, onnx_type.upper())
            t = helper.make_tensor(name, dt, list(array.shape), array.reshape(-1).astype(np.int64).tolist())
        self.graph.initializer.append(t)
        return name

    def _scale_zero(self, base: str, grid: UniformGrid):
        scale = grid.scale_tensor().detach().to(torch.float32).cpu().numpy()
        zp = np.asarray(torch.as_tensor(grid.zero_point).cpu().numpy(), dtype=np.int64)
        if grid.axis is not None:
            n = max(scale.size, zp.size)
            scale, zp = np.broadcast_to(scale.reshape(-1), (n,)).copy(), np.broadcast_to(zp.reshape(-1), (n,)).copy()
        else:
            scale, zp = scale.reshape(()), zp.reshape(())
        s = self._constant(self.name(base + "_scale"), scale.astype(np.float32))
        z = self._constant(self.name(base + "_zero_point"), zp, onnx_code_type(grid))
        return s, z, scale, zp

    def dequantized_weight(self, wname: str, codes: torch.Tensor, grid: UniformGrid, ndim: int) -> None:
        from onnx import helper

        old = self.inits.pop(wname)
        self.graph.initializer.remove(old)
        q = self._constant(self.name(wname + "_quantized"), codes.cpu().numpy(), onnx_code_type(grid))
        s, z, _, _ = self._scale_zero(wname, grid)
        attrs = {} if grid.axis is None else {"axis": grid.axis % ndim}
        node = helper.make_node("DequantizeLinear", [q, s, z], [wname], name=self.name(wname + "_dequantize"),
                                **attrs)
        self.nodes.insert(0, node)

    def quantized_input(self, user, index: int, grid: UniformGrid, base: str) -> None:
        from onnx import helper

        x = user.input[index]
        s, z, scale, zp = self._scale_zero(base, grid)
        attrs = {} if grid.axis is None else {"axis": grid.axis}  # axis of the layer's input
        nodes, src = [], x
        lo_t, hi_t = _type_range(grid)
        if (grid.qmin, grid.qmax) != (lo_t, hi_t):  # narrower than the type: clip to the grid first
            if grid.axis is not None:
                raise ValueError(f"{base}: a per-channel input grid of {grid.bits} bits is narrower than "
                                 f"{onnx_code_type(grid)}; export supports per-channel inputs only at "
                                 "4, 8 or 16 bits")
            lo = np.float32(grid.qmin - int(zp)) * np.float32(scale)
            hi = np.float32(grid.qmax - int(zp)) * np.float32(scale)
            clipped = self.name(base + "_clipped")
            nodes.append(helper.make_node("Clip", [src, self._constant(self.name(base + "_min"), np.float32(lo)),
                                                   self._constant(self.name(base + "_max"), np.float32(hi))],
                                          [clipped], name=self.name(base + "_clip")))
            src = clipped
        q, dq = self.name(base + "_quantized"), self.name(base + "_dequantized")
        nodes.append(helper.make_node("QuantizeLinear", [src, s, z], [q], name=self.name(base + "_quantize"), **attrs))
        nodes.append(helper.make_node("DequantizeLinear", [q, s, z], [dq], name=self.name(base + "_dequantize"),
                                      **attrs))
        at = next(i for i, n in enumerate(self.nodes) if n is user)
        self.nodes[at:at] = nodes
        user.input[index] = dq
