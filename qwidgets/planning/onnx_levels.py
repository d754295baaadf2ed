"""Which activation values an exported file quantizes to another level than ``apply_plan``,
and the file's output with ``apply_plan``'s levels fed in.

Between two quantizers the file computes float operations (normalizations, matrix products,
softmax, GELU) with its runtime's kernels, whose float32 results differ from torch's in the
last bits (another summation order, another ``exp`` / ``erf``). A value within that rounding
of a boundary between two levels of its grid then rounds to the neighbouring level, a whole
step away, and the step travels on through the rest of the model: with quantized activations
a file can differ from ``apply_plan`` by far more than float rounding although it computes
the same arithmetic. No choice of operators removes it (the runtimes' kernels are not torch's),
so :func:`qwidgets.check_onnx` separates the two effects:

- ``export_onnx`` records each activation point in the file's ``metadata_props``
  (:data:`POINTS_KEY`: the planned entry, the value quantized, its quantized value);
- :func:`forced_model` turns the file into one that takes each quantized value as a graph
  input and returns each value before quantization as an extra output;
- :class:`Levels` feeds it ``apply_plan``'s quantized values: the output then shows the file's
  arithmetic between quantizers alone (it must match to float rounding), and the values
  before quantization, compared level by level with ``apply_plan``'s, count the values that the
  file, left to itself, puts on the other side of a boundary, and how close to it they were.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass

import numpy as np
import torch

from ..core.grid import grid_params
from ..core.rounding import quantize_unchecked, to_codes
from ..core.token_grid import TokenGrid, row_scales

__all__ = ["POINTS_KEY", "write_points", "read_points", "forced_model", "Levels", "LevelReport"]

POINTS_KEY = "qwidgets.activation_points"


def write_points(proto, places: list[tuple[str, str, str]]) -> None:
    """Record ``(entry, value name, quantized value name)`` of each activation point in the
    file (a ``metadata_props`` entry: runtimes ignore it)."""
    if not places:
        return
    item = proto.metadata_props.add()
    item.key, item.value = POINTS_KEY, json.dumps([list(p) for p in places])


def read_points(proto) -> list[tuple[str, str, str]]:
    """The points :func:`write_points` recorded ([] for a file without them)."""
    for item in proto.metadata_props:
        if item.key == POINTS_KEY:
            return [tuple(p) for p in json.loads(item.value)]
    return []


FILE_SUFFIX = "__file"  # the file's own quantized value of a point, kept as an output


def forced_model(proto, points) -> bytes:
    """The file with each point's quantized value a graph input, and as extra graph outputs
    each point's value before quantization and what the file's own quantizer makes of it
    (its ``DequantizeLinear`` output, renamed ``<name>__file``)."""
    from onnx import TensorProto, helper

    m = type(proto)()
    m.CopyFrom(proto)
    g = m.graph
    fed = {out for _, _, out in points}
    for n in g.node:
        if n.op_type == "DequantizeLinear" and n.output[0] in fed:
            n.output[0] += FILE_SUFFIX
    have = {v.name for v in g.input} | {v.name for v in g.output}
    for out in sorted(fed):
        g.input.append(helper.make_tensor_value_info(out, TensorProto.FLOAT, None))
    for _, src, out in points:
        for name in (src, out + FILE_SUFFIX):
            if name not in have:
                g.output.append(helper.make_tensor_value_info(name, TensorProto.FLOAT, None))
                have.add(name)
    return m.SerializeToString()


@dataclass(frozen=True)
class LevelReport:
    """The file fed ``apply_plan``'s quantized activations, in one runtime.

    ``forced_diff``: the relative difference of its output from apply_plan's (the file's
    arithmetic between quantizers alone); ``value_diff``: the largest relative difference,
    over the points, of the values before quantization; ``flips``: values (of ``n_values``)
    the file rounds to another level than apply_plan with apply_plan's levels upstream (left
    to itself the file may flip other values as close to a boundary: its upstream then
    differs from torch's by float rounding too); ``flip_gap``: the largest difference of
    a flipped value from apply_plan's, in steps of its grid (a boundary lies between the two
    values, so each was at most that far from it); ``flip_rel``: the same difference relative
    to the largest magnitude of its point's values. ``misquantized``: values the file's own
    quantizer puts elsewhere than the plan's grid puts the same value (another scale, zero
    point or range in the file).
    """

    forced_diff: float
    value_diff: float
    flips: int
    n_values: int
    flip_gap: float
    flip_rel: float
    misquantized: int = 0

    def agrees(self, tolerance: float) -> bool:
        """The arithmetic matches, the file quantizes on the plan's grids, and every flipped
        value was within float rounding of a boundary (``tolerance`` relative to its point's
        values)."""
        return (self.forced_diff < tolerance and self.value_diff < tolerance
                and self.flip_rel < tolerance and self.misquantized == 0)


class Levels:
    """Collects one runtime's forced runs over the batches."""

    def __init__(self, points, plan, tolerance: float):
        self.points, self.plan, self.tolerance = points, plan, tolerance
        self.by_entry: dict[str, list] = {}
        for p in points:
            self.by_entry.setdefault(p[0], []).append(p)
        self.value_sums = {src: [0.0, 0.0] for _, src, _ in points}
        self.flips = self.n = self.misquantized = 0
        self.gap = self.rel = 0.0

    def feed(self, observed: dict, base_feed: dict) -> dict | None:
        """The forced file's inputs: ``base_feed`` plus apply_plan's quantized values (None when
        apply_plan quantized another number of values than the file marks)."""
        feed = dict(base_feed)
        for entry, places in self.by_entry.items():
            seen = observed.get(entry, [])
            if len(seen) != len(places):
                return None
            for (_, _, out), (_, q) in zip(places, seen, strict=True):
                feed[out] = q.detach().to(torch.float32).cpu().numpy()
        return feed

    def add(self, observed: dict, values: dict) -> None:
        """Compare the file's values before quantization (``values``: name -> array) with
        apply_plan's, level by level."""
        for entry, places in self.by_entry.items():
            grid = self.plan.layers[entry].input
            for (_, src, out), (x, _) in zip(places, observed[entry], strict=True):
                mine = x.detach().to(torch.float32).cpu()
                got = torch.as_tensor(np.asarray(values[src]), dtype=torch.float32).reshape(mine.shape)
                own = torch.as_tensor(np.asarray(values[out + FILE_SUFFIX]), dtype=torch.float32)
                want = quantize_unchecked(got, grid)
                slack = self.tolerance * float(want.abs().max()) if want.numel() else 0.0
                self.misquantized += int(((own.reshape(want.shape) - want).abs() > slack).sum())
                d = got.double() - mine.double()
                sums = self.value_sums[src]
                sums[0] += float(d.square().sum())
                sums[1] += float(mine.double().square().sum())
                (k_got, u_got), (k_mine, u_mine) = _levels(got, grid), _levels(mine, grid)
                flipped = k_got != k_mine
                self.n += mine.numel()
                k = int(flipped.sum())
                if k:
                    self.flips += k
                    self.gap = max(self.gap, float((u_got - u_mine).abs()[flipped].max()))
                    self.rel = max(self.rel, float(d.abs()[flipped].max()) / max(float(mine.abs().max()), 1e-30))

    def report(self, forced_diff: float) -> LevelReport:
        def rel(err, ref):
            return 0.0 if err == 0.0 else math.inf if ref == 0.0 else math.sqrt(err / ref)
        value = max((rel(*s) for s in self.value_sums.values()), default=0.0)
        return LevelReport(forced_diff, value, self.flips, self.n, self.gap, self.rel, self.misquantized)


def _levels(x: torch.Tensor, grid) -> tuple[torch.Tensor, torch.Tensor]:
    """Each value's level (code) on ``grid`` and its place in steps, ``(x - o) / S`` in float64
    (a token grid: on its row's own scale)."""
    if isinstance(grid, TokenGrid):
        s = row_scales(x, grid)
        codes = torch.clamp(torch.round(x.float() / s), -grid.qmax, grid.qmax)
        return codes.reshape(x.shape), (x.double() / s.double()).reshape(x.shape)
    s, o = grid_params(x, grid, torch.float64)
    return to_codes(x, grid), (x.double() - o) / s
