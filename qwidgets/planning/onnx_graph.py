"""Rewriting the traced graph: planned weights become integer codes + ``DequantizeLinear``,
marked activations become (``Clip``,) ``QuantizeLinear`` / ``DequantizeLinear`` (per-token
inputs: their row scales computed in the graph, then a blocked pair).

Works on the graph :mod:`.onnx_trace` wrote (weights as named graph inputs, activations
behind ``Mark`` nodes), after its conversion to the file's opset. Each step is one method:
:meth:`OnnxRewrite.weight` (one planned weight: codes or its float values),
:meth:`OnnxRewrite.quantize_marks` (every marker of one activation point). A blocked
``DequantizeLinear`` (a block grid: ``axis`` and ``block_size``, scales of the weight's full
rank) takes the same method; a new kind of point is one more method of the same shape.
"""

from __future__ import annotations

import numpy as np
import torch

from ..core.grid import UniformGrid
from ..core.token_grid import TINY_SCALE, TokenGrid
from .onnx_trace import MARK_DOMAIN

__all__ = ["OnnxRewrite", "onnx_code_type", "type_range", "check_onnx_grid", "unmark"]


def unmark(proto) -> dict[str, str]:
    """Turn every ``Mark`` node into an ``Identity`` (standard operators only, so the opset
    converter accepts the graph) and return output name -> tag, for :meth:`OnnxRewrite.marks`."""
    marked = {}
    for node in proto.graph.node:
        if node.domain == MARK_DOMAIN:
            marked[node.output[0]] = next(a.s for a in node.attribute if a.name == "tag").decode()
            node.op_type, node.domain = "Identity", ""
            del node.attribute[:]
    keep = [o for o in proto.opset_import if o.domain != MARK_DOMAIN]
    del proto.opset_import[:]
    proto.opset_import.extend(keep)
    names = set(marked)
    keep_info = [v for v in proto.graph.value_info if v.name not in names]
    del proto.graph.value_info[:]
    proto.graph.value_info.extend(keep_info)
    return marked


def onnx_code_type(grid: UniformGrid) -> str:
    """The ONNX integer type that stores the grid's codes: ``"int4"``, ``"uint8"``, ...

    >>> onnx_code_type(UniformGrid(3, 0.1)), onnx_code_type(UniformGrid(12, 0.1, signed=False))
    ('int4', 'uint16')
    """
    width = 4 if grid.bits <= 4 else 8 if grid.bits <= 8 else 16
    return f"{'' if grid.signed else 'u'}int{width}"


def type_range(grid: UniformGrid) -> tuple[int, int]:
    width = int(onnx_code_type(grid).lstrip("uint"))
    return (-(2 ** (width - 1)), 2 ** (width - 1) - 1) if grid.signed else (0, 2**width - 1)


def check_onnx_grid(grid: UniformGrid, where: str) -> None:
    if not grid.has_zero_point():
        raise ValueError(f"{where}: the grid's offset is not an integer multiple of its scale, so it "
                         "has no integer zero point and ONNX cannot express it; snap it with "
                         "UniformGrid.snapped() or fit it under DeviceRules")
    lo, hi = type_range(grid)
    z = torch.as_tensor(grid.zero_point)
    if bool((z < lo).any() or (z > hi).any()):
        raise ValueError(f"{where}: zero point {z.tolist()} does not fit {onnx_code_type(grid)} "
                         f"([{lo}, {hi}])")


class OnnxRewrite:
    """Rewrites one traced graph in place; :meth:`finish` writes the node list back."""

    def __init__(self, proto):
        self.proto, self.graph = proto, proto.graph
        self.nodes = list(self.graph.node)
        self._fresh = 0

    # ------------------------------------------------------------------ weights
    def weight(self, pname: str, value: torch.Tensor, grid: UniformGrid | None,
               codes: torch.Tensor | None) -> None:
        """The graph input ``pname`` becomes a constant: ``DequantizeLinear`` of ``codes``
        with ``grid`` (per-channel ``axis`` as the grid's), or ``value`` in float32."""
        from onnx import numpy_helper

        spot = next((i for i, v in enumerate(self.graph.input) if v.name == pname), None)
        if spot is None:
            raise ValueError(f"the traced graph has no input for parameter {pname!r}")
        del self.graph.input[spot]
        if grid is None:
            arr = value.detach().to(torch.float32).cpu().numpy()
            self.graph.initializer.append(numpy_helper.from_array(arr, pname))
            return
        from onnx import helper

        q = self._constant(self.name(pname + "_quantized"), codes.cpu().numpy(), onnx_code_type(grid))
        s, z, _, _ = self._scale_zero(pname, grid)
        attrs = {} if grid.axis is None else {"axis": grid.axis % value.dim()}
        if grid.blocked:  # opset 21 blocked DequantizeLinear
            attrs["block_size"] = grid.block_size
        self.nodes.insert(0, helper.make_node("DequantizeLinear", [q, s, z], [pname],
                                              name=self.name(pname + "_dequantize"), **attrs))

    # ------------------------------------------------------------------ activations
    def marks(self, marked: dict[str, str]) -> dict[str, list]:
        """tag -> the marker nodes carrying it (``marked``: :func:`unmark`'s result)."""
        out: dict[str, list] = {}
        for node in self.nodes:
            if node.op_type == "Identity" and node.output[0] in marked:
                out.setdefault(marked[node.output[0]], []).append(node)
        return out

    def quantize_marks(self, tag: str, grid: UniformGrid | TokenGrid, nodes: list,
                       last_axis: dict | None = None) -> None:
        """Each marker of ``tag`` becomes (Clip,) QuantizeLinear, DequantizeLinear with ``grid``
        (a token grid: its scales computed in the graph, :meth:`_per_token`; ``last_axis``:
        tag -> (rank, length of the last axis) of the tensor it marks)."""
        for node in nodes:
            at = next(i for i, n in enumerate(self.nodes) if n is node)
            if isinstance(grid, TokenGrid):
                rank, length = (last_axis or {})[tag]
                new = self._per_token(node.input[0], node.output[0], grid, tag, rank, length)
            else:
                new = self._quantize_dequantize(node.input[0], node.output[0], grid, tag)
            self.nodes[at:at + 1] = new

    def finish(self) -> None:
        del self.graph.node[:]
        self.graph.node.extend(self.nodes)

    # ------------------------------------------------------------------ helpers
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

    def _scale_zero(self, base: str, grid: UniformGrid, code_type: str | None = None, shift: int = 0):
        scale = grid.scale_tensor().detach().to(torch.float32).cpu().numpy()
        zp = np.asarray(torch.as_tensor(grid.zero_point).cpu().numpy(), dtype=np.int64) + shift
        if grid.blocked:  # the blocked layout: one scale and zero point per block, full rank
            zp = np.broadcast_to(zp, scale.shape).copy()
        elif grid.axis is not None:
            n = max(scale.size, zp.size)
            scale, zp = np.broadcast_to(scale.reshape(-1), (n,)).copy(), np.broadcast_to(zp.reshape(-1), (n,)).copy()
        else:
            scale, zp = scale.reshape(()), zp.reshape(())
        s = self._constant(self.name(base + "_scale"), scale.astype(np.float32))
        z = self._constant(self.name(base + "_zero_point"), zp, code_type or onnx_code_type(grid))
        return s, z, scale, zp

    def _quantize_dequantize(self, src: str, out: str, grid: UniformGrid, base: str) -> list:
        """apply_plan's arithmetic, operation for operation: k = clamp(round((x - o) / S)),
        value (k - Z) * S, with o = -Z * S the grid's offset in float32. ``QuantizeLinear``
        with zero point 0 rounds ``(x - o) / S`` (``x / S + Z`` would round the other way at
        some ties), the ``Clip`` before it keeps k in the grid's range where that is narrower
        than the type's, and ``DequantizeLinear`` with Z gives (k - Z) * S. A per-channel grid
        uses ``QuantizeLinear`` with its zero point directly (``axis`` set).

        Signed 8-bit codes are written as uint8 with both zero points moved up by 128
        (``QuantizeLinear`` rounds, then adds its zero point: the same levels, exactly). ONNX
        Runtime's default session rewrites int8 pairs into uint8 ones itself and, around a
        ``Transpose`` it moved a quantizer across, left a ``QuantizeLinear`` it then refused
        (``output_dtype INT8 does not match y_zero_point type UINT8``, onnxruntime 1.32)."""
        from onnx import helper

        code_type, shift = ("uint8", 128) if onnx_code_type(grid) == "int8" else (None, 0)
        s, z, scale, zp = self._scale_zero(base, grid, code_type, shift)
        lo_t, hi_t = type_range(grid)
        narrow = (grid.qmin, grid.qmax) != (lo_t, hi_t)
        if grid.axis is not None:
            if narrow:
                raise ValueError(f"{base}: a per-channel input grid of {grid.bits} bits is narrower than "
                                 f"{onnx_code_type(grid)}; export supports per-channel inputs only at "
                                 "4, 8 or 16 bits")
            q = self.name(base + "_quantized")
            attrs = {"axis": grid.axis}
            return [helper.make_node("QuantizeLinear", [src, s, z], [q], name=self.name(base + "_quantize"), **attrs),
                    helper.make_node("DequantizeLinear", [q, s, z], [out], name=self.name(base + "_dequantize"),
                                     **attrs)]
        nodes = []
        offset = np.float32(grid.offset_tensor().detach().to(torch.float32).cpu().reshape(()).item())
        if offset != 0:  # x - o, rounded as torch rounds it
            shifted = self.name(base + "_shifted")
            nodes.append(helper.make_node("Sub", [src, self._constant(self.name(base + "_offset"), offset)],
                                          [shifted], name=self.name(base + "_shift")))
            src = shifted
        if narrow:  # clip (x - o) to [qmin * S, qmax * S]: round then lands in [qmin, qmax]
            lo = np.float32(grid.qmin) * np.float32(scale)
            hi = np.float32(grid.qmax) * np.float32(scale)
            clipped = self.name(base + "_clipped")
            nodes.append(helper.make_node("Clip", [src, self._constant(self.name(base + "_min"), np.float32(lo)),
                                                   self._constant(self.name(base + "_max"), np.float32(hi))],
                                          [clipped], name=self.name(base + "_clip")))
            src = clipped
        # one zero point for both where the grid's is 0 (the standard pair runtimes recognise)
        zero = z if offset == 0 else self._constant(self.name(base + "_code_origin"),
                                                    np.full((), shift, np.int64),
                                                    code_type or onnx_code_type(grid))
        q = self.name(base + "_quantized")
        nodes.append(helper.make_node("QuantizeLinear", [src, s, zero], [q], name=self.name(base + "_quantize")))
        nodes.append(helper.make_node("DequantizeLinear", [q, s, z], [out], name=self.name(base + "_dequantize")))
        return nodes

    def _per_token(self, src: str, out: str, grid: TokenGrid, base: str, rank: int, length: int) -> list:
        """apply_plan's per-row grid (:mod:`qwidgets.core.token_grid`), operation for operation
        in float32: S = max(ReduceMax(|x|, last axis) / qmax, tiny), then a blocked
        QuantizeLinear / DequantizeLinear (``block_size`` the last axis, so one scale per row;
        ``output_dtype`` signed, no zero point) whose codes never leave [-qmax, qmax]."""
        from onnx import TensorProto, helper

        if rank < 2 or length < 1:  # one axis may be the dynamic batch axis: no fixed block size
            raise ValueError(f"{base}: a per-token input needs a tensor of rank >= 2 whose last axis "
                             f"has a fixed length, got rank {rank}, last axis {length or 'dynamic'}")
        n = lambda what: self.name(f"{base}_{what}")  # noqa: E731
        absolute, peak, ratio, scale, q = n("abs"), n("row_max"), n("row_ratio"), n("row_scale"), n("quantized")
        axes = self._constant(n("last_axis"), np.array([-1], dtype=np.int64))
        qmax = self._constant(n("qmax"), np.float32(grid.qmax))
        tiny = self._constant(n("tiny"), np.float32(TINY_SCALE))
        dtype = TensorProto.INT4 if grid.bits <= 4 else TensorProto.INT8 if grid.bits <= 8 else TensorProto.INT16
        attrs = {"axis": rank - 1, "block_size": length}
        return [helper.make_node("Abs", [src], [absolute], name=n("abs_op")),
                helper.make_node("ReduceMax", [absolute, axes], [peak], keepdims=1, name=n("row_max_op")),
                helper.make_node("Div", [peak, qmax], [ratio], name=n("row_ratio_op")),
                helper.make_node("Max", [ratio, tiny], [scale], name=n("row_scale_op")),
                helper.make_node("QuantizeLinear", [src, scale], [q], output_dtype=dtype,
                                 name=n("quantize"), **attrs),
                helper.make_node("DequantizeLinear", [q, scale], [out], name=n("dequantize"), **attrs)]
