"""Checking a plan end to end on data: measured versus predicted, float versus planned."""

from __future__ import annotations

import warnings
from collections.abc import Callable
from dataclasses import dataclass

from torch import nn

from ..core.metrics import ErrorStats
from ..model.outputs import OutputComparison, call_metric, check_output_fn, float_parts
from ..model.running import run_with_hooks
from ..model.sources import batch_size, data_source
from .apply import apply_plan
from .plan import CAUTION, Plan


@dataclass(frozen=True)
class PlanReport:
    """A plan checked end to end on data: measured versus predicted, float versus planned.

    ``output``: :class:`ErrorStats` of the planned model's output against the float model's;
    ``measured_sqnr_db`` is its SQNR; ``metric_float`` / ``metric_planned``: the user's
    metric on each (None without one); ``skipped``: planned layers not applied (strict=False).
    """

    measured_sqnr_db: float
    predicted_sqnr_db: float | None
    output: ErrorStats
    metric_float: float | None
    metric_planned: float | None
    weight_kib: float
    float_weight_kib: float
    mean_weight_bits: float
    bops: int
    float_bops: int
    skipped: tuple = ()
    caution: str = CAUTION
    model_kib: float | None = None

    @property
    def metric_change(self) -> float | None:
        if self.metric_float is None or self.metric_planned is None:
            return None
        return self.metric_planned - self.metric_float

    def to_dict(self) -> dict:
        d = {k: getattr(self, k) for k in self.__dataclass_fields__}
        d["output"] = self.output.to_dict()
        return d

    def __str__(self) -> str:
        pred = "-" if self.predicted_sqnr_db is None else f"{self.predicted_sqnr_db:.2f} dB"
        lines = [
            f"model-output SQNR: measured {self.measured_sqnr_db:.2f} dB, predicted {pred}",
            f"weights: {self.weight_kib:.2f} KiB (float32: {self.float_weight_kib:.2f} KiB), "
            f"{self.mean_weight_bits:.2f} mean bits"
            + ("" if self.model_kib is None else f"; whole model {self.model_kib:.2f} KiB"),
            f"BOPs per sample: {self.bops:,} (float32: {self.float_bops:,})",
        ]
        if self.metric_float is not None:
            lines.append(f"metric: float {self.metric_float:.6g}, planned {self.metric_planned:.6g}")
        if self.skipped:
            lines.append(f"skipped layers: {', '.join(self.skipped)}")
        lines.append(self.caution)
        return "\n".join(lines)


def evaluate_plan(model: nn.Module, data, plan: Plan, *, metric: Callable | None = None,
                  target=None, strict: bool = True, output: Callable | None = None,
                  max_samples: int | None = None, allow_other_weights: bool = False) -> PlanReport:
    """Run the float model and :func:`apply_plan`'s model on ``data`` and compare.

    ``data``: one batch (tensor, tuple / list of args, dict of kwargs, numpy array) or a
    ``DataLoader`` / iterable of batches, streamed (float64 sums per batch); ``max_samples``
    caps the samples read. ``output``: a function from the model's output to what is compared
    (default: every floating-point tensor of the output). ``metric(output, target) -> float``
    (for example accuracy) is computed for both when given; with many batches ``target`` is an
    iterable of per-batch targets and the metric is averaged, weighted by batch size.
    ``strict`` and ``allow_other_weights`` as in :func:`apply_plan`. ``model`` is untouched.

    >>> import torch
    >>> from torch import nn
    >>> from qwidgets import LayerSetting, Plan, UniformGrid
    >>> from qwidgets.planning.plan import model_fingerprint
    >>> _ = torch.manual_seed(0)
    >>> lin = nn.Linear(8, 4)
    >>> p = Plan({"": LayerSetting(weight=UniformGrid(8, float(lin.weight.detach().abs().max()) / 127))},
    ...          {"": 8}, fingerprint=model_fingerprint(lin), weight_shapes={"": (4, 8)}, macs={"": 32})
    >>> evaluate_plan(lin, torch.randn(16, 8), p).measured_sqnr_db > 35
    True
    """

    if metric is not None and not callable(metric):
        raise TypeError(f"metric must be a callable metric(output, target) -> float, got {type(metric).__name__}")
    output = check_output_fn(output)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the skipped layers are reported in the result
        planned = apply_plan(model, plan, strict=strict, allow_other_weights=allow_other_weights)
    source = data_source(model, data, max_samples)
    targets = None if (source.single or metric is None) else iter(_per_batch_targets(target))
    sums = OutputComparison()
    mf = mp = 0.0
    weight = 0
    for batch in source:
        ref = run_with_hooks(model, batch, {}, pre=False)
        out = run_with_hooks(planned, batch, {}, pre=False)
        sums.add(float_parts(ref, "float", output), float_parts(out, "planned", output))
        if metric is not None:
            t = target if targets is None else next(targets, None)
            w = 1 if source.single else batch_size(batch)
            mf += w * call_metric(metric, ref, t)
            mp += w * call_metric(metric, out, t)
            weight += w
    sums.check_varies()
    stats = sums.stats()
    mf, mp = (None, None) if metric is None else (mf / weight, mp / weight)
    applied = set(planned.qwidgets_applied)
    sub = Plan({n: plan.layers[n] for n in plan.layers if n in applied},
               {n: plan.bits[n] for n in plan.layers if n in applied}, fingerprint=plan.fingerprint,
               weight_shapes=plan.weight_shapes, macs=plan.macs,
               assumed_input_bits=plan.assumed_input_bits)
    return PlanReport(
        measured_sqnr_db=stats.sqnr_db,
        predicted_sqnr_db=plan.predicted_sqnr_db,
        output=stats,
        metric_float=mf,
        metric_planned=mp,
        weight_kib=sub.weight_kib,
        float_weight_kib=sub.float_weight_kib,
        mean_weight_bits=sub.mean_weight_bits,
        bops=sub.bops,
        float_bops=sub.float_bops,
        skipped=tuple(planned.qwidgets_skipped),
        model_kib=plan.model_kib,
    )


def _per_batch_targets(target):
    from collections.abc import Iterable

    import torch

    if not isinstance(target, Iterable) or isinstance(target, torch.Tensor):
        raise TypeError("with data given as many batches, target must be an iterable of per-batch "
                        f"targets (e.g. the labels of each batch), got {type(target).__name__}")
    return target
