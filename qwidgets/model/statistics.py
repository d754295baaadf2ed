"""Statistics of a tensor seen batch by batch: exact range and a bounded sample for range fits."""

from __future__ import annotations

import torch

from ..core.grid import UniformGrid
from ..core.ranges import fit_ranges_unchecked

SAMPLE_LIMIT = 1 << 22  # values kept per tensor for percentile / MSE range fits (16 MiB float32)


class RangeSample:
    """Running minimum and maximum of every value seen, and a bounded sample of the values.

    The sample keeps every value while fewer than ``limit`` have been seen (so one batch, or
    the concatenation of small batches, fits exactly as a single tensor would); beyond that it
    keeps every k-th value of each batch, k doubling as needed, plus the exact extremes. A
    min-max fit is exact whatever the number of batches; percentile and MSE fits use the sample.

    >>> import torch
    >>> r = RangeSample()
    >>> r.add(torch.tensor([1.0, -2.0])); r.add(torch.tensor([5.0]))
    >>> r.lo, r.hi, r.values().tolist()
    (-2.0, 5.0, [1.0, -2.0, 5.0])
    """

    def __init__(self, limit: int = SAMPLE_LIMIT):
        self.limit = int(limit)
        self.lo, self.hi = float("inf"), float("-inf")
        self.count = 0
        self._parts: list[torch.Tensor] = []
        self._kept = 0
        self._stride = 1

    def add(self, x: torch.Tensor) -> None:
        v = x.detach().reshape(-1)
        if v.numel() == 0:
            return
        self.lo = min(self.lo, float(v.min()))
        self.hi = max(self.hi, float(v.max()))
        self.count += v.numel()
        part = v[:: self._stride].clone()
        self._parts.append(part)
        self._kept += part.numel()
        while self._kept > self.limit:
            self._stride *= 2
            self._parts = [p[::2].clone() for p in self._parts]
            self._kept = sum(p.numel() for p in self._parts)

    def values(self) -> torch.Tensor:
        """The sample (every value seen when under the limit, else a strided subset plus extremes)."""
        v = self._parts[0] if len(self._parts) == 1 else torch.cat(self._parts)
        if self._stride > 1:
            v = torch.cat([v, v.new_tensor([self.lo, self.hi])])
        return v

    def fit(self, bits: int, method: str, **options) -> UniformGrid:
        """A per-tensor grid fitted with :func:`qwidgets.fit_range` to what was seen (the values
        given to :meth:`add` were checked finite where they were seen: not scanned again)."""
        if method == "minmax":
            x = self.values().new_tensor([self.lo, self.hi])
        else:
            x = self.values()
        return fit_ranges_unchecked(x, (bits,), method, **options)[0]
