"""The model scope of a scan: exact by replaying what follows each layer, or the gain estimate.

Where the model traces with ``torch.fx`` and its traced graph reproduces its output, each batch
is recorded once (every value of one float pass) and, for each layer run as a module, only the
nodes after it rerun per bit width (``"suffix"``); skip connections from before the layer read
the record, so residual networks need no full forward per bit width. Every other entry (and a
model that does not trace) is measured by :func:`.passes.model_scope_noise` (``"stacked"`` or
``"per bit width"``). Results are the same either way.

``estimate="gain"``: the layers whose error is their module's output error are estimated
together by back-propagated probes (:mod:`.gain_probes`: one forward with gradients and a few
backward passes per batch for all of them); every other entry, and any whose output does not
reach the model's output through gradients, is measured exactly as above.
"""

from __future__ import annotations

import numpy as np
import torch

from ..model import outputs
from ..model.replay import evaluating, trace
from .gain_probes import probe_noise, probeable
from .passes import db, model_scope_noise, suffix_noise


def model_scope(model, source, found, facts, configs, n_bits: int, info, *, estimate: str, output,
                progress: bool, share: tuple[int, int] | None = None) -> np.ndarray:
    """Model-scope SQNR (entries x bits) in dB; ``info[name]["model_pass"]`` set for each entry.

    ``share=(j, k)``: only the entries ``i % k == j`` (the other rows stay NaN): one executor
    task's part.
    """
    from tqdm.auto import tqdm

    names = [f.entry.name for f in facts]
    model_sq = np.full((len(names), n_bits), np.nan)
    sig = found.reference.sig
    mine = [i for i in range(len(facts)) if share is None or i % share[1] == share[0]]
    probed: dict = {}
    if estimate == "gain":
        wanted = {i: facts[i].entry for i in mine if facts[i].has_input and probeable(facts[i].entry)}
        probed = probe_noise(model, source, wanted, configs, output, found.n_samples) if wanted else {}
        for i, noise_i in probed.items():
            model_sq[i] = [db(sig, v) for v in noise_i]
            info[names[i]]["model_pass"] = "probes"
    rest = [i for i in mine if i not in probed]
    replay = _checked_replay(model, source, found.refs, output) if rest else None
    replayed = [i for i in rest if replay is not None and _replayable(facts[i], replay)]
    bar = tqdm(total=len(rest), desc="scan", unit="layer", disable=not progress, leave=False)
    try:
        if replayed:
            noise = {i: np.zeros(n_bits) for i in replayed}
            for batch, ref_parts in zip(source, found.refs, strict=True):
                with evaluating(model):
                    replay.record(batch)
                    for i in replayed:
                        e = facts[i].entry
                        noise[i] += suffix_noise(replay, model.get_submodule(e.module), e.module,
                                                 configs[e.name], ref_parts, output)
            replay.values = {}  # the last batch's record
            for i in replayed:
                info[names[i]]["model_pass"] = "suffix"
                model_sq[i] = [db(sig, v) for v in noise[i]]
                bar.update(1)
        for i in rest:
            if i in replayed:
                continue
            f = facts[i]
            e = f.entry
            stackable = f.has_input and e.runs_as_module and not e.shared_with
            noise_i = np.zeros(n_bits)
            modes = set()
            for batch, ref_parts in zip(source, found.refs, strict=True):
                n, mode = model_scope_noise(model, batch, e, configs[e.name], ref_parts,
                                            stackable=stackable, output=output)
                noise_i += np.asarray(n)
                modes.add(mode)
            model_sq[i] = [db(found.reference.sig, v) for v in noise_i]
            info[e.name]["model_pass"] = "stacked" if modes == {"stacked"} else "per bit width"
            bar.update(1)
    finally:
        bar.close()
    return model_sq


def _replayable(f, replay) -> bool:
    e = f.entry
    return (f.has_input and e.kind == "layer" and e.runs_as_module and not e.shared_with
            and bool(e.module) and e.param == f"{e.module}.weight" and e.module in replay.layer_nodes)


def _checked_replay(model, source, refs, output):
    """A replay of ``model`` whose traced graph gives exactly its float output on the first batch."""
    replay = trace(model)
    if replay is None or not refs:
        return None
    first = next(iter(source))
    try:
        with evaluating(model):
            out = replay.record(first)
        parts = outputs.float_parts(out, "traced", output)
    except Exception:  # noqa: BLE001 - a graph that does not run on this data is not replayed
        return None
    finally:
        replay.values = {}
    ref = refs[0]
    if len(parts) != len(ref) or not all(a.shape == b.shape and torch.equal(a, b)
                                         for a, b in zip(parts, ref, strict=True)):
        return None
    return replay

