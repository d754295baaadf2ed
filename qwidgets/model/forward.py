"""The model's output with some layers quantized, compared with its float output."""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from typing import Any

import torch
from torch import nn

from ..core.grid import UniformGrid, grid_params
from ..core.metrics import ErrorStats, error_stats
from ..core.renamed import warn_renamed
from ..core.rounding import quantize, quantize_unchecked
from ..core.setting import LayerSetting
from .entries import Entry, call_inputs, find_entries, replace_inputs, tapped
from .finite_state import check_layer_input
from .layers import (
    LayerInputError,
    check_layer,
    check_layer_grids,
    check_tensor,
    describe_layer,
    output_on_grids,
)
from .outputs import OutputComparison, call_metric, check_output_fn, float_parts
from .picking import cut_target, split_data
from .running import check_model, run_with_hooks
from .sources import Data, batch_tensors, data_source
from .tap_quantize import QuantizeTap, tapped_inputs
from .usage import entries_named


def layer_error(
    layer: nn.Module,
    inputs: torch.Tensor | Iterable[torch.Tensor],
    weight_grid: UniformGrid | None = None,
    input_grid: UniformGrid | None = None,
    *,
    max_samples: int | None = None,
) -> ErrorStats:
    """How much quantizing the weights and / or the inputs perturbs ``layer``'s output.

    Compares :func:`layer_output` in float with :func:`layer_output` on the given grids,
    functionally, without calling or changing the layer. ``inputs``: a tensor, a numpy array,
    or an iterable of them (a ``DataLoader``), streamed batch by batch (float64 sums);
    ``max_samples`` caps the samples read.

    >>> import torch
    >>> from torch import nn
    >>> _ = torch.manual_seed(0)
    >>> lin, x = nn.Linear(16, 8), torch.randn(64, 16)
    >>> from qwidgets.model.layers import fit_weight
    >>> e4 = layer_error(lin, x, weight_grid=fit_weight(lin, 4, "minmax"))
    >>> e8 = layer_error(lin, x, weight_grid=fit_weight(lin, 8, "minmax"))
    >>> e8.sqnr_db > e4.sqnr_db + 20
    True
    """
    check_layer(layer, "layer")
    check_layer_grids(layer, weight_grid, input_grid)  # once; the batches below trust them
    if isinstance(inputs, torch.Tensor):
        x = check_tensor(inputs, "inputs")
        if max_samples is None or x.dim() == 0:
            return error_stats(output_on_grids(layer, x),
                               output_on_grids(layer, x, weight_grid, input_grid))
    source = data_source(None, inputs, max_samples, name="inputs")
    sums = OutputComparison()
    for batch in source:
        if not isinstance(batch, torch.Tensor):
            raise TypeError(f"inputs must be a tensor or an iterable of tensors, got a batch of "
                            f"type {type(batch).__name__}")
        x = check_tensor(batch, "inputs")
        sums.add([output_on_grids(layer, x)], [output_on_grids(layer, x, weight_grid, input_grid)])
    return sums.stats()


@dataclass(frozen=True)
class ModelError:
    """The model's float output versus its output with some layers quantized.

    ``output``: :class:`ErrorStats` over every floating-point tensor of the output, flattened
    and joined; ``metric_float`` / ``metric_quantized``: ``metric(output, target)`` for each
    (None without a metric); :attr:`drop`: ``metric_float - metric_quantized``, the sign
    used everywhere (positive: quantizing did worse); ``layers``: the quantized layers, in
    execution order.

    >>> from qwidgets import error_stats
    >>> import torch
    >>> r = ModelError(error_stats(torch.ones(2), torch.ones(2)), 0.97, 0.96, ("fc",))
    >>> round(r.drop, 2), r.output.sqnr_db
    (0.01, inf)
    """

    output: ErrorStats
    metric_float: float | None = None
    metric_quantized: float | None = None
    layers: tuple[str, ...] = ()

    @property
    def drop(self) -> float | None:
        """``metric_float - metric_quantized`` (None without a metric)."""
        if self.metric_float is None or self.metric_quantized is None:
            return None
        return self.metric_float - self.metric_quantized

    @property
    def metric_change(self) -> float | None:
        """Deprecated (one release): ``-drop``, i.e. ``metric_quantized - metric_float``."""
        warn_renamed("metric_change", "drop (= metric_float - metric_quantized, the opposite sign)",
                     "ModelError")
        d = self.drop
        return None if d is None else -d

    def __str__(self) -> str:
        s = f"output: {self.output}"
        if self.metric_float is not None:
            s += (f"; metric {self.metric_float:.6g} -> {self.metric_quantized:.6g} "
                  f"(drop {self.drop:.4g})")
        return s


def model_error(
    model: nn.Module,
    data: Data,
    settings: Mapping[str, LayerSetting],
    *,
    metric: Callable[[Any, Any], float] | None = None,
    target: Any = None,
    output: Callable[[Any], Any] | None = None,
    max_samples: int | None = None,
    inputs: int | str | Callable | None = None,
) -> ModelError:
    """Run ``model`` on ``data`` in float and with the entries in ``settings`` quantized.

    ``settings`` maps entry names (:func:`qwidgets.model.entries.find_entries`: layer paths,
    ``<attention>.in_proj``, ``<rnn>.weight_ih_l0``, embedding paths) to
    :class:`LayerSetting`. The quantized pass substitutes each entry's fake-quantized weight
    for its parameter (everywhere the tensor is used, tied weights included) and quantizes
    the inputs of layers with an input grid by a forward pre-hook; the model's parameters are
    never written, hooks are removed and the model is left bit-identical.

    ``data``: one batch (tensor, tuple / list of args, dict of kwargs, numpy array) or an
    iterable of batches (a ``DataLoader``), streamed: both passes run batch by batch and only
    float64 sums are kept. ``max_samples`` caps the samples read. ``output``: a function from
    the model's output to what is compared (default: every floating-point tensor of the
    output, nested tuples / lists / dicts / dataclasses included). ``metric(output, target) ->
    float`` is evaluated on both outputs; with many batches ``target`` is an iterable of
    per-batch targets and the metric is averaged, weighted by batch size. ``inputs`` /
    ``target`` may pick each batch's model inputs and target (an index, a key or a function),
    as in :func:`qwidgets.evaluate_plan`.

    >>> import torch
    >>> from torch import nn
    >>> _ = torch.manual_seed(0)
    >>> net, x = nn.Sequential(nn.Linear(4, 8), nn.ReLU(), nn.Linear(8, 2)), torch.randn(32, 4)
    >>> from qwidgets import LayerSetting
    >>> from qwidgets.model.layers import fit_weight
    >>> res = model_error(net, x, {"0": LayerSetting(weight=fit_weight(net[0], 8, "minmax"))})
    >>> res.output.sqnr_db > 30, res.layers
    (True, ('0',))
    """
    if metric is not None and not callable(metric):
        raise TypeError(f"metric must be a callable metric(output, target) -> float, got {type(metric).__name__}")
    check_model(model)
    output = check_output_fn(output)
    chosen = check_settings(model, settings)
    data, target = split_data(data, inputs, target, uses_target=metric is not None)
    source = data_source(model, data, max_samples)
    targets = None if (source.single or metric is None) else iter(_check_targets(target))
    sums, applied = OutputComparison(), []
    mf = mq = 0.0
    n_metric = 0
    params = None  # the quantized weights: computed (and their values checked) once per call
    for batch in source:
        ref = run_with_hooks(model, batch, {}, pre=False)
        params = quantized_weights(model, chosen) if params is None else params
        out, ran = quantized_call(model, batch, chosen, params=params)
        applied.extend(n for n in ran if n not in applied)
        sums.add(float_parts(ref, "float", output), float_parts(out, "quantized", output))
        if metric is not None:
            t = target if targets is None else cut_target(next(targets, None), _samples(batch))
            w = 1 if source.single else _samples(batch)
            mf += w * call_metric(metric, ref, t, "on the float model")
            mq += w * call_metric(metric, out, t, "on the quantized model")
            n_metric += w
    if chosen:
        sums.check_varies()
    metric_float = None if metric is None else mf / n_metric
    metric_q = None if metric is None else mq / n_metric
    return ModelError(sums.stats(), metric_float, metric_q, tuple(applied))


def _samples(batch) -> int:
    from .sources import batch_size

    return batch_size(batch)


def _check_targets(target):
    from collections.abc import Iterable

    if not isinstance(target, Iterable) or isinstance(target, torch.Tensor):
        raise TypeError("with data given as many batches, target must be an iterable of per-batch "
                        f"targets (e.g. the labels of each batch), got {type(target).__name__}")
    return target


def forward_float(model: nn.Module, data: Data) -> Any:
    """The model's output on one batch ``data`` under ``no_grad`` and ``eval()`` (model untouched).

    >>> import torch
    >>> from torch import nn
    >>> forward_float(nn.Linear(2, 1, bias=False), torch.zeros(3, 2)).shape
    torch.Size([3, 1])
    """
    check_model(model)
    source = data_source(model, data)
    if not source.single:
        raise TypeError("forward_float takes one batch (a tensor, tuple or dict); iterate the batches")
    return run_with_hooks(model, next(iter(source)), {}, pre=False)


def forward_quantized(model: nn.Module, data: Data, settings: Mapping[str, LayerSetting]) -> Any:
    """The model's output on one batch ``data`` with the entries in ``settings`` quantized
    (see :func:`model_error`).

    >>> import torch
    >>> from torch import nn
    >>> lin = nn.Linear(2, 1, bias=False)
    >>> s = {"": LayerSetting(input=UniformGrid(2, 1.0))}
    >>> forward_quantized(lin, torch.full((1, 2), 0.4), s).abs().item()
    0.0
    """
    check_model(model)
    chosen = check_settings(model, settings)
    source = data_source(model, data)
    if not source.single:
        raise TypeError("forward_quantized takes one batch (a tensor, tuple or dict); iterate the batches")
    return quantized_call(model, next(iter(source)), chosen)[0]


def quantized_weights(model: nn.Module, settings: Mapping[Entry, LayerSetting]) -> dict:
    """Each entry's fake-quantized weight, by qualified parameter name (for :func:`quantized_call`).

    The weights' values are checked here (NaN / inf, and a per-channel grid's size against the
    weight), once: a caller running many batches computes them once and passes them on.
    """
    params = {}
    with torch.no_grad():
        for e, s in settings.items():
            if s.weight is not None and e.kind != "activation":
                w = e.parameter(model).detach()
                grid_params(w, s.weight)  # per-channel size check, clear message
                params[e.param] = quantize(w, s.weight)
    return params


def quantized_call(model: nn.Module, batch, settings: Mapping[Entry, LayerSetting], *,
                   params: dict | None = None, inputs_checked: bool = False):
    """One forward of ``batch`` with each entry's weight / input quantized; (output, names run).

    Weights: the fake-quantized tensor is substituted for the parameter for this call only
    (tied uses included): ``params`` from :func:`quantized_weights` (computed here when None).
    Inputs: a forward pre-hook quantizes the owner layer's first input; NaN / inf in it is
    refused (LayerInputError naming the layer), checked once, and not at all where the input
    is one of the batch's own tensors (its data source checked them) or where
    ``inputs_checked`` (the caller saw every input this model's layers receive on this batch
    checked already, as the scan's survey does).
    """
    if params is None:
        params = quantized_weights(model, settings)
    checked = {id(t) for _, t in batch_tensors(batch)}
    by_module: dict[int, list] = {}
    for e, s in settings.items():
        if s.input is not None and not tapped(e):
            owner = model.get_submodule(e.module) if e.module else model
            by_module.setdefault(id(owner), [owner]).append((e, s.input))
    ran: list[str] = []

    def pre(module, args, kwargs):
        for e, grid in by_module[id(module)][1:]:
            xs = call_inputs(e, args, kwargs)
            if not xs:
                raise LayerInputError(
                    f"{e.name!r} ({type(module).__name__}) was called without a tensor input "
                    f"(got {type(args[0]).__name__ if args else 'keyword arguments'}); qwidgets "
                    "cannot quantize it")
            if not inputs_checked:
                for x in {id(x): x for x in xs}.values():  # self-attention: one tensor, thrice
                    if x.is_floating_point() and id(x) not in checked:  # the batch's: checked
                        check_layer_input(x, f"the input of layer {e.name!r} ({describe_layer(module)})",
                                          model)
            if e.name not in ran:
                ran.append(e.name)
            args, kwargs = replace_inputs(e, args, kwargs, lambda v, g=grid: quantize_unchecked(v, g))
        return args, kwargs

    hooks = {items[0]: pre for items in by_module.values()}
    through_taps = tapped_inputs(settings)
    if through_taps:
        from .taps import tapping

        tap = QuantizeTap(through_taps, check=not inputs_checked, checked=checked)
        with tapping(model, tap):
            out = run_with_hooks(model, batch, hooks, pre=True, params=params)
        ran.extend(n for n in tap.ran if n not in ran)
    else:
        out = run_with_hooks(model, batch, hooks, pre=True, params=params)
    missing = [e.name for items in by_module.values() for e, _ in items[1:] if e.name not in ran]
    missing += [e.name for e in through_taps if e.name not in ran]
    if missing:
        raise ValueError(f"layer(s) {missing} did not run during the forward pass on this data, so "
                         "their inputs cannot be quantized (a module whose weight is used directly "
                         "by its parent never runs as a layer)")
    order = [n for n in ran] + [e.name for e in settings if e.name not in ran]
    return out, tuple(order)


def check_settings(model: nn.Module, settings) -> dict:
    """``settings`` (entry name -> LayerSetting) checked and keyed by :class:`Entry`."""
    if not isinstance(settings, Mapping):
        raise TypeError(f"settings must be a mapping from entry name to LayerSetting, got {type(settings).__name__}")
    entries = {e.name: e for e in find_entries(model)}
    entries.update(entries_named(model, [n for n in settings if isinstance(n, str) and n not in entries]))
    out = {}
    for name, s in settings.items():
        if not isinstance(name, str) or name not in entries:
            raise ValueError(f"settings names layer {name!r}, which is not in the model; available: "
                             f"quantizable entries {list(entries)}")
        if not isinstance(s, LayerSetting):
            raise TypeError(f"settings[{name!r}] must be a LayerSetting, got {type(s).__name__}")
        e = entries[name]
        if s.input is not None and not e.input_args:
            raise ValueError(f"settings[{name!r}] has an input grid, but {name!r} is a weight-only "
                             f"entry ({e.type_name}): its input cannot be quantized separately")
        if s.weight is not None and e.kind == "activation":
            raise ValueError(f"settings[{name!r}] has a weight grid, but {name!r} is an activation "
                             f"({e.type_name}): give it an input grid only")
        if not s.is_empty:
            out[e] = s
    return out
