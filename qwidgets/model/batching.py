"""Cutting one batch given as a tensor (tuple, dict) into batches of ``batch_size`` samples."""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from numbers import Integral

import torch

from .sources import is_one_batch


class Batches:
    """Re-iterable slices of one batch along axis 0 (views: no copy of the data).

    >>> import torch
    >>> [tuple(b.shape) for b in Batches(torch.zeros(5, 2), 2)]
    [(2, 2), (2, 2), (1, 2)]
    """

    def __init__(self, data, batch_size: int):
        self.data, self.batch_size = data, batch_size
        self.views_of = data  # a data source checks the whole once, not each slice each pass
        tensors = [t for t in _tensors(data) if t.dim() >= 1]
        self.n = int(tensors[0].shape[0]) if tensors else 1

    def __iter__(self) -> Iterator:
        for i in range(0, self.n, self.batch_size):
            yield _slice(self.data, i, i + self.batch_size)


def cut_batches(data, batch_size: int | None):
    """``data`` itself (batch_size None, or data already an iterable of batches), else
    :class:`Batches` of it.

    >>> import torch
    >>> cut_batches(torch.zeros(3), None).shape
    torch.Size([3])
    """
    if batch_size is None:
        return data
    if isinstance(batch_size, bool) or not isinstance(batch_size, Integral):
        raise TypeError(f"batch_size must be None or an int >= 1, got {batch_size!r}")
    if batch_size < 1:
        raise ValueError(f"batch_size must be None or an int >= 1, got {batch_size!r}")
    if not is_one_batch(data):
        return data  # a DataLoader / iterable already gives its own batches
    if isinstance(data, list):
        data = tuple(data)
    return Batches(data, int(batch_size))


def take_rows(data, a: int, b: int):
    """Rows ``a:b`` along axis 0 of one batch (a tensor, tuple or dict of tensors; views).

    >>> import torch
    >>> take_rows((torch.arange(5), 7), 1, 3)
    (tensor([1, 2]), 7)
    """
    return _slice(data, a, b)


def _tensors(data):
    if isinstance(data, torch.Tensor):
        yield data
    elif isinstance(data, Mapping):
        yield from (v for v in data.values() if isinstance(v, torch.Tensor))
    elif isinstance(data, tuple):
        yield from (v for v in data if isinstance(v, torch.Tensor))


def _slice(data, a: int, b: int):
    def cut(v):
        return v[a:b] if isinstance(v, torch.Tensor) and v.dim() >= 1 else v
    if isinstance(data, torch.Tensor):
        return cut(data)
    if isinstance(data, Mapping):
        return {k: cut(v) for k, v in data.items()}
    return tuple(cut(v) for v in data)
