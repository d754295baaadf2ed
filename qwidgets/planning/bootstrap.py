"""A paired percentile bootstrap for the change of a metric between two models on the same samples.

Samples are resampled with replacement (the same resampled indices for both models) and the
metric is recomputed on each resample; the interval is the percentiles of the resampled
differences (the percentile interval of Efron & Tibshirani, *An Introduction to the
Bootstrap*, 1993). Indexing convention: axis 0 of every tensor / array in the outputs and of
the target is the sample axis; nested tuples, lists and dicts are indexed leaf by leaf.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Mapping
from numbers import Integral, Real

import numpy as np
import torch

from ..model.outputs import call_metric


def take(obj, idx: np.ndarray):
    """``obj`` restricted to samples ``idx`` along axis 0 (tensors, arrays, nested containers)."""
    if isinstance(obj, torch.Tensor):
        return obj[torch.as_tensor(idx, dtype=torch.long, device=obj.device)]
    if isinstance(obj, np.ndarray):
        return obj[idx]
    if isinstance(obj, Mapping):
        return {k: take(v, idx) for k, v in obj.items()}
    if _is_dataclass(obj):
        return dataclasses.replace(obj, **{f.name: take(getattr(obj, f.name), idx) for f in _fields(obj)})
    if isinstance(obj, tuple) and hasattr(obj, "_fields"):
        return type(obj)(*(take(v, idx) for v in obj))
    if isinstance(obj, (list, tuple)):
        if obj and all(isinstance(v, (torch.Tensor, np.ndarray, Mapping, list, tuple)) for v in obj):
            return type(obj)(take(v, idx) for v in obj)
        return type(obj)(obj[int(i)] for i in idx)  # a plain list of per-sample values
    return obj  # no sample axis (None, a scalar): the same for every resample


def concat(parts: list):
    """Per-batch outputs (or targets) joined along axis 0, leaf by leaf."""
    first = parts[0]
    if isinstance(first, torch.Tensor):
        return torch.cat(parts, dim=0)
    if isinstance(first, np.ndarray):
        return np.concatenate(parts, axis=0)
    if isinstance(first, Mapping):
        return {k: concat([p[k] for p in parts]) for k in first}
    if _is_dataclass(first):
        return dataclasses.replace(first, **{f.name: concat([getattr(p, f.name) for p in parts])
                                             for f in _fields(first)})
    if isinstance(first, tuple) and hasattr(first, "_fields"):
        return type(first)(*(concat([p[i] for p in parts]) for i in range(len(first))))
    if isinstance(first, (list, tuple)):
        if first and all(isinstance(v, (torch.Tensor, np.ndarray, Mapping, list, tuple)) for v in first):
            return type(first)(concat([p[i] for p in parts]) for i in range(len(first)))
        return type(first)(v for p in parts for v in p)
    return first


def n_samples(obj) -> int:
    """Length of the sample axis (axis 0 of the first tensor / array found)."""
    if isinstance(obj, (torch.Tensor, np.ndarray)):
        if obj.ndim == 0:
            raise ValueError("the output has no sample axis (a 0-d tensor); the bootstrap "
                             "resamples axis 0 of the outputs")
        return int(obj.shape[0])
    if isinstance(obj, Mapping):
        obj = list(obj.values())
    if _is_dataclass(obj):  # the first field that holds a tensor or an array
        obj = [v for v in (getattr(obj, f.name) for f in dataclasses.fields(obj))
               if isinstance(v, (torch.Tensor, np.ndarray, Mapping, list, tuple)) or _is_dataclass(v)]
    if isinstance(obj, (list, tuple)) and obj:
        if isinstance(obj[0], (torch.Tensor, np.ndarray, Mapping, list, tuple)) or _is_dataclass(obj[0]):
            return n_samples(obj[0])
        return len(obj)
    raise ValueError(f"cannot find a sample axis in an output of type {type(obj).__name__}")


def _is_dataclass(obj) -> bool:
    return dataclasses.is_dataclass(obj) and not isinstance(obj, type)


def _fields(obj):
    """The fields a dataclass instance is rebuilt from (``init`` fields)."""
    return [f for f in dataclasses.fields(obj) if f.init]


def check_confidence(confidence, n_boot) -> None:
    if isinstance(confidence, bool) or not isinstance(confidence, Real) or not 0 < confidence < 1:
        raise ValueError(f"confidence must be a number in (0, 1), e.g. 0.95, got {confidence!r}")
    if isinstance(n_boot, bool) or not isinstance(n_boot, Integral) or n_boot < 10:
        raise ValueError(f"n_boot must be an int >= 10, got {n_boot!r}")


def paired_drop_interval(metric: Callable, out_a, out_b, target, *, confidence: float = 0.95,
                         n_boot: int = 1000, seed: int = 0) -> tuple[float, float]:
    """Percentile interval of ``metric(out_a) - metric(out_b)`` over samples (paired bootstrap).

    >>> import torch
    >>> a = torch.tensor([1.0, 1, 1, 0, 1, 1, 1, 1, 0, 1] * 20)   # per-sample "correct"
    >>> b = a.clone(); b[:20] = 0                                  # the second model misses 20
    >>> lo, hi = paired_drop_interval(lambda o, t: float(o.mean()), a, b, None, seed=1)
    >>> 0.0 < lo < 20 / 200 < hi < 0.25
    True
    """
    check_confidence(confidence, n_boot)
    n = n_samples(out_a)
    if n_samples(out_b) != n:
        raise ValueError(f"the two outputs hold {n} and {n_samples(out_b)} samples; they must match")
    rng = np.random.default_rng(seed)
    diffs = np.empty(n_boot)
    for k in range(n_boot):
        idx = rng.integers(0, n, n)
        t = take(target, idx)
        diffs[k] = (call_metric(metric, take(out_a, idx), t, "on a bootstrap resample")
                    - call_metric(metric, take(out_b, idx), t, "on a bootstrap resample"))
    diffs = diffs[np.isfinite(diffs)]
    if diffs.size == 0:
        return math.nan, math.nan
    alpha = (1 - confidence) / 2
    return float(np.quantile(diffs, alpha)), float(np.quantile(diffs, 1 - alpha))
