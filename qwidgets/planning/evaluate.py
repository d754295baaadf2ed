"""Checking a plan end to end on data: measured versus predicted, float versus planned."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from torch import nn

from ..core.metrics import ErrorStats
from ..core.renamed import warn_renamed
from ..model.outputs import OutputComparison, call_metric, check_output_fn, float_parts
from ..model.picking import cut_target, split_data
from ..model.running import run_with_hooks
from ..model.sources import Data, batch_size, batch_tensors, data_source
from .apply import planned_copy
from .bootstrap import check_confidence, concat, paired_drop_interval
from .plan import CAUTION, Plan


@dataclass(frozen=True)
class PlanReport:
    """A plan checked end to end on data: measured versus predicted, float versus planned.

    ``output``: :class:`ErrorStats` of the planned model's output against the float model's;
    ``measured_sqnr_db`` is its SQNR; ``metric_float`` / ``metric_planned``: the user's
    metric on each (None without one); ``skipped``: planned layers not applied (strict=False);
    ``drop_low`` / ``drop_high``: the paired bootstrap interval of :attr:`drop` at
    ``confidence`` (when asked for). ``planned_kib``, ``mean_bits``, ``bops`` (and their float32
    figures) are the applied entries' :class:`Plan` figures of those names; ``model_kib`` the
    plan's whole-model storage; ``pinned``: the entries whose width ``fixed=`` pinned
    (``"name (8 bits)"``; a pinned width may lie outside ``allowed_bits``).
    """

    measured_sqnr_db: float
    predicted_sqnr_db: float | None
    output: ErrorStats
    metric_float: float | None
    metric_planned: float | None
    planned_kib: float
    float_planned_kib: float
    mean_bits: float
    bops: int
    float_bops: int
    skipped: tuple = ()
    caution: str = CAUTION
    model_kib: float | None = None
    drop_low: float | None = None
    drop_high: float | None = None
    confidence: float | None = None
    pinned: tuple = ()

    @property
    def drop(self) -> float | None:
        """``metric_float - metric_planned`` (None without a metric)."""
        if self.metric_float is None or self.metric_planned is None:
            return None
        return self.metric_float - self.metric_planned

    # the previous release's names (one release, each warns once)
    @property
    def metric_change(self) -> float | None:
        """Deprecated: ``-drop`` (``metric_planned - metric_float``); use :attr:`drop`."""
        warn_renamed("metric_change", "drop (= metric_float - metric_planned, the opposite sign)",
                     "PlanReport")
        d = self.drop
        return None if d is None else -d

    @property
    def weight_kib(self) -> float:
        """Deprecated: :attr:`planned_kib`."""
        warn_renamed("weight_kib", "planned_kib (or model_kib for the whole model)", "PlanReport")
        return self.planned_kib

    @property
    def float_weight_kib(self) -> float:
        """Deprecated: :attr:`float_planned_kib`."""
        warn_renamed("float_weight_kib", "float_planned_kib", "PlanReport")
        return self.float_planned_kib

    @property
    def mean_weight_bits(self) -> float:
        """Deprecated: :attr:`mean_bits`."""
        warn_renamed("mean_weight_bits", "mean_bits", "PlanReport")
        return self.mean_bits

    def to_dict(self) -> dict:
        d = {k: getattr(self, k) for k in self.__dataclass_fields__}
        d["output"] = self.output.to_dict()
        return d

    def __str__(self) -> str:
        pred = "-" if self.predicted_sqnr_db is None else f"{self.predicted_sqnr_db:.2f} dB"
        lines = [
            f"model-output SQNR: measured {self.measured_sqnr_db:.2f} dB, predicted {pred}",
            f"planned_kib {self.planned_kib:.2f} (float32: {self.float_planned_kib:.2f}), "
            f"mean_bits {self.mean_bits:.2f}"
            + ("" if self.model_kib is None else f"; model_kib {self.model_kib:.2f} (the whole model)"),
            f"BOPs per sample: {self.bops:,} (float32: {self.float_bops:,})",
        ]
        if self.metric_float is not None:
            lines.append(f"metric: float {self.metric_float:.6g}, planned {self.metric_planned:.6g}, "
                         f"drop {self.drop:.4g} (float - planned)")
        if self.drop_low is not None:
            lines.append(f"drop {self.confidence:.0%} interval "
                         f"[{self.drop_low:.4g}, {self.drop_high:.4g}] (paired bootstrap over samples)")
        if self.skipped:
            lines.append(f"skipped layers: {', '.join(self.skipped)}")
        if self.pinned:
            lines.append(f"pinned by fixed= (not chosen by the budget): {', '.join(self.pinned)}")
        lines.append(self.caution)
        return "\n".join(lines)


def evaluate_plan(model: nn.Module, data: Data, plan: Plan, *, metric: Callable | None = None,
                  target: Any = None, strict: bool = True, output: Callable | None = None,
                  max_samples: int | None = None, allow_other_weights: bool = False,
                  confidence: float | None = None, n_boot: int = 1000, seed: int = 0,
                  inputs: int | str | Callable | None = None) -> PlanReport:
    """Run the float model and :func:`apply_plan`'s model on ``data`` and compare.

    ``data``: one batch (tensor, tuple / list of args, dict of kwargs, numpy array) or a
    ``DataLoader`` / iterable of batches, streamed (float64 sums per batch); ``max_samples``
    caps the samples read. ``output``: a function from the model's output to what is compared
    (default: every floating-point tensor of the output). ``metric(output, target) -> float``
    (for example accuracy) is computed for both when given; with many batches ``target`` is an
    iterable of per-batch targets and the metric is averaged, weighted by batch size.
    ``inputs``: an index, a key or a function picking the model's inputs from each batch
    (``inputs=0`` for a loader of ``(x, y)`` pairs); ``target`` may then be an index, a key or a
    function picking each batch's target (``target=1``). ``strict`` and ``allow_other_weights`` as in :func:`apply_plan`. ``model`` is untouched.

    ``confidence`` (e.g. 0.95, with a metric): the report's ``drop_low`` / ``drop_high`` give a
    paired percentile bootstrap interval of the drop ``metric_float - metric_planned``
    (Efron & Tibshirani 1993): ``n_boot`` times, the samples are drawn with replacement, the
    same indices for both models, and the metric is recomputed on both models' outputs of
    those samples, ``metric(output[idx], target[idx])`` (axis 0 of every output tensor and of
    the target is the sample axis; many batches are joined along it). The interval reflects
    the sampling of the data only: measure it on held-out data, not the calibration data.

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
    data, target = split_data(data, inputs, target, uses_target=metric is not None)
    checked: set = set()  # each batch's tensors, checked by the data source
    # the skipped layers are reported in the result, not warned about
    planned, _ = planned_copy(model, plan, strict=strict, allow_other_weights=allow_other_weights,
                              checked=checked)
    source = data_source(model, data, max_samples)
    targets = None if (source.single or metric is None) else iter(_per_batch_targets(target))
    if confidence is not None:
        if metric is None:
            raise ValueError("confidence needs a metric: the interval is of the metric's drop")
        check_confidence(confidence, n_boot)
    kept: list = []  # (float output, planned output, target) per batch, for the bootstrap
    sums = OutputComparison()
    mf = mp = 0.0
    weight = 0
    for batch in source:
        checked.clear()
        checked.update(id(t) for _, t in batch_tensors(batch))
        ref = run_with_hooks(model, batch, {}, pre=False)
        out = run_with_hooks(planned, batch, {}, pre=False)
        sums.add(float_parts(ref, "float", output), float_parts(out, "planned", output))
        if metric is not None:
            t = target if targets is None else cut_target(next(targets, None), batch_size(batch))
            w = 1 if source.single else batch_size(batch)
            mf += w * call_metric(metric, ref, t, f"on the float model (evaluating {plan!r})")
            mp += w * call_metric(metric, out, t, f"on the planned model of {plan!r}")
            weight += w
            if confidence is not None:
                kept.append((ref, out, t))
    sums.check_varies()
    low = high = None
    if confidence is not None:
        ref_all = concat([k[0] for k in kept]) if len(kept) > 1 else kept[0][0]
        out_all = concat([k[1] for k in kept]) if len(kept) > 1 else kept[0][1]
        tgt_all = concat([k[2] for k in kept]) if len(kept) > 1 else kept[0][2]
        low, high = paired_drop_interval(metric, ref_all, out_all, tgt_all, confidence=confidence,
                                         n_boot=n_boot, seed=seed)
    stats = sums.stats()
    mf, mp = (None, None) if metric is None else (mf / weight, mp / weight)
    applied = set(planned.qwidgets_applied)
    sub = Plan({n: plan.layers[n] for n in plan.layers if n in applied},
               {n: plan.bits[n] for n in plan.layers if n in applied}, fingerprint=plan.fingerprint,
               weight_shapes=plan.weight_shapes, macs=plan.macs,
               assumed_input_bits=plan.assumed_input_bits,
               entries={n: plan.entries[n] for n in plan.layers if n in applied and plan.entries})
    return PlanReport(
        measured_sqnr_db=stats.sqnr_db,
        predicted_sqnr_db=plan.predicted_sqnr_db,
        output=stats,
        metric_float=mf,
        metric_planned=mp,
        planned_kib=sub.planned_kib,
        float_planned_kib=sub.float_planned_kib,
        mean_bits=sub.mean_bits,
        bops=sub.bops,
        float_bops=sub.float_bops,
        skipped=tuple(planned.qwidgets_skipped),
        model_kib=plan.model_kib,
        drop_low=low,
        drop_high=high,
        confidence=None if confidence is None else float(confidence),
        pinned=tuple(f"{n} ({plan.bits[n]} bits)" for n in plan.layers if plan.entries[n].get("pinned")),
    )


def _per_batch_targets(target):
    from collections.abc import Iterable

    import torch

    if not isinstance(target, Iterable) or isinstance(target, torch.Tensor):
        raise TypeError("with data given as many batches, target must be an iterable of per-batch "
                        f"targets (e.g. the labels of each batch), got {type(target).__name__}")
    return target
