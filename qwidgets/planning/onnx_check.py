"""Checking an exported file against the planned model: the ONNX reference evaluator, ONNX
Runtime without graph optimizations, and ONNX Runtime as it runs by default."""

from __future__ import annotations

import math
import os
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
from torch import nn

from ..model.fastpath import without_fastpath
from ..model.outputs import call_metric, check_output_fn, float_parts, iter_tensors, refill
from ..model.picking import cut_target, split_data
from ..model.running import run_with_hooks
from ..model.sources import batch_size, data_source
from .apply import planned_copy
from .onnx_export import require_onnx
from .onnx_levels import LevelReport, Levels, forced_model, read_points
from .onnx_trace import float32_copy, graph_inputs
from .plan import Plan

__all__ = ["check_onnx", "OnnxCheck", "MATCH_RTOL"]

MATCH_RTOL = 1e-5  # relative difference under which a float32 file matches apply_plan

_OPTIMIZED_NOTE = (
    "ONNX Runtime's default session (graph optimizations on) fuses each QuantizeLinear / "
    "DequantizeLinear pair around a MatMul, Gemm or Conv into an integer kernel (for example "
    "MatMulInteger or QLinearConv: integer products accumulated in int32, then requantized with "
    "the kernel's own rounding), so its output differs from apply_plan's fake-quantized float "
    "arithmetic. That difference is the runtime's integer arithmetic, not an error in the file: "
    "the file itself matches when the runtime runs it as written (optimizations off) and in the "
    "ONNX reference evaluator. Judge the deployed accuracy on the runtime that will serve it.")


_LEVELS_NOTE = (
    "The file computes apply_plan's arithmetic: fed apply_plan's quantized activations, its output "
    "matches to float32 rounding. Left to itself it differs more because its runtime's kernels for "
    "the float operations between quantizers (normalizations, matrix products, softmax, GELU) "
    "round differently from torch's in the last bits: the few activation values that lie within "
    "that rounding of a boundary between two levels of their grid round to the neighbouring "
    "level, a whole step away, and that step carries through the rest of the model. Any runtime "
    "other than torch does this (its kernels are not torch's); judge the deployed model by its "
    "own outputs (metric= shows the metric on them).")

_MISMATCH_NOTE = (
    "Fed apply_plan's quantized activations, the file still differs from apply_plan (or values "
    "before a quantizer differ by more than float rounding): its arithmetic is not apply_plan's. "
    "Was it exported from this model and plan?")

_NO_POINTS_NOTE = (
    "The file's activation points could not be compared with apply_plan's level by level (the "
    "file records no activation points: written by an older export_onnx or another tool; or "
    "apply_plan quantized other values than the file marks), so level flips cannot be told "
    "apart from errors: an activation value within float32 rounding of a boundary of its grid "
    "may round to the neighbouring level in the file's kernels. Export it again with this "
    "model and plan to have it checked level by level.")


@dataclass(frozen=True)
class OnnxCheck:
    """An exported file run three ways on the data and compared with :func:`qwidgets.apply_plan`.

    ``reference_diff`` / ``runtime_diff`` / ``optimized_diff``: the relative difference
    ``||file - planned|| / ||planned||`` (float64 sums over every compared output value) in
    the ONNX reference evaluator, in ONNX Runtime with ``ORT_DISABLE_ALL`` and in ONNX
    Runtime's default session; ``*_max_abs``: the largest absolute difference. ``matches``:
    the first two are both under ``tolerance``. ``metric_planned`` / ``metric_runtime`` /
    ``metric_optimized``: ``metric(output, target)`` on apply_plan's, the plain runtime's and
    the optimized runtime's outputs (None without ``metric``). ``note``: how the model was
    compared (a half-precision model is compared as float32, as its file computes);
    ``optimized_error``: why the default session could not run the file (its optimizer
    rewrote the graph into one it then refused), else None, with the optimized figures NaN.
    ``plan_diff``: the relative difference of apply_plan's output from the float model's (the
    plan's own effect), the scale against which a file's difference is small or not.

    ``reference_levels`` / ``runtime_levels`` (:class:`~qwidgets.planning.onnx_levels.LevelReport`,
    None for a file whose activation points are not recorded): the file fed apply_plan's
    quantized activations. Its kernels for the float operations between quantizers round
    differently from torch's, so an activation value within that rounding of a boundary of its
    grid may round to the neighbouring level in the file; ``matches`` is also true when the
    outputs differ only that way: fed apply_plan's levels, the file matches under
    ``tolerance``, its values before each quantizer too, and each value that the file rounds to
    another level was within float rounding (``tolerance`` relative) of a boundary.
    """

    path: str
    n_samples: int
    reference_diff: float
    runtime_diff: float
    optimized_diff: float
    reference_max_abs: float
    runtime_max_abs: float
    optimized_max_abs: float
    tolerance: float = MATCH_RTOL
    metric_planned: float | None = None
    metric_runtime: float | None = None
    metric_optimized: float | None = None
    note: str = ""
    optimized_error: str | None = None
    plan_diff: float = math.nan
    reference_levels: LevelReport | None = None
    runtime_levels: LevelReport | None = None

    @property
    def exact(self) -> bool:
        """The file's own outputs match apply_plan's under ``tolerance`` in both runs."""
        return self.reference_diff < self.tolerance and self.runtime_diff < self.tolerance

    @property
    def matches(self) -> bool:
        if self.exact:
            return True
        levels = (self.reference_levels, self.runtime_levels)
        return all(lv is not None and lv.agrees(self.tolerance) for lv in levels)

    def __str__(self) -> str:
        verdict = ("matches" if self.exact else "matches, level for level," if self.matches
                   else "does NOT match")
        lines = [f"{self.path} {verdict} apply_plan on {self.n_samples} samples "
                 f"(relative difference < {self.tolerance:g}):",
                 f"  ONNX reference evaluator:            {self.reference_diff:.3g} "
                 f"(max abs {self.reference_max_abs:.3g})"
                 f"{_levels_text(self.reference_levels, self.reference_diff, self.tolerance)}",
                 f"  ONNX Runtime, optimizations off:     {self.runtime_diff:.3g} "
                 f"(max abs {self.runtime_max_abs:.3g})"
                 f"{_levels_text(self.runtime_levels, self.runtime_diff, self.tolerance)}"]
        if self.optimized_error is None:
            lines.append(f"  ONNX Runtime, default optimizations: {self.optimized_diff:.3g} "
                         f"(max abs {self.optimized_max_abs:.3g})")
        else:
            lines.append("  ONNX Runtime, default optimizations: could not run the file: "
                         + self.optimized_error)
        if self.metric_planned is not None and self.optimized_error is None:
            lines.append(f"  metric: apply_plan {self.metric_planned:.6g}, runtime {self.metric_runtime:.6g}, "
                         f"optimized runtime {self.metric_optimized:.6g}")
        lines.append(f"  (the plan itself moves the output by {self.plan_diff:.3g} relative to the float model)")
        if self.note:
            lines.append("  " + self.note)
        if not self.exact:
            none = self.reference_levels is None or self.runtime_levels is None
            lines.append(_NO_POINTS_NOTE if none else _LEVELS_NOTE if self.matches else _MISMATCH_NOTE)
        if self.optimized_error is not None or not self.optimized_diff < self.tolerance:
            lines.append(_OPTIMIZED_NOTE)
        return "\n".join(lines)


def _levels_text(lv: LevelReport | None, diff: float, tolerance: float) -> str:
    if lv is None or (diff < tolerance and not lv.flips):
        return ""
    flips = (f"{lv.flips:,} of {lv.n_values:,} on the neighbouring level, each within "
             f"{lv.flip_gap:.2g} steps of a boundary" if lv.flips else f"none of {lv.n_values:,} on another level")
    return (f"\n      fed apply_plan's levels: {lv.forced_diff:.3g}; activation values before each quantizer "
            f"within {lv.value_diff:.2g}, {flips}"
            + ("" if lv.misquantized == 0 else f"; {lv.misquantized:,} quantized off the plan's grids"))


class _Sums:
    def __init__(self):
        self.err = self.ref = self.max_abs = 0.0

    def add(self, got: list, want: list) -> None:
        for g, w in zip(got, want, strict=True):
            w = w.detach().reshape(-1).to(torch.float64)
            g = torch.as_tensor(np.asarray(g)).reshape(-1).to(torch.float64)
            if g.shape != w.shape:
                raise ValueError(f"the file's output holds {g.numel()} values where the model's holds "
                                 f"{w.numel()}; was the file exported from this model?")
            e = g - w
            self.err += float(e.dot(e))
            self.ref += float(w.dot(w))
            self.max_abs = max(self.max_abs, float(e.abs().max()) if e.numel() else 0.0)

    def relative(self) -> float:
        if self.ref == 0.0:
            return 0.0 if self.err == 0.0 else math.inf
        return math.sqrt(self.err / self.ref)


@without_fastpath
def check_onnx(path: str | os.PathLike, model: nn.Module, plan: Plan, data: Any, *,
               metric: Callable | None = None, target: Any = None, output: Callable | None = None,
               inputs: int | str | Callable | None = None, max_samples: int | None = None) -> OnnxCheck:
    """Run the file written by :func:`qwidgets.export_onnx` and compare it with ``apply_plan``.

    ``data`` as everywhere (a tensor, a batch of positional / keyword inputs, or an iterable
    of batches; ``inputs`` / ``target`` may pick each batch's parts, as in
    :func:`qwidgets.evaluate_plan`); a dict batch feeds the graph inputs of the same names, a
    tensor or tuple feeds them in order. The file runs in the ONNX reference evaluator, in ONNX Runtime
    with graph optimizations off (``ORT_DISABLE_ALL``) and in its default session; the first
    two must match ``apply_plan(model, plan)`` (relative difference under 1e-5 on float32
    outputs: :attr:`OnnxCheck.matches`), the third is reported with what its difference
    means. ``output`` selects what is compared (applied to the model's output and to the
    file's outputs rebuilt in the same structure); ``metric(output, target)`` is reported on
    apply_plan's and both runtime outputs. A float16 / bfloat16 model is compared as the
    float32 model its file computes. Needs ``onnx`` and ``onnxruntime``
    (``pip install 'qwidgets[onnx]'``).

    >>> import os, tempfile, torch
    >>> from torch import nn
    >>> from qwidgets import LayerSetting, Plan, UniformGrid, export_onnx
    >>> from qwidgets.planning.plan import model_fingerprint
    >>> lin = nn.Linear(3, 2)
    >>> p = Plan({"": LayerSetting(weight=UniformGrid(4, 0.05), input=UniformGrid(8, 0.02))},
    ...          {"": 4}, fingerprint=model_fingerprint(lin), weight_shapes={"": (2, 3)}, macs={"": 6})
    >>> x = torch.randn(16, 3)
    >>> with tempfile.TemporaryDirectory() as d:
    ...     _ = export_onnx(lin, p, os.path.join(d, "lin.onnx"), x[:1])
    ...     check = check_onnx(os.path.join(d, "lin.onnx"), lin, p, x)
    >>> check.matches, check.reference_diff < 1e-6
    (True, True)
    """
    onnx = require_onnx("check_onnx", runtime=True)
    import onnxruntime as ort
    from onnx.reference import ReferenceEvaluator

    if not isinstance(path, (str, os.PathLike)):
        raise TypeError(f"path must be a str or os.PathLike, got {type(path).__name__}")
    if not os.path.isfile(path):
        raise FileNotFoundError(f"path {os.fspath(path)!r} is not a file; write it with export_onnx first")
    if metric is not None and not callable(metric):
        raise TypeError(f"metric must be a callable metric(output, target) -> float, got {type(metric).__name__}")
    output = check_output_fn(output)
    path = os.fspath(path)
    data, target = split_data(data, inputs, target, uses_target=metric is not None)
    net, widened = float32_copy(model)
    proto = onnx.load(path)
    points = read_points(proto)
    observed: dict[str, list] = {}  # entry -> (value, quantized value) of each quantization

    def observe(entry, x, q):
        observed.setdefault(entry, []).append((x.detach().clone(), q.detach()))

    planned, _ = planned_copy(net if widened else model, plan, strict=True, allow_other_weights=widened,
                              observe=observe if points else None)
    names = [i.name for i in proto.graph.input]
    sessions, optimized_error = _sessions(path, ort, ReferenceEvaluator)
    forced, extra = _forced_sessions(proto, points, ort, ReferenceEvaluator)
    levels = {k: Levels(points, plan, MATCH_RTOL) for k in forced}
    forced_sums = {k: _Sums() for k in forced}
    source = data_source(model, data, max_samples)
    targets = None if (source.single or metric is None) else iter(target)
    sums = {k: _Sums() for k in sessions}
    effect = _Sums()  # apply_plan against the float model
    metrics = {k: 0.0 for k in ("planned", *sessions)}
    weight = n = 0
    for batch in source:
        feed = _feed(batch, names, widened)
        args, kwargs = _call(batch, widened)
        observed.clear()
        with torch.no_grad():
            want = planned.eval()(*args, **kwargs)
        flat = list(iter_tensors(want))
        ref = run_with_hooks(net if widened else model, _batch_of(args, kwargs), {}, pre=False)
        effect.add(float_parts(want, "planned", output), float_parts(ref, "float", output))
        outs = {k: _run(k, run, feed, batch_size(batch)) for k, run in sessions.items()}
        k_n = batch_size(batch)
        n += k_n
        t = None
        if metric is not None:
            t = target if targets is None else cut_target(next(targets, None), k_n)
            w = 1 if source.single else k_n
            metrics["planned"] += w * call_metric(metric, want, t)
            weight += w
        for k, got in outs.items():
            if len(got) != len(flat):
                raise ValueError(f"the file has {len(got)} outputs, the model's output holds {len(flat)} "
                                 "tensors; was the file exported from this model?")
            rebuilt = refill(want, [torch.as_tensor(g) for g in got])
            sums[k].add(float_parts(rebuilt, "file", output), float_parts(want, "planned", output))
            if metric is not None:
                metrics[k] += w * call_metric(metric, rebuilt, t)
        forced_feed = levels["reference"].feed(observed, feed) if forced else None
        if forced and forced_feed is None:  # apply_plan quantized other values than the file marks
            forced, levels = {}, {}
        for k, run in forced.items():
            got = _run(k, run, forced_feed, batch_size(batch))
            rebuilt = refill(want, [torch.as_tensor(g) for g in got[:len(flat)]])
            forced_sums[k].add(float_parts(rebuilt, "file", output), float_parts(want, "planned", output))
            levels[k].add(observed, {**feed, **dict(zip(extra, got[len(flat):], strict=True))})
    note = ""
    if widened:
        kinds = sorted({str(p.dtype).replace("torch.", "") for p in model.parameters() if p.is_floating_point()})
        note = (f"the model computes in {', '.join(kinds)}; the file computes in float32 and was compared "
                "with the plan applied to a float32 copy of the model")
    m = {k: (None if metric is None else v / weight) for k, v in metrics.items()}
    opt = sums.get("optimized")
    return OnnxCheck(path, n, sums["reference"].relative(), sums["runtime"].relative(),
                     math.nan if opt is None else opt.relative(), sums["reference"].max_abs,
                     sums["runtime"].max_abs, math.nan if opt is None else opt.max_abs,
                     metric_planned=m["planned"], metric_runtime=m["runtime"],
                     metric_optimized=m.get("optimized"), note=note, optimized_error=optimized_error,
                     plan_diff=effect.relative(),
                     **{f"{k}_levels": lv.report(forced_sums[k].relative()) for k, lv in levels.items()})


def _sessions(path: str, ort, reference_evaluator) -> tuple[dict, str | None]:
    plain = ort.SessionOptions()
    plain.graph_optimization_level = ort.GraphOptimizationLevel.ORT_DISABLE_ALL
    cpu = ["CPUExecutionProvider"]
    runtime = ort.InferenceSession(path, plain, providers=cpu)
    ref = reference_evaluator(path)
    out = {"reference": lambda feed: ref.run(None, feed), "runtime": lambda feed: runtime.run(None, feed)}
    try:
        optimized = ort.InferenceSession(path, ort.SessionOptions(), providers=cpu)
    except Exception as e:  # the optimizer's rewrite refused by the runtime itself
        return out, f"{type(e).__name__}: {e}"
    out["optimized"] = lambda feed: optimized.run(None, feed)
    return out, None


_RUNS = {"reference": "the ONNX reference evaluator", "runtime": "ONNX Runtime (optimizations off)",
         "optimized": "ONNX Runtime's default session"}


def _run(kind: str, run, feed: dict, n: int) -> list:
    try:
        return [np.asarray(v) for v in run(feed)]
    except Exception as e:  # the runtimes raise their own types; say what usually causes it
        raise ValueError(
            f"the file could not run a batch of {n} samples in {_RUNS[kind]} ({type(e).__name__}: "
            f"{str(e)[:300]}). If it runs the batch size of export_onnx's example_inputs only, the "
            "model's forward fixed that size in the trace (a Python int such as len(x) or "
            "int(x.shape[0]) becomes a constant): write x.shape[0] / x.size(0) in the forward, or "
            "export with example_inputs of the batch size you will run") from e


def _forced_sessions(proto, points, ort, reference_evaluator) -> tuple[dict, list[str]]:
    """The file fed apply_plan's quantized activations (:func:`.onnx_levels.forced_model`), in
    the reference evaluator and ONNX Runtime without optimizations, and the names of its extra
    outputs (the values before quantization)."""
    if not points:
        return {}, []
    import onnx

    data = forced_model(proto, points)
    extra = [o.name for o in onnx.load_from_string(data).graph.output][len(proto.graph.output):]
    plain = ort.SessionOptions()
    plain.graph_optimization_level = ort.GraphOptimizationLevel.ORT_DISABLE_ALL
    runtime = ort.InferenceSession(data, plain, providers=["CPUExecutionProvider"])
    ref = reference_evaluator(onnx.load_from_string(data))
    return ({"reference": lambda feed: ref.run(None, feed),
             "runtime": lambda feed: runtime.run(None, feed)}, extra)


def _call(batch, widened: bool):
    """``(args, kwargs)`` of the planned copy's call (float32 tensors for a widened model)."""
    def f(v):
        return v.float() if widened and isinstance(v, torch.Tensor) and v.is_floating_point() else v
    if isinstance(batch, dict):
        return (), {k: f(v) for k, v in batch.items()}
    items = batch if isinstance(batch, tuple) else (batch,)
    return tuple(f(v) for v in items), {}


def _batch_of(args: tuple, kwargs: dict):
    return kwargs if kwargs else args[0] if len(args) == 1 else tuple(args)


def _feed(batch, names: list[str], widened: bool) -> dict:
    args, kwargs = _call(batch, widened)
    want, tensors, _ = graph_inputs(kwargs if isinstance(batch, dict) else args)
    if not isinstance(batch, dict) and len(tensors) == len(names):
        want = names  # positional inputs feed the graph's inputs in order, whatever their names
    if want != names:
        raise ValueError(f"the file's graph inputs are {names}, but the data's batches give {want}; "
                         "give batches shaped like export_onnx's example_inputs")
    return {n: t.detach().cpu().numpy() for n, t in zip(want, tensors, strict=True)}
