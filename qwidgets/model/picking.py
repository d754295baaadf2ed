"""Picking the model's inputs and the targets out of each batch (``inputs=``, ``target=``).

A ``DataLoader(TensorDataset(x, y))`` yields ``[x_batch, y_batch]``; the model takes only
``x``. Every public function that takes data takes ``inputs=``: an index (a tuple / list
batch), a key (a dict batch) or a function ``batch -> model inputs``; ``target=`` (where a
target is used) takes, besides a tensor (one batch) or an iterable of per-batch targets, an
index, a key or a function applied to each batch. Both are read from the same batch as it
comes, so a shuffling loader stays paired.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Callable, Iterator, Mapping

import torch

from .sources import is_one_batch

__all__ = ["split_data", "check_picker", "pick", "join_batches"]


def check_picker(value, name: str):
    """None, an int index, a str key or a callable; anything else is refused by name."""
    if value is None or callable(value) or isinstance(value, str):
        return value
    if isinstance(value, int) and not isinstance(value, bool):
        return value
    raise TypeError(f"{name} must be None, an int index, a str key or a function batch -> value, "
                    f"got {type(value).__name__}")


def _is_picker(value) -> bool:
    return (isinstance(value, (int, str)) and not isinstance(value, bool)) or (
        callable(value) and not isinstance(value, torch.Tensor))


def pick(batch, picker, name: str):
    """``batch[picker]`` (index / key) or ``picker(batch)``, with an error naming ``name``."""
    if callable(picker):
        try:
            return picker(batch)
        except Exception as e:
            raise ValueError(f"{name}(batch) failed: {type(e).__name__}: {e}") from e
    if isinstance(picker, str):
        if not isinstance(batch, Mapping) or picker not in batch:
            keys = list(batch) if isinstance(batch, Mapping) else None
            raise ValueError(f"{name}={picker!r} names a key, but the batch is a {type(batch).__name__}"
                             + (f" with keys {keys}" if keys is not None else ""))
        return batch[picker]
    if not isinstance(batch, (tuple, list)) or not -len(batch) <= picker < len(batch):
        size = f" of {len(batch)} items" if isinstance(batch, (tuple, list)) else ""
        raise ValueError(f"{name}={picker} is an index, but the batch is a {type(batch).__name__}{size}")
    return batch[picker]


class _Split:
    """The batches' model inputs as a re-iterable source; their targets queued alongside."""

    def __init__(self, data, inputs, target):
        self.data, self.inputs, self.target = data, inputs, target
        self.queue: deque = deque()

    def __iter__(self):
        for raw in self.data:
            if self.target is not None:
                self.queue.append(pick(raw, self.target, "target"))
            yield raw if self.inputs is None else pick(raw, self.inputs, "inputs")


class _Targets:
    """The targets of the batches :class:`_Split` handed out, in the same order."""

    def __init__(self, split: _Split):
        self.split = split

    def __iter__(self):
        while True:
            if not self.split.queue:
                return
            yield self.split.queue.popleft()


def split_data(data, inputs: int | str | Callable | None = None, target=None, *, uses_target: bool = True) -> tuple:
    """``(data, target)`` as the functions below the public ones take them.

    One batch: the picked inputs and target at once. Many batches: a re-iterable source of
    the picked inputs and, for a picked target, an iterable giving each batch's target as the
    batch is read.

    >>> import torch
    >>> x, y = torch.zeros(4, 3), torch.arange(4)
    >>> d, t = split_data((x, y), inputs=0, target=1)
    >>> d is x, t is y
    (True, True)
    >>> d, t = split_data(iter([(x, y), (x[:2], y[:2])]), inputs=0, target=1)
    >>> [(tuple(b.shape), tuple(next(iter(t)).shape)) for b in d]
    [((4, 3), (4,)), ((2, 3), (2,))]
    """
    inputs = check_picker(inputs, "inputs")
    picked_target = uses_target and _is_picker(target)
    if is_one_batch(data):
        batch = data if inputs is None else pick(data, inputs, "inputs")
        return batch, (pick(data, target, "target") if picked_target else target)
    if inputs is None and not picked_target:
        return data, target
    split = _Split(data, inputs, target if picked_target else None)
    source = iter(split) if isinstance(data, Iterator) else split  # one-shot stays one-shot
    return source, (_Targets(split) if picked_target else target)


def cut_target(t, n: int):
    """A per-batch target cut to the ``n`` samples the data source kept (``max_samples``)."""
    if isinstance(t, torch.Tensor) and t.dim() >= 1 and t.shape[0] > n:
        return t[:n]
    return t


Picker = int | str | Callable | None


def join_batches(data, target=None, what: str = "this function") -> tuple:
    """``(data, target)`` as one batch: many batches (and their per-batch targets, as
    :func:`split_data` gives them) joined along axis 0, for a function that holds its data in
    memory; one batch is returned as it is.

    >>> import torch
    >>> batches = iter([(torch.zeros(2, 3), torch.ones(2)), (torch.ones(1, 3), torch.zeros(1))])
    >>> x, y = join_batches(*split_data(batches, inputs=0, target=1))
    >>> tuple(x.shape), y.tolist()
    ((3, 3), [1.0, 1.0, 0.0])
    """
    if is_one_batch(data):
        return data, target
    batches = list(data)
    if not batches:
        raise ValueError("data holds no batch")
    if target is not None and not isinstance(target, torch.Tensor):
        target = _join(list(target), what, "target")
    return _join(batches, what, "data"), target


def _join(parts: list, what: str, name: str):
    first = parts[0]
    try:
        if isinstance(first, torch.Tensor):
            return torch.cat(parts) if first.dim() >= 1 else first
        if isinstance(first, (tuple, list)):
            return tuple(_join([p[i] for p in parts], what, name) for i in range(len(first)))
        if isinstance(first, Mapping):
            return {k: _join([p[k] for p in parts], what, name) for k in first}
    except (RuntimeError, TypeError, KeyError, IndexError) as e:
        raise ValueError(f"{what} holds its {name} in memory as one batch, and the batches cannot be "
                         f"joined along axis 0 ({type(e).__name__}: {e}); give one batch") from e
    return first
