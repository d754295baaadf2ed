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
from ..model.replay import evaluating, trace_or_reason
from .gain_probes import probe_noise, probe_places
from .passes import db, model_scope_noise, suffix_noise
from .stacked_suffix import stacked_suffix_noise


def model_scope(model, source, found, facts, configs, n_bits: int, info, *, estimate: str, output,
                progress: bool, share: tuple[int, int] | None = None,
                notes: list | None = None, layer_powers: dict | None = None) -> np.ndarray:
    """Model-scope SQNR (entries x bits) in dB; ``info[name]["model_pass"]`` set for each entry.

    ``share=(j, k)``: only the entries ``i % k == j`` (the other rows stay NaN): one executor
    task's part. ``notes``: a list to which each slower path taken, and why, is appended.
    ``layer_powers``: a dict to which ``name -> (signal, noise per config)`` of the layer scope
    is written for the layers the gain estimate's probes measured (their errors are the layer
    scope's; :func:`.gain_probes.probe_noise`).
    """
    notes = [] if notes is None else notes
    from tqdm.auto import tqdm

    names = [f.entry.name for f in facts]
    model_sq = np.full((len(names), n_bits), np.nan)
    sig = found.reference.sig
    mine = [i for i in range(len(facts)) if share is None or i % share[1] == share[0]]
    probed: dict = {}
    if estimate == "gain":
        places = {}  # row -> the modules whose output errors carry the entry's error
        for i in mine:
            f = facts[i]
            if f.has_input or f.entry.kind == "embedding" or f.entry.shared_with:
                where = probe_places(model, f.entry, configs[f.entry.name])
                if where is not None:
                    places[i] = where
        wanted = {i: facts[i].entry for i in places}
        powers: dict = {}
        probed = (probe_noise(model, source, wanted, configs, output, found.n_samples, places,
                              layer_powers=powers if layer_powers is not None else None)
                  if wanted else {})
        if layer_powers is not None:
            layer_powers.update({names[i]: v for i, v in powers.items()})
        lost = sorted(names[i] for i in wanted if i not in probed)
        if lost:
            notes.append(f"estimate='gain': {_names(lost)} measured exactly (slower): their output "
                         "does not reach the model's output through gradients, their tensor is "
                         "used outside the modules that hold it, their output has no sample axis "
                         "while few output values call for exact one-hot probes, or a batch too "
                         "large for the probes was split and the model mixes samples")
        for i, noise_i in probed.items():
            model_sq[i] = [db(sig, v) for v in noise_i]
            info[names[i]]["model_pass"] = "probes"
    rest = [i for i in mine if i not in probed]
    replay, why = _checked_replay(model, source, found.refs, output) if rest else (None, None)
    replayed = [i for i in rest if replay is not None and _replayable(facts[i], replay)]
    if why is not None and any(_replayable(facts[i], None) for i in rest):
        notes.append(f"exact model scope without the suffix replay (full forward passes, slower): {why}")
    bar = tqdm(total=len(rest), desc="scan", unit="layer", disable=not progress, leave=False)
    slow = []
    try:
        if replayed:
            noise = {i: np.zeros(n_bits) for i in replayed}
            gram: dict = {}  # the final Linear's W^T W, once for all batches
            unstacked: set = set()  # entries replayed one width at a time
            for batch, ref_parts in zip(source, found.refs, strict=True):
                with evaluating(model):
                    replay.record(batch)
                    for i in replayed:
                        e = facts[i].entry
                        layer = model.get_submodule(e.module)
                        # every width through one stacked suffix where the rest keeps samples apart
                        n = None if e.name in unstacked else stacked_suffix_noise(
                            replay, layer, e.module, configs[e.name], ref_parts, output, gram)
                        if n is None:
                            unstacked.add(e.name)
                            n = suffix_noise(replay, layer, e.module, configs[e.name], ref_parts, output, gram)
                        noise[i] += n
            replay.values = {}  # the last batch's record
            if unstacked and n_bits > 1:
                notes.append(f"{_names(sorted(unstacked))} replayed one bit width at a time (slower): "
                             "the rest of the model mixes samples along axis 0, or the stacked "
                             "widths would pass the memory cap (stacked_suffix.STACK_BYTES)")
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
            if modes != {"stacked"}:
                slow.append(e.name)
            bar.update(1)
    finally:
        bar.close()
    if slow:
        notes.append(f"{_names(slow)} measured with one full forward pass per bit width (slower): "
                     "no recorded pass to replay after them, and no stacked pass applies "
                     "(weight-only, tied or shared weights, or a model that mixes samples)"
                     + (_EXACT_UNDER_GAIN if estimate == "gain" else ""))
    return model_sq


_EXACT_UNDER_GAIN = ("; these are exact, not estimated: estimate='gain' probes layers run as modules "
                     "and embeddings or tied weights used only through such modules, not attention "
                     "activations, attention projections, weights found by use or other "
                     "weight-only entries (table.model_pass says how each entry was measured)")


def _names(names: list) -> str:
    shown = ", ".join(map(repr, names[:6]))
    return f"{len(names)} entr{'y' if len(names) == 1 else 'ies'} ({shown}{', ...' if len(names) > 6 else ''})"


def _replayable(f, replay) -> bool:
    """Whether the entry can be replayed (``replay=None``: whether it could be, given a replay)."""
    e = f.entry
    return (f.has_input and e.kind == "layer" and e.runs_as_module and not e.shared_with
            and bool(e.module) and e.param == f"{e.module}.weight"
            and (replay is None or e.module in replay.layer_nodes))


# what running a traced graph on data it cannot take raises (anything else propagates)
_RUN_ERRORS = (RuntimeError, TypeError, ValueError, IndexError, KeyError, AttributeError)


def _checked_replay(model, source, refs, output):
    """(replay, None) when the traced graph gives exactly the float output on the first batch;
    else (None, why not)."""
    replay, why = trace_or_reason(model)
    if replay is None:
        return None, f"the model does not trace with torch.fx ({why})"
    if not refs:
        return None, "no reference outputs were recorded"
    first = next(iter(source))
    try:
        with evaluating(model):
            out = replay.record(first)
        parts = outputs.float_parts(out, "traced", output)
    except _RUN_ERRORS as e:
        return None, f"the traced graph does not run on this data ({type(e).__name__}: {str(e)[:160]})"
    finally:
        replay.values = {}
    ref = refs[0]
    if len(parts) != len(ref) or not all(a.shape == b.shape and torch.equal(a, b)
                                         for a, b in zip(parts, ref, strict=True)):
        return None, "the traced graph does not reproduce the model's float output bit for bit"
    return replay, None
