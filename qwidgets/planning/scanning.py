"""Per-layer sensitivity scan: how much each layer, quantized alone, costs at each bit width.

Two scopes, measured for every quantizable layer and bit width:

- layer scope: the layer's own output, computed functionally from the input it received in one
  capturing pass (no further forward passes);
- model scope: the model's output with only that layer quantized, by an output-replacing hook
  on the user's model (no copies). For each layer the model runs once with the layer's output
  replaced by a stack along the batch axis of ``len(bits) + 2`` versions (one per bit width
  between two float copies), so the part of the model before the layer runs once for all bit
  widths. That is valid when the rest of the model treats samples independently (eval-mode
  BatchNorm, pooling, convolutions, residual additions of tensors computed after the layer);
  the float copies at both ends of the stack are the check: they must reproduce the float
  model's output. When the stacked pass fails (for example a skip connection from before the
  layer meets the stacked tensor) or the check fails (operations that mix samples), the layer
  is measured with one pass per bit width instead. Results are the same either way.
"""

from __future__ import annotations

from collections.abc import Sequence
from numbers import Integral

import numpy as np
from torch import nn

from ..core.checks import check_bits
from ..core.ranges import METHODS, fit_range
from ..model import capture, forward, layers, running
from .passes import layer_scope, model_scope
from .plan import model_fingerprint
from .schema import QUANTIZE_MODES, SCOPES
from .table import SensitivityTable


def scan(model: nn.Module, data, bits: Sequence[int] = (2, 3, 4, 5, 6, 8), *, quantize: str = "weight",
         method: str = "mse", per_channel: bool = True, scope: str = "both",
         max_samples: int | None = None, progress: bool = True) -> SensitivityTable:
    """Measure every quantizable layer, quantized alone, at every bit width in ``bits``.

    Parameters
    ----------
    model, data : the user's model and a batch it accepts (tensor, tuple of args or dict of
        kwargs); the model is left bit-identical
    bits : bit widths to try (ints in 1..16; sorted, duplicates dropped)
    quantize : ``"weight"`` (weights on a grid fitted to them, per output channel when
        ``per_channel``), ``"input"`` (the layer's input on a per-tensor grid fitted to what it
        received) or ``"both"`` (each bit width used for both)
    method : range fitting, as in :func:`qwidgets.fit_range` (``"minmax"``, ``"percentile"``,
        ``"mse"``)
    scope : ``"layer"`` (each layer's output), ``"model"`` (the model's output) or ``"both"``
    max_samples : use only the first that many samples of ``data``
    progress : show a progress bar (tqdm.auto)

    >>> import torch
    >>> from torch import nn
    >>> _ = torch.manual_seed(0)
    >>> net = nn.Sequential(nn.Linear(8, 16), nn.ReLU(), nn.Linear(16, 4))
    >>> t = scan(net, torch.randn(64, 8), bits=(4, 8), progress=False)
    >>> t.layers, t.sqnr_db("0", 8) > t.sqnr_db("0", 4) + 15
    (['0', '2'], True)
    """
    running.check_model(model)
    bits = _check_bits_tuple(bits)
    if quantize not in QUANTIZE_MODES:
        raise ValueError(f"quantize must be one of {', '.join(map(repr, QUANTIZE_MODES))}, got {quantize!r}")
    if method not in METHODS:
        raise ValueError(f"method must be one of {', '.join(map(repr, METHODS))}, got {method!r}")
    if scope not in SCOPES:
        raise ValueError(f"scope must be one of {', '.join(map(repr, SCOPES))}, got {scope!r}")
    if not isinstance(per_channel, bool):
        raise TypeError(f"per_channel must be True or False, got {per_channel!r}")
    max_samples = running.check_max_samples(max_samples)
    data = running.check_data(model, data, max_samples)
    inputs = capture.capture_inputs(model, data)
    modules = dict(model.named_modules())
    n_data = _batch_size(data)
    qw, qi = quantize in ("weight", "both"), quantize in ("input", "both")
    ref = forward.forward_float(model, data) if scope != "layer" else None

    names = list(inputs)
    info, wgrids, igrids = {}, {}, {}
    layer_sq = np.full((len(names), len(bits)), np.nan) if scope != "model" else None
    model_sq = np.full((len(names), len(bits)), np.nan) if scope != "layer" else None
    bar = _progress(len(names), progress)
    try:
        for i, name in enumerate(names):
            layer, x = modules[name], inputs[name]
            wg = [layers.fit_weight(layer, b, method, per_channel=per_channel) for b in bits] if qw else None
            ig = [fit_range(x, b, method) for b in bits] if qi else None
            wgrids[name], igrids[name] = wg, ig
            configs = [(None if wg is None else wg[j], None if ig is None else ig[j]) for j in range(len(bits))]
            info[name] = {"type": layers.base_type_name(layer), "weight_shape": tuple(layer.weight.shape),
                          "input_shape": tuple(x.shape[1:]),
                          "macs": layers.layer_macs(layer, tuple(x.shape)) // max(n_data, 1),
                          "model_pass": "-"}
            if layer_sq is not None:
                layer_sq[i] = layer_scope(layer, x, configs)
            if model_sq is not None:
                model_sq[i], info[name]["model_pass"] = model_scope(model, data, name, layer, configs, ref)
            bar.update(1)
    finally:
        bar.close()
    return SensitivityTable(layers=names, bits=bits, quantize=quantize, method=method,
                            per_channel=per_channel, fingerprint=model_fingerprint(model), info=info,
                            layer_sqnr=layer_sq, model_sqnr=model_sq,
                            weight_grids=wgrids if qw else None, input_grids=igrids if qi else None,
                            n_samples=n_data)


def _check_bits_tuple(bits) -> tuple[int, ...]:
    if isinstance(bits, Integral) and not isinstance(bits, bool):
        bits = (bits,)
    if isinstance(bits, (str, bytes)) or not isinstance(bits, Sequence):
        raise TypeError(f"bits must be a tuple of ints in 1..16, got {bits!r}")
    if len(bits) == 0:
        raise ValueError("bits is empty; give at least one bit width, e.g. bits=(4, 8)")
    return tuple(sorted({check_bits(b, "bits") for b in bits}))


def _batch_size(data) -> int:
    first = next(running.iter_tensors(data))
    return int(first.shape[0]) if first.dim() else 1


def _progress(total: int, show: bool):
    from tqdm.auto import tqdm

    return tqdm(total=total, desc="scan", unit="layer", disable=not show, leave=False)
