"""What is compared of a model's output, and the streamed comparison of two outputs.

Outputs may be tensors, tuples, lists, dicts, named tuples and dataclasses, nested: every
floating-point tensor in them is compared, flattened and joined in a fixed order. An
``output=`` function (model output -> what to compare) selects a part instead.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Mapping
from typing import Any

import torch

from ..core.metrics import ErrorStats, stats_from_sums


def check_output_fn(output) -> Callable | None:
    if output is not None and not callable(output):
        raise TypeError(f"output must be None or a function from the model's output to the tensor "
                        f"to compare, got {type(output).__name__}")
    return output


def iter_tensors(obj):
    """Every tensor in a nested output (tensors, sequences, mappings, dataclasses), in order.

    >>> import torch
    >>> from collections import namedtuple
    >>> P = namedtuple("P", "a b")
    >>> [tuple(t.shape) for t in iter_tensors({"x": P(torch.zeros(1), [torch.zeros(2, 2)])})]
    [(1,), (2, 2)]
    """
    if isinstance(obj, torch.Tensor):
        yield obj
    elif isinstance(obj, Mapping):
        for v in obj.values():
            yield from iter_tensors(v)
    elif isinstance(obj, (list, tuple)):
        for v in obj:
            yield from iter_tensors(v)
    elif dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        for f in dataclasses.fields(obj):
            yield from iter_tensors(getattr(obj, f.name))


def refill(obj, tensors: list):
    """``obj`` with its tensors replaced, in :func:`iter_tensors` order, by ``tensors``.

    >>> import torch
    >>> refill({"a": torch.zeros(1), "b": [torch.zeros(2)]}, [torch.ones(1), torch.ones(2)])["b"][0].tolist()
    [1.0, 1.0]
    """
    it = iter(tensors)

    def go(o):
        if isinstance(o, torch.Tensor):
            return next(it)
        if isinstance(o, Mapping):
            return {k: go(v) for k, v in o.items()}
        if isinstance(o, tuple) and hasattr(o, "_fields"):
            return type(o)(*(go(v) for v in o))
        if isinstance(o, (list, tuple)):
            return type(o)(go(v) for v in o)
        if dataclasses.is_dataclass(o) and not isinstance(o, type):
            return dataclasses.replace(o, **{f.name: go(getattr(o, f.name))
                                             for f in dataclasses.fields(o) if f.init})
        return o
    return go(obj)


def float_parts(out, which: str, output: Callable | None = None) -> list[torch.Tensor]:
    """The floating-point tensors of ``out`` (after ``output(out)`` when given), detached."""
    if output is not None:
        try:
            out = output(out)
        except Exception as e:
            raise ValueError(f"output(model output) failed on the {which} output: "
                             f"{type(e).__name__}: {e}") from e
    parts = [t.detach() for t in iter_tensors(out) if t.is_floating_point()]
    if not parts:
        hint = ("give output= a function that returns the floating-point tensor to compare"
                if output is None else "output= must return a floating-point tensor (or a "
                "structure holding some)")
        raise ValueError(f"the model's {which} output holds no floating-point tensor to compare "
                         f"(got {type(out).__name__}); {hint}")
    return parts


def flat_output(out, which: str, output: Callable | None = None) -> torch.Tensor:
    """Every floating-point tensor of ``out`` flattened and joined, in float64."""
    parts = [t.reshape(-1).double() for t in float_parts(out, which, output)]
    return parts[0] if len(parts) == 1 else torch.cat(parts)


_BLOCK = 1 << 22  # values compared in float64 at a time (outputs up to this size: one block)


class OutputComparison:
    """Streamed comparison of a reference output with another, batch by batch (float64 sums).

    >>> import torch
    >>> c = OutputComparison()
    >>> c.add([torch.tensor([1.0, -1.0])], [torch.tensor([1.0, -0.9])])
    >>> round(c.stats().sqnr_db, 2)
    23.01
    """

    def __init__(self):
        self.sig = self.err = self.app = self.cross = self.max_abs = 0.0
        self.n = 0
        self.lo, self.hi = math.inf, -math.inf

    def add_reference(self, ref_parts) -> None:
        """Count the reference's power and range (for outputs compared elsewhere, e.g. stacked)."""
        for r in ref_parts:
            r = r.reshape(-1)
            self.sig += float(torch.linalg.vector_norm(r, dtype=torch.float64)) ** 2
            self.lo = min(self.lo, float(r.min()))
            self.hi = max(self.hi, float(r.max()))
            self.n += r.numel()

    def add(self, ref_parts, out_parts) -> None:
        if len(ref_parts) != len(out_parts):
            raise ValueError(f"the quantized output holds {len(out_parts)} floating-point tensors, "
                             f"the float output {len(ref_parts)}")
        for r, a in zip(ref_parts, out_parts, strict=True):
            if r.shape != a.shape:
                raise ValueError(f"output shapes differ: float {tuple(r.shape)}, quantized {tuple(a.shape)}")
            # float64 copies of a block of values at a time: a language model's logits (8 x 128
            # x 50257) would otherwise take 1.6 GB of float64 temporaries
            r, a = r.reshape(-1), a.reshape(-1)
            for i in range(0, max(1, r.numel()), _BLOCK):
                rb = r[i:i + _BLOCK].double()
                ab = a[i:i + _BLOCK].to(device=r.device, dtype=torch.float64)
                e = ab - rb
                self.sig += float(rb.dot(rb))
                self.err += float(e.dot(e))
                self.app += float(ab.dot(ab))
                self.cross += float(rb.dot(ab))
                self.max_abs = max(self.max_abs, float(e.abs().max()))
            self.lo = min(self.lo, float(r.min()))
            self.hi = max(self.hi, float(r.max()))
            self.n += r.numel()

    def check_varies(self, what: str = "the model's float output") -> None:
        """Refuse a reference that is constant (all zeros included): no SQNR can be measured."""
        check_varies(self.lo, self.hi, self.n, what)

    def stats(self) -> ErrorStats:
        return stats_from_sums(self.sig, self.err, self.app, self.cross, self.max_abs, self.n)


def check_varies(lo: float, hi: float, n: int, what: str = "the model's float output") -> None:
    if n and lo == hi:
        kind = "all zeros" if lo == 0 else f"constant (every value {lo:g})"
        raise ValueError(
            f"{what} is {kind} on this data, so quantization noise cannot be measured against "
            "it (the SQNR would be infinite or meaningless). Check the model (a head initialised "
            "to zero? an untrained model?), give data on which the output varies, or pass "
            "output= a function selecting a floating-point tensor that varies (e.g. the "
            "logits or hidden states)")


def call_metric(metric, output, target, where: str = "") -> float:
    """``metric(output, target)`` as a finite float; ``where`` (e.g. "on the planned model of
    Plan(...)") completes the error that names a metric returning NaN / inf."""
    import math
    from numbers import Real

    value = metric(output, target)
    if isinstance(value, torch.Tensor) and value.numel() == 1:
        value = value.item()
    if isinstance(value, bool) or not isinstance(value, Real):
        raise TypeError(f"metric(output, target) must return a float, got {type(value).__name__}")
    if not math.isfinite(value):
        raise ValueError(f"metric {metric_name(metric)} returned {float(value)}{' ' + where if where else ''}; "
                         "a metric must return a finite number (an empty class in a ratio? a log of 0?)")
    return float(value)


def metric_name(metric) -> str:
    """A metric's name for messages: its name, else its class's."""
    name = getattr(metric, "__name__", None) or getattr(getattr(metric, "func", None), "__name__", None)
    return repr(name or type(metric).__name__)


Output = Any
