"""Splitting a scan across the workers of a ``concurrent.futures.Executor``, and merging it.

One task per worker: each receives the model and the data once (a process pool or a Dask
cluster pickles them once per task), runs the whole scan's cheap part (survey, range fitting,
layer scope) and the model scope of its share of the entries, interleaved in execution order
(entries ``i % k == j`` to task ``j``, so long and short suffixes spread evenly), and sends
back the table's fields. The merge takes each model-scope row from the task that measured it:
the table of a serial scan.
"""

from __future__ import annotations

import os
from concurrent.futures import Executor

import numpy as np


def worker_count(executor: Executor) -> int:
    """How many tasks ``executor`` runs at once (its pool size; the cluster's threads for Dask)."""
    n = getattr(executor, "_max_workers", None)  # concurrent.futures pools keep it here
    if isinstance(n, int) and n > 0:
        return n
    client = getattr(executor, "_client", None)  # dask.distributed's ClientExecutor
    if client is not None:
        try:
            return max(1, sum(client.nthreads().values()))
        except Exception:  # noqa: BLE001 - a client that cannot say: one task per core here
            pass
    return os.cpu_count() or 1


def merge_shares(parts: list[dict], k: int) -> dict:
    """The fields of one table from ``k`` tasks' fields (row ``i`` from task ``i % k``).

    >>> import numpy as np
    >>> a = {"layers": ["x", "y"], "model_sqnr": np.array([[1.0], [np.nan]]), "info": {"x": {}, "y": {}}}
    >>> b = {"layers": ["x", "y"], "model_sqnr": np.array([[np.nan], [2.0]]), "info": {"x": {}, "y": {}}}
    >>> merge_shares([a, b], 2)["model_sqnr"].tolist()
    [[1.0], [2.0]]
    """
    out = dict(parts[0])
    if out.get("model_sqnr") is None:
        return out
    names = out["layers"]
    for p in parts[1:]:
        if p["layers"] != names:
            raise RuntimeError("the executor's workers found different entries; is the model or data "
                               "random or different on each worker?")
    model_sq = np.array(out["model_sqnr"], dtype=float, copy=True)
    info = {n: dict(v) for n, v in out["info"].items()}
    for i, name in enumerate(names):
        part = parts[i % k]
        model_sq[i] = part["model_sqnr"][i]
        info[name]["model_pass"] = part["info"][name].get("model_pass", "-")
    out["model_sqnr"], out["info"] = model_sq, info
    out["notes"] = list(dict.fromkeys(n for p in parts for n in p.get("notes", ())))
    return out
