"""Data sources: one batch (a tensor, a tuple / list of args, a dict of kwargs, a numpy array)
or many (a ``torch.utils.data.DataLoader`` or any other iterable of such batches).

Every consumer (scan, capture, errors, evaluation, grid learning) reads data through
:func:`data_source`, which checks each batch as it comes (finite values, the model's device,
no empty tensors), converts numpy arrays to tensors and stops after ``max_samples`` samples.
Many batches are *streamed*: the consumer sees one batch at a time, so what it keeps is one
batch plus its running statistics. A one-shot iterator (a generator) is read once and its
batches are kept, because several passes read the data again; give a re-iterable source (a
``DataLoader``, or an object whose ``__iter__`` starts over) to keep memory bounded.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Mapping
from typing import Any

import numpy as np
import torch
from torch import nn

from ..core.checks import check_int, finite_check
from .layers import LayerInputError

# one batch: model(tensor), model(*tuple), model(**dict); or an iterable of such batches
Data = Any


def check_max_samples(n):
    return check_int(n, "max_samples", minimum=1, none_ok=True)


def is_one_batch(data) -> bool:
    """True when ``data`` is one batch (tensor, numpy array, tuple / list, dict), not many.

    >>> import torch
    >>> is_one_batch(torch.zeros(2)), is_one_batch((torch.zeros(2),)), is_one_batch(iter([]))
    (True, True, False)
    """
    return isinstance(data, (torch.Tensor, np.ndarray, tuple, list, Mapping))


class DataSource:
    """The user's data as checked batches; iterate it once per pass (re-iterable).

    ``n_samples`` is known after the first full pass (for one batch, at once).

    >>> import torch
    >>> src = data_source(None, [torch.ones(3, 2)], max_samples=2)  # a list is one batch of args
    >>> [tuple(b[0].shape) for b in src], src.n_samples
    ([(2, 2)], 2)
    """

    def __init__(self, model: nn.Module | None, data, max_samples: int | None, name: str = "data"):
        self.name = name
        self.max_samples = check_max_samples(max_samples)
        self._model = model
        self._float_dtype, self._devices = _model_dtype_devices(model)
        self.n_samples: int | None = None
        self.n_batches: int | None = None
        if is_one_batch(data):
            batch = self._check(_as_batch(data, self._float_dtype, self._device()), name)
            batch = _cut(batch, self.max_samples)
            self._batches: list | None = [batch]
            self._iterable = None
            self.single = True
            self.n_samples, self.n_batches = batch_size(batch), 1
            return
        if isinstance(data, (str, bytes)) or not isinstance(data, Iterable):
            raise TypeError(
                f"{name} must be a tensor, a numpy array, a tuple / list of tensors (positional "
                "arguments), a dict of tensors (keyword arguments), or a DataLoader / iterable of "
                f"such batches; got {type(data).__name__}")
        self.single = False
        # batch_size's slices of one batch (model.batching.Batches): checked once, as a whole
        whole = getattr(data, "views_of", None)
        self._views_checked = whole is not None and _all_tensors(whole)
        if self._views_checked:
            self._check(_cut(_as_batch(whole, self._float_dtype, self._device()), self.max_samples), name)
        one_shot = iter(data) is data if isinstance(data, Iterator) else False
        self._iterable = data
        self._batches = [] if one_shot else None
        self._consumed = False

    def _device(self):
        return next(iter(self._devices)) if len(self._devices) == 1 else None

    def _check(self, batch, where: str):
        tensors = list(batch_tensors(batch, where))
        if not tensors:
            raise ValueError(f"{where} holds no tensor; give a tensor, or a tuple / dict of tensors")
        for n, t in tensors:
            if t.numel() == 0:
                raise ValueError(f"{n} is empty (shape {tuple(t.shape)}); give at least one sample")
            if t.is_floating_point():
                finite_check(t, n, LayerInputError)
            if self._devices and t.device not in self._devices:
                raise ValueError(
                    f"{n} is on {t.device} but the model's parameters are on "
                    f"{', '.join(sorted(map(str, self._devices)))}; move one of them")
        if not getattr(self, "_call_checked", False):
            _check_call(self._model, batch, where)
            self._call_checked = True
        return batch

    def first_batch(self):
        """The first batch; a one-shot iterable is read through (and kept) first, as a pass
        would, so that a later pass still sees every batch once."""
        if self._batches is not None and not self.single and not self._consumed:
            for _ in self:
                pass
        return next(iter(self))

    def __iter__(self) -> Iterator:
        if self._batches is not None and (self.single or self._consumed):
            yield from self._batches
            return
        seen, count = 0, 0
        keep = self._batches
        for k, raw in enumerate(self._iterable):
            if self.max_samples is not None and seen >= self.max_samples:
                break
            where = f"{self.name} batch {k}"
            if not is_one_batch(raw):
                raise TypeError(f"{where} must be a tensor, numpy array, tuple or dict of tensors, "
                                f"got {type(raw).__name__}")
            batch = _as_batch(raw, self._float_dtype, self._device())
            if not self._views_checked:
                batch = self._check(batch, where)
            if self.max_samples is not None:
                batch = _cut(batch, self.max_samples - seen)
            seen += batch_size(batch)
            count += 1
            if keep is not None:
                keep.append(batch)
            yield batch
        if count == 0:
            raise ValueError(f"{self.name} gave no batch; give at least one sample")
        self.n_samples, self.n_batches = seen, count
        if keep is not None:
            self._consumed = True


def data_source(model: nn.Module | None, data, max_samples: int | None = None,
                name: str = "data") -> DataSource:
    """Wrap ``data`` (one batch or an iterable of batches) as a checked, re-iterable source.

    Numpy arrays become tensors (floating-point ones in the model's floating-point dtype, on
    its device). ``max_samples`` caps the samples read (axis 0 of every tensor of a batch).

    >>> import torch, numpy as np
    >>> src = data_source(None, (torch.zeros(4, 3) for _ in range(3)), max_samples=10)
    >>> [tuple(b.shape) for b in src], src.n_samples
    ([(4, 3), (4, 3), (2, 3)], 10)
    >>> [b.dtype for b in data_source(None, np.zeros((2, 2)))]
    [torch.float32]
    """
    if isinstance(data, DataSource):
        return data
    return DataSource(model, data, max_samples, name)


def batch_size(batch) -> int:
    """Samples in a batch: axis 0 of its first tensor (1 for a 0-d tensor)."""
    for _, t in batch_tensors(batch, "data"):
        return int(t.shape[0]) if t.dim() else 1
    return 1


def call_model(model: nn.Module, batch):
    """``model(batch)``, ``model(*batch)`` or ``model(**batch)``."""
    if isinstance(batch, dict):
        return model(**batch)
    if isinstance(batch, tuple):
        return model(*batch)
    return model(batch)


def _check_call(model, batch, where: str) -> None:
    """A tuple batch the model's forward cannot take as positional arguments: most often an
    (inputs, targets) pair; say how to pick the inputs."""
    if model is None or not isinstance(batch, tuple) or len(batch) < 2:
        return
    import inspect

    try:
        sig = inspect.signature(model.forward)
    except (TypeError, ValueError):
        return
    try:
        sig.bind(*batch)
    except TypeError as e:
        raise TypeError(
            f"{where} is a tuple of {len(batch)} values, passed as model(*batch), but "
            f"{type(model).__name__}.forward does not take them ({e}); if each batch is (inputs, "
            "targets), as a DataLoader over a TensorDataset(x, y) yields, pass inputs=0 (and "
            "target=1 where a target is used)") from None


def _model_dtype_devices(model):
    if model is None:
        return torch.get_default_dtype(), set()
    floats = [p.dtype for p in model.parameters() if p.is_floating_point()]
    devices = {p.device for p in model.parameters()} | {b.device for b in model.buffers()}
    return (floats[0] if floats else torch.get_default_dtype()), devices


def _as_batch(data, float_dtype, device):
    if isinstance(data, np.ndarray):
        return _from_numpy(data, float_dtype, device)
    if isinstance(data, (list, tuple)):
        return tuple(_from_numpy(v, float_dtype, device) if isinstance(v, np.ndarray) else v
                     for v in data)
    if isinstance(data, Mapping):
        return {k: _from_numpy(v, float_dtype, device) if isinstance(v, np.ndarray) else v
                for k, v in data.items()}
    return data


def _from_numpy(a: np.ndarray, float_dtype, device) -> torch.Tensor:
    if a.dtype == object:
        raise TypeError("a numpy array of Python objects cannot be a model input; give numbers")
    t = torch.from_numpy(np.ascontiguousarray(a))
    if t.is_floating_point():
        t = t.to(float_dtype)
    return t if device is None else t.to(device)


def batch_tensors(batch, where: str = "data"):
    """(name, tensor) of each tensor of a batch: the tensors :class:`DataSource` checked (a
    caller running the model on the batch need not check them again)."""
    if isinstance(batch, torch.Tensor):
        yield where, batch
    elif isinstance(batch, tuple):
        for i, v in enumerate(batch):
            if isinstance(v, torch.Tensor):
                yield f"{where}[{i}]", v
    elif isinstance(batch, Mapping):
        for k, v in batch.items():
            if isinstance(v, torch.Tensor):
                yield f"{where}[{k!r}]", v


def _all_tensors(batch) -> bool:
    """A batch of tensors only (a numpy array would be converted as a whole just to check it)."""
    if isinstance(batch, torch.Tensor):
        return True
    values = batch.values() if isinstance(batch, Mapping) else batch if isinstance(batch, tuple) else None
    return values is not None and not any(isinstance(v, np.ndarray) for v in values)


def _cut(batch, n: int | None):
    if n is None:
        return batch

    def cut(v):
        return v[:n] if isinstance(v, torch.Tensor) and v.dim() >= 1 else v
    if isinstance(batch, torch.Tensor):
        return cut(batch)
    if isinstance(batch, tuple):
        return tuple(cut(v) for v in batch)
    return {k: cut(v) for k, v in batch.items()}
