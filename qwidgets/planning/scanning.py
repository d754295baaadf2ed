"""Per-entry sensitivity scan: how much each weight, quantized alone, costs at each bit width.

Entries are every quantizable weight of the model (:mod:`qwidgets.model.entries`: Linear,
Conv, ConvTranspose, attention projections, recurrent matrices, embeddings; tied tensors once).
Two scopes, measured for every entry and bit width:

- layer scope: the layer's own output, computed functionally from the inputs it received
  (streamed batch by batch; powers summed over batches). A weight-only entry (attention,
  recurrent, embedding, a layer whose parent uses its weight directly) has no input to measure:
  its layer scope is the SQNR of the weight itself. With ``estimate="gain"`` the probe pass
  computes every probed layer's output errors anyway: their layer scope comes from it (the same
  inputs and arithmetic), and only the other entries get a layer-scope pass.
- model scope: the model's output with only that entry quantized. For a layer run as a module
  whose weight is used nowhere else, the model runs once per batch with the layer's output
  replaced by a stack along the batch axis of ``len(bits) + 1`` versions (one per bit width
  and a float copy), so the part of the model before the layer runs once for all bit widths.
  That is valid when the rest of the model treats samples independently; the float copy is
  the check: it must reproduce the float model's output. When the stacked pass fails or the
  check fails, and for every other entry, the entry is measured with one pass per bit width,
  its quantized weight substituted for its parameter everywhere the tensor is used (tied
  weights included). Results are the same either way.

Signal and noise powers are float64 sums over batches, so a scan over a ``DataLoader`` gives
the table of a scan over the concatenated tensor; what is kept is one batch's activations, the
float model's outputs per batch (for the model scope) and, when inputs are scanned, a bounded
sample of each layer's inputs (see :class:`qwidgets.model.statistics.RangeSample`).
"""

from __future__ import annotations

import dataclasses
import threading
from collections.abc import Callable, Sequence
from concurrent.futures import Executor
from numbers import Integral

import numpy as np
from torch import nn

from ..core.checks import check_bits, check_bool, check_choice, finite_check
from ..core.device_rules import DeviceRules, check_rules
from ..core.ranges import METHODS
from ..core.token_grid import TokenGrid
from ..model import outputs, running
from ..model.batching import cut_batches
from ..model.entries import call_inputs, coverage_of, tapped, weight_digest
from ..model.fastpath import attention_fastpath_off
from ..model.picking import split_data
from ..model.sources import Data, data_source
from ..model.state_digest import state_digests
from ..model.taps import tapping
from ..model.usage import entries_on
from .confirm import ScanNote, check_confirm, noted, scanned_table  # noqa: F401 (ScanNote: public here)
from .device_checks import scan_bits
from .distribute import merge_shares, run_shares, worker_count
from .granularity import fit_options, scan_granularity, split_granularities
from .input_granularity import scan_input_granularity, split_token_columns
from .model_scope import model_scope as _model_scope
from .passes import (
    attention_scope_powers,
    db,
    layer_scope_powers,
    weight_scope_powers,
)
from .plan import model_fingerprint
from .scan_sides import NoInputEntries, join_sides
from .survey import survey
from .table import SensitivityTable
from .table_schema import ESTIMATES, QUANTIZE_MODES, SCOPES
from .tap_scope import TapScope
from .threads import fit_workers, pass_threads, threads, torch_threads


def scan(model: nn.Module, data: Data, bits: Sequence[int] = (2, 3, 4, 5, 6, 8), *, quantize: str = "weight",
         method: str = "mse", per_channel: bool = True, scope: str = "both",
         max_samples: int | None = None, progress: bool = True,
         output: Callable | None = None, estimate: str = "exact",
         batch_size: int | None = None, executor: Executor | None = None,
         rules: DeviceRules | None = None, input_bits: Sequence[int] = (4, 6, 8),
         inputs: int | str | Callable | None = None,
         granularity: Sequence | None = None, confirm: int = 0,
         input_granularity: Sequence[str] | None = None) -> SensitivityTable:
    """Measure every quantizable weight (entry), quantized alone, at every bit width in ``bits``.

    Parameters
    ----------
    model : the user's model (left bit-identical: parameters, buffers, training flags, hooks)
    data : one batch (a tensor, a tuple / list of args, a dict of kwargs, a numpy array) or a
        ``DataLoader`` / iterable of such batches, streamed batch by batch
    bits : bit widths to try (ints in 1..16; sorted, duplicates dropped)
    quantize : ``"weight"`` (weights on a grid fitted to them, per channel when
        ``per_channel``: output channels, embedding rows), ``"input"`` (the inputs of layers
        run as modules, on a per-tensor grid fitted to what they received; weight-only entries
        are left out), ``"both"`` (each bit width for both; weight-only entries: weights) or
        ``"separate"`` (the weights at each of ``bits`` and, each on its own, the input at each
        of ``input_bits``; weight-only entries have no input rows): :func:`qwidgets.plan_budget`
        then chooses a weight width and an input width per entry
    method : range fitting, as in :func:`qwidgets.fit_range` (``"minmax"``, ``"percentile"``,
        ``"mse"``); input ranges over many batches: min-max exact, percentile and MSE on a
        bounded sample of each layer's inputs (every value up to 4M values per layer)
    scope : ``"layer"`` (each layer's output), ``"model"`` (the model's output) or ``"both"``
    max_samples : read only the first that many samples of ``data``
    progress : show a progress bar (tqdm.auto)
    output : a function from the model's output to what is compared (default: every
        floating-point tensor of the output, nested structures and dataclasses included)
    estimate : how the model scope is found. ``"exact"``: measured at every bit width.
        ``"gain"``: every layer's output error is pulled through the rest of the model by a
        few back-propagated probes (one forward with gradients and 8-64 backward passes per
        batch for all layers and bit widths together; :mod:`qwidgets.planning.gain_probes`):
        the model's first-order response to each width's actual error (additive
        quantization noise, Widrow & Kollar 2008). Exact where the rest of the model is
        linear; it departs most at 2-3 bits, where errors switch ReLUs. Embeddings and tied
        weights (a language model's embedding and output layer) are probed at every module
        that holds them when only those modules' calls use them; attention and recurrent
        weights, attention's activations (``<mha>.query`` ... ``.probs``,
        ``<module>.sdpa.*``) and weights found by use are measured exactly. ``table.estimate`` records which; ``table.model_pass(entry)`` says
        how each entry was measured (``"probes"`` for the estimated ones).
    batch_size : cut data given as one batch into batches of this many samples (None: one
        batch); only power sums are kept between batches, so memory is about one batch of
        activations, and the table is the same
    executor : a ``concurrent.futures.Executor`` (a process pool, a thread pool, or a
        ``dask.distributed`` client's ``get_executor()``): the model-scope work is split across
        its workers by entry, each receives the model and the data once, and the parts are
        merged into the table a serial scan gives
    rules : :class:`qwidgets.DeviceRules` every fitted grid obeys (a width outside the menus is
        an error naming it and the call that works, e.g. ``quantize="separate"`` with
        ``input_bits=``; weights per tensor where the device needs it)
    inputs : an index, a key or a function picking the model's inputs from each batch
        (``inputs=0`` for a ``DataLoader`` of ``(x, y)`` pairs)
    granularity : weight grids measured at every width, e.g. ``("channel", 32, 128)`` (see
        :mod:`qwidgets.planning.granularity`; None: ``("channel",)``, or ``("tensor",)`` with
        ``per_channel=False``); the first option gives the table's default rows.
    confirm : with ``estimate="gain"``, the ``confirm`` most uncertain cells measured exactly
        (:meth:`SensitivityTable.uncertain`; :attr:`SensitivityTable.confirmed` lists them)
    input_granularity : with ``quantize="separate"``, the input grids measured at every input
        width: ``("tensor",)`` (the default: one fitted scale) or ``("tensor", "token")`` (also
        a scale per row computed at run time, :class:`qwidgets.TokenGrid`; see
        :mod:`qwidgets.planning.input_granularity`)

    The table's :attr:`~SensitivityTable.coverage` says how many weight values were scanned
    and why the others were not.

    >>> import torch
    >>> from torch import nn
    >>> _ = torch.manual_seed(0)
    >>> net = nn.Sequential(nn.Linear(8, 16), nn.ReLU(), nn.Linear(16, 4))
    >>> t = scan(net, torch.randn(64, 8), bits=(4, 8), progress=False)
    >>> t.layers, t.sqnr_db("0", 8) > t.sqnr_db("0", 4) + 15
    (['0', '2'], True)
    """
    running.check_model(model)
    data, _ = split_data(data, inputs)
    bits = _check_bits_tuple(bits)
    check_choice(quantize, QUANTIZE_MODES, "quantize")
    check_choice(method, METHODS, "method")
    check_choice(scope, SCOPES, "scope")
    check_bool(per_channel, "per_channel")
    check_bool(progress, "progress")
    check_choice(estimate, ESTIMATES, "estimate")
    if executor is not None and not isinstance(executor, Executor):
        raise TypeError(f"executor must be None or a concurrent.futures.Executor, got {type(executor).__name__}")
    if batch_size is not None and (isinstance(batch_size, bool) or not isinstance(batch_size, Integral)):
        raise TypeError(f"batch_size must be None or an int >= 1, got {batch_size!r}")
    if batch_size is not None and batch_size < 1:
        raise ValueError(f"batch_size must be None or an int >= 1, got {batch_size!r}")
    output = outputs.check_output_fn(output)
    confirm = check_confirm(confirm, estimate, scope)
    separate = quantize == "separate"
    ibits = scan_bits(_check_bits_tuple(input_bits, "input_bits"), check_rules(rules), "input",
                      "input_bits") if separate else ()
    bits = scan_bits(bits, check_rules(rules), quantize)
    grans, per_channel = scan_granularity(granularity, per_channel, rules, quantize)
    igrans = scan_input_granularity(input_granularity, quantize, rules)
    options = dict(rules=rules, bits=bits, quantize=quantize, method=method, per_channel=per_channel, scope=scope,
                   max_samples=max_samples, output=output, estimate=estimate, batch_size=batch_size, granularity=grans,
                   confirm=confirm, digests=state_digests(model))  # each float tensor hashed once
    if executor is None and (separate or confirm):  # one checked source for every pass over it
        data = data_source(model, cut_batches(data, batch_size), max_samples)
    if not separate:
        return noted(scanned_table(model, data, split_granularities(
            _scan_parts(model, data, options, progress, executor)), options))
    # each side quantized alone: a weight scan at ``bits`` and an input scan at ``input_bits``
    weights = split_granularities(_scan_parts(model, data, {**options, "quantize": "weight"}, progress, executor))
    try:
        # the weight side's survey checked every layer input on this data: not again
        inputs = _scan_parts(model, data, {**options, "quantize": "input", "bits": ibits,
                                           "inputs_checked": True, "granularity": ("tensor",),
                                           "token": "token" in igrans}, progress, executor)
        inputs = split_token_columns(inputs, len(ibits))
    except NoInputEntries:
        inputs = None  # only weight-only entries: no input rows at all
    return noted(scanned_table(model, data, join_sides(weights, inputs, ibits), options))


def _scan_parts(model, data, options: dict, progress: bool, executor) -> dict:
    """The table's fields, from this process or split across ``executor``'s workers."""
    if executor is None or options["scope"] == "layer":
        return _run_scan(model, data, options, progress, None)
    k = worker_count(executor)
    return merge_shares(run_shares(executor, scan_share, model, data, options, k), k)


def scan_share(model: nn.Module, data, options: dict, share: tuple[int, int]) -> dict:
    """What one executor task runs: the scan with the model scope of entries ``i % k == j`` only.

    Tasks in one process run one at a time (tracing patches module calls process-wide).
    """
    with _SHARE_LOCK:
        return _run_scan(model, data, options, False, share)


_SHARE_LOCK = threading.Lock()


def _run_scan(model, data, options: dict, progress: bool, share) -> dict:
    source = data_source(model, cut_batches(data, options["batch_size"]), options["max_samples"])
    first = source.first_batch()
    with attention_fastpath_off():  # every pass computes what the tool's taps see (fast path or not)
        with threads(pass_threads(model)):  # every forward on the passes' threads
            entries, usage = entries_on(model, first)
        if not entries:
            raise ValueError(running.no_layers_message(model))
        return _scan_entries(model, source, first, entries, usage, options, progress, share)


def _scan_entries(model, source, first, entries, usage, options, progress, share) -> dict:
    bits, quantize, method = options["bits"], options["quantize"], options["method"]
    per_channel, scope = options["per_channel"], options["scope"]
    estimate, output = options["estimate"], options["output"]
    rules = options["rules"]
    qw, qi = quantize in ("weight", "both"), quantize in ("input", "both")
    # the passes' thread count comes from the machine and the model, never from timing (the same
    # scan gives the same table); the survey records the reference outputs on the same threads
    # (a replayed suffix must reproduce them bit for bit, and thread counts change rounding)
    n_threads = pass_threads(model)
    with threads(n_threads):
        found = survey(model, source, entries, want_inputs=qi, keep_refs=scope != "layer",
                       output=output, inputs_checked=options.get("inputs_checked", False))
    if scope != "layer":
        found.reference.check_varies()
    facts, skipped = [], list(found.skipped)
    for f in found.facts:
        if qi and not qw and not f.has_input:
            skipped.append((f.entry, f"{f.entry.type_name} weight-only entry; quantize='input' "
                                     "scans layer inputs only"))
        elif not qi and f.entry.kind == "activation":
            skipped.append((f.entry, f"an activation ({f.entry.type_name}); quantize='weight' "
                                     "scans weights only"))
        elif f.entry.kind == "activation" and not f.has_input:
            skipped.append((f.entry, "an activation that was not computed on this data"))
        else:
            facts.append(f)
    if not facts:
        if qi and not qw:
            raise NoInputEntries("no entry to scan on this data: "
                                 + "; ".join(f"{e.name}: {r}" for e, r in skipped))
        raise ValueError("no entry to scan on this data: " + "; ".join(f"{e.name}: {r}" for e, r in skipped))

    names = [f.entry.name for f in facts]
    info, wgrids, igrids, configs = {}, {}, {}, {}
    grans = options["granularity"] if qw else (None,)
    skipped_opts = []  # (entry, why a granularity option was skipped)
    with torch_threads("fit"):  # many small operations: one thread (see threads.py)
        weights = {f.entry.name: f.entry.parameter(model).detach() for f in facts if f.entry.kind != "activation"}
        for f in facts:  # the values checked once here (a NaN / inf names the weight)
            if qw and f.entry.name in weights:
                finite_check(weights[f.entry.name], f"weight {f.entry.param!r}")
        # per granularity option, every width of every weight together (None: the entry skips it),
        # on threads.fit_workers() threads
        fitted = fit_options([(weights[f.entry.name], f.entry, options["digests"].get(f.entry.param))
                              for f in facts if f.entry.name in weights], grans, bits, method, rules,
                             skipped_opts, workers=fit_workers()) if qw else {}
        for f in facts:
            e = f.entry
            act = e.kind == "activation"
            w = weights.get(e.name)
            wg = fitted.get(e.name)
            ig = [f.inputs.fit(b, method, rules=rules, role="input") for b in bits] \
                if (qi and f.has_input) else None
            wgrids[e.name] = wg
            igrids[e.name] = ig if ig is not None else [None] * len(bits)
            configs[e.name] = [(None if g is None else g[j], None if ig is None else ig[j])
                               for g in (wg or [None] * len(grans)) for j in range(len(bits))]
            if options.get("token"):  # the input at each width on a scale per row, after the fitted
                configs[e.name] += [(None, TokenGrid(b)) for b in bits]
            info[e.name] = {"type": e.type_name, "weight_shape": e.shape, "input_shape": f.input_shape,
                            "macs": int(f.macs), "model_pass": "-", "kind": e.kind, "axis": e.axis,
                            "param": e.param, "has_input": bool(f.has_input),
                            "shared_with": list(e.shared_with),
                            "stored_bits": 0 if act else e.numel * w.element_size() * 8,
                            "digest": None if act else (options["digests"].get(e.param)
                                                        or weight_digest(w))}
            if act:
                info[e.name]["partner"] = f.partner
    with threads(n_threads):
        model_sq, notes = None, []
        given: dict = {}  # name -> the layer scope's powers from the gain estimate's probe pass
        if scope != "layer":
            model_sq = _model_scope(model, source, found, facts, configs, len(configs[names[0]]), info,
                                    estimate=estimate, output=output, progress=progress, share=share,
                                    notes=notes, layer_powers=given if scope == "both" else None)
        mine = None if share is None else {n for i, n in enumerate(names) if i % share[1] == share[0]}
        layer_sq = _layer_scope(model, source, facts, configs, given, mine) if scope != "model" else None
    cov = coverage_of(model, [f.entry for f in facts], skipped, notes=usage.unusable,
                      float_activations=usage.float_activations)
    cov = dataclasses.replace(cov, skipped_options=tuple(skipped_opts))
    return dict(layers=names, bits=bits, quantize=quantize, method=method,
                per_channel=per_channel, fingerprint=model_fingerprint(model), info=info,
                layer_sqnr=layer_sq, model_sqnr=model_sq,
                weight_grids=wgrids if qw else None, input_grids=igrids if qi else None,
                granularities=grans if qw else None,
                n_samples=found.n_samples, coverage=cov,
                estimate=estimate if scope != "layer" else "exact", notes=notes)


def _layer_scope(model, source, facts, configs, given: dict, mine: set | None) -> np.ndarray:
    """Layer-scope SQNR of every entry: from each layer's inputs, streamed (one forward per batch
    with hooks that measure in place), or from the weight itself for weight-only entries.

    ``given``: name -> (scope, signal, noise per config) already measured: ``"layer"`` on the
    same inputs (the gain estimate's probe pass computes every probed layer's output errors),
    ``"weight"`` from the same quantized weights (an embedding tied to a final layer whose
    Gram matrices the probes made): no pass and no quantizing again for those.
    ``mine``: the names of one executor task's share (the other rows are NaN, merged later)."""
    signal = {f.entry.name: 0.0 for f in facts}
    noise = {f.entry.name: np.zeros(len(configs[f.entry.name])) for f in facts}
    with_input: dict = {}  # owner module -> entries measured from its inputs
    through_taps = []  # entries measured by taps
    for f in facts:
        e = f.entry
        if mine is not None and e.name not in mine:
            continue
        scope = given[e.name][0] if e.name in given else None
        if scope == "layer" and f.has_input and not tapped(e) and e.kind == "layer" \
                or scope == "weight" and not f.has_input:
            signal[e.name], noise[e.name] = given[e.name][1], np.asarray(given[e.name][2])
        elif f.has_input and tapped(e):
            through_taps.append(e)
        elif f.has_input:
            with_input.setdefault(model.get_submodule(e.module) if e.module else model, []).append(e)
        else:
            s, n = weight_scope_powers(e.parameter(model).detach(), configs[e.name])
            signal[e.name], noise[e.name] = s, np.asarray(n)

    def measure(module, args, kwargs):
        for e in with_input[module]:
            xs = [x.detach() for x in call_inputs(e, args, kwargs)]
            if not xs:
                continue
            if e.kind == "attention":
                s, n = attention_scope_powers(module, e, xs, configs[e.name])
            else:
                s, n = layer_scope_powers(module, xs[0], configs[e.name])
            signal[e.name] += s
            noise[e.name] += np.asarray(n)

    if through_taps:
        tap = TapScope(model, through_taps, configs, signal, noise)
        for batch in source:
            with tapping(model, tap):
                running.run_with_hooks(model, batch, {m: measure for m in with_input}, pre=True)
    elif with_input:
        for batch in source:
            running.run_with_hooks(model, batch, {m: measure for m in with_input}, pre=True)
    return np.array([[np.nan if mine is not None and f.entry.name not in mine else db(signal[f.entry.name], v)
                      for v in noise[f.entry.name]] for f in facts])


def _check_bits_tuple(bits, name: str = "bits") -> tuple[int, ...]:
    if isinstance(bits, Integral) and not isinstance(bits, bool):
        bits = (bits,)
    if isinstance(bits, (str, bytes)) or not isinstance(bits, Sequence):
        raise TypeError(f"{name} must be a tuple of ints in 1..16, got {bits!r}")
    if len(bits) == 0:
        raise ValueError(f"{name} is empty; give at least one bit width, e.g. {name}=(4, 8)")
    return tuple(sorted({check_bits(b, name) for b in bits}))


def _progress(total: int, show: bool):
    from tqdm.auto import tqdm

    return tqdm(total=total, desc="scan", unit="layer", disable=not show, leave=False)
