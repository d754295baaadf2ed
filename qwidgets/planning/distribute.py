"""Splitting a scan across the workers of a ``concurrent.futures.Executor``, and merging it.

One task per worker thread. A Dask cluster receives the model and the data once per worker
(scattered to every worker, each task given the futures; a worker's tasks share its copy and
run one at a time), a process pool once per task (one task per process). Each task runs the
whole scan's cheap part (survey, range fitting, layer scope) and the model scope of its share
of the entries, interleaved in execution order (entries ``i % k == j`` to task ``j``, so long
and short suffixes spread evenly), and sends back the table's fields. The merge takes each model-scope row from the task that measured it:
the table of a serial scan.
"""

from __future__ import annotations

import copy
import os
from collections.abc import Callable
from concurrent.futures import Executor

import numpy as np


def worker_count(executor: Executor) -> int:
    """How many tasks ``executor`` runs at once (its pool size; the cluster's threads for Dask)."""
    n = getattr(executor, "_max_workers", None)  # concurrent.futures pools keep it here
    if isinstance(n, int) and n > 0:
        return n
    client = dask_client(executor)
    if client is not None:
        return max(1, sum(client.nthreads().values()))
    return os.cpu_count() or 1


def dask_client(executor: Executor):
    """The ``dask.distributed`` client behind ``client.get_executor()``, else None."""
    client = getattr(executor, "_client", None)
    return client if client is not None and hasattr(client, "scatter") else None


def run_shares(executor: Executor, task: Callable, model, data, options: dict, k: int) -> list:
    """``[task(model, data, options, (j, k)) for j in range(k)]`` on ``executor``'s workers.

    On a Dask cluster the model and the data go to every worker once (``scatter`` with
    ``broadcast=True``: one copy per worker, however many tasks it runs); other executors get
    them with each task (a thread pool a copy of the model per task, so no two share one).
    """
    client = dask_client(executor)
    if client is not None:
        # one object pickled whole (Dask's own serializer for torch modules drops their hook
        # dictionaries' type), scattered once to every worker, where it stays deserialized
        [payload] = client.scatter([_Payload(model, data)], broadcast=True, hash=False)
        futures = [client.submit(_run_payload, task, payload, options, (j, k), pure=False) for j in range(k)]
        return client.gather(futures)
    futures = [executor.submit(task, copy.deepcopy(model), data, options, (j, k)) for j in range(k)]
    return [f.result() for f in futures]


class _Payload:
    """The model and the data as one object (pickled whole)."""

    def __init__(self, model, data):
        self.model, self.data = model, data


def _run_payload(task: Callable, payload: _Payload, options: dict, share: tuple[int, int]) -> dict:
    return task(payload.model, payload.data, options, share)


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
    layer_sq = None if out.get("layer_sqnr") is None else np.array(out["layer_sqnr"], dtype=float, copy=True)
    info = {n: dict(v) for n, v in out["info"].items()}
    for i, name in enumerate(names):
        part = parts[i % k]
        model_sq[i] = part["model_sqnr"][i]
        if layer_sq is not None:  # each task measured the layer scope of its own entries
            layer_sq[i] = part["layer_sqnr"][i]
        info[name]["model_pass"] = part["info"][name].get("model_pass", "-")
    out["model_sqnr"], out["layer_sqnr"], out["info"] = model_sq, layer_sq, info
    out["notes"] = list(dict.fromkeys(n for p in parts for n in p.get("notes", ())))
    return out
