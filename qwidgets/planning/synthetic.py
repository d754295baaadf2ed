"""Sensitivity tables built from given SQNRs, for planning experiments, tests and benchmarks."""

from __future__ import annotations

import hashlib
from collections.abc import Sequence

import numpy as np

from ..core.checks import check_bits
from ..core.grid import UniformGrid


def synthetic_table(cls, model_sqnr_db, *, params: Sequence[int], bits: Sequence[int],
                    input_sqnr_db=None, input_bits: Sequence[int] = (), macs: Sequence[int] | None = None,
                    names: Sequence[str] | None = None, input_token_sqnr_db=None):
    """See :meth:`SensitivityTable.synthetic`."""
    arr = np.asarray(model_sqnr_db, dtype=float)
    if arr.ndim != 2 or arr.shape[0] != len(params) or arr.shape[1] != len(bits):
        raise ValueError(f"model_sqnr_db must be (layers, bits) = ({len(params)}, {len(bits)}), got {arr.shape}")
    names = list(names) if names is not None else [f"layer{i}" for i in range(len(params))]
    macs = list(macs) if macs is not None else list(params)
    bits = tuple(check_bits(b) for b in bits)
    info = {n: {"type": "Linear", "weight_shape": (int(p), 1), "input_shape": (1,), "macs": int(m),
                "model_pass": "-"} for n, p, m in zip(names, params, macs, strict=True)}
    grids = {n: [UniformGrid(b, 1.0) for b in bits] for n in names}
    fp = _hash_lines(f"{n}:{info[n]['weight_shape']}" for n in names)
    quantize, igrids, iarr = "weight", None, None
    if input_sqnr_db is not None:
        input_bits = tuple(check_bits(b, "input_bits") for b in input_bits)
        iarr = np.asarray(input_sqnr_db, dtype=float)
        if iarr.shape != (len(params), len(input_bits)) or not input_bits:
            raise ValueError(f"input_sqnr_db must be (layers, input_bits) = ({len(params)}, "
                             f"{len(input_bits)}) with input_bits given, got {iarr.shape}")
        quantize = "separate"
        igrids = {n: None if np.isnan(iarr[i]).all() else [UniformGrid(b, 1.0) for b in input_bits]
                  for i, n in enumerate(names)}
    elif input_bits:
        raise ValueError("input_bits needs input_sqnr_db")
    more = {}
    if input_token_sqnr_db is not None:
        tarr = np.asarray(input_token_sqnr_db, dtype=float)
        if iarr is None or tarr.shape != iarr.shape:
            raise ValueError(f"input_token_sqnr_db must have input_sqnr_db's shape "
                             f"{None if iarr is None else iarr.shape}, got {tarr.shape}")
        more = dict(input_granularities=("tensor", "token"),
                    input_granularity_rows={"token": {"layer": None, "model": tarr}})
    return cls(layers=names, bits=bits, quantize=quantize, method="mse", per_channel=False,
               fingerprint=fp, info=info, layer_sqnr=None, model_sqnr=arr, weight_grids=grids,
               input_grids=igrids, n_samples=1, input_bits=input_bits if iarr is not None else (),
               input_model_sqnr=iarr, **more)


def _hash_lines(lines) -> str:
    h = hashlib.sha256()
    for line in lines:
        h.update((line + "\n").encode())
    return h.hexdigest()
