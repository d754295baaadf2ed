"""Data files the package ships (the demo classifier's weights, ``qwidgets.demo``), stored as
NumPy ``.npz`` archives: named arrays plus ``meta.*`` fields, read without pickle."""

from __future__ import annotations

from importlib import resources
from pathlib import Path

import numpy as np

__all__ = ["read_arrays", "write_arrays"]


def read_arrays(name: str) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray]]:
    """The arrays and the ``meta`` fields of the shipped file ``name`` (in this folder)."""
    with resources.files(__name__).joinpath(name).open("rb") as f, np.load(f) as npz:
        arrays = {k: npz[k] for k in npz.files}
    meta = {k[5:]: v for k, v in arrays.items() if k.startswith("meta.")}
    return {k: v for k, v in arrays.items() if not k.startswith("meta.")}, meta


def write_arrays(path: str | Path, arrays: dict[str, np.ndarray], **meta) -> None:
    """Write ``arrays`` and the ``meta`` fields to ``path`` in the format :func:`read_arrays` reads."""
    np.savez_compressed(Path(path), **arrays, **{f"meta.{k}": np.asarray(v) for k, v in meta.items()})
