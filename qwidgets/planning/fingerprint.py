"""The model fingerprint plans and tables record: parameter names and shapes, not values."""

from __future__ import annotations

import hashlib

from torch import nn

__all__ = ["model_fingerprint"]


def model_fingerprint(model: nn.Module) -> str:
    """SHA-256 of the model's ordered parameter names and shapes (values do not matter).

    >>> from torch import nn
    >>> a, b = nn.Linear(3, 2), nn.Linear(3, 2)
    >>> model_fingerprint(a) == model_fingerprint(b), model_fingerprint(a) == model_fingerprint(nn.Linear(2, 2))
    (True, False)
    """
    if not isinstance(model, nn.Module):
        raise TypeError(f"model must be a torch.nn.Module, got {type(model).__name__}")
    h = hashlib.sha256()
    for name, p in model.named_parameters():
        h.update(f"{name}:{tuple(p.shape)}\n".encode())
    return h.hexdigest()
