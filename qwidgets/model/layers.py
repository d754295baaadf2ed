"""Quantizable layers and their functional evaluation.

Conventions (one place, used by the scan, the explorer and the planner):

- layers that run as modules with a tensor input are ``nn.Linear``, ``nn.Conv1d/2d/3d`` and
  ``nn.ConvTranspose1d/2d/3d`` and their subclasses (other weights, attention projections,
  recurrent matrices and embeddings, are entries of :mod:`qwidgets.model.entries`);
- weights are quantized per output channel: axis 0 (``WEIGHT_AXIS``), except transposed
  convolutions, whose weight is ``(in, out / groups, *kernel)``: axis 1 (:func:`weight_axis`);
- a layer's output under quantization is computed functionally (``layer_output``) from its
  weight, bias and hyper-parameters, never by changing the layer.
"""

from __future__ import annotations

import math
from collections.abc import Iterable

import torch
import torch.nn.functional as F
from torch import nn

from ..core.checks import as_input
from ..core.grid import UniformGrid, grid_params
from ..core.ranges import fit_range
from ..core.rounding import quantize, quantize_unchecked
from ..core.token_grid import TokenGrid

QUANTIZABLE_TYPES: tuple[type[nn.Module], ...] = (
    nn.Linear, nn.Conv1d, nn.Conv2d, nn.Conv3d,
    nn.ConvTranspose1d, nn.ConvTranspose2d, nn.ConvTranspose3d,
)


WEIGHT_AXIS = 0  # weights of Linear / Conv layers are quantized per output channel (axis 0)


_CONV = {nn.Conv1d: F.conv1d, nn.Conv2d: F.conv2d, nn.Conv3d: F.conv3d}


_CONV_T = {nn.ConvTranspose1d: F.conv_transpose1d, nn.ConvTranspose2d: F.conv_transpose2d,
           nn.ConvTranspose3d: F.conv_transpose3d}


def weight_axis(layer: nn.Module) -> int:
    """The output-channel axis of a layer's weight: 1 for transposed convolutions, else 0.

    >>> from torch import nn
    >>> weight_axis(nn.Conv2d(2, 4, 3)), weight_axis(nn.ConvTranspose2d(2, 4, 3))
    (0, 1)
    """
    return 1 if isinstance(layer, tuple(_CONV_T)) else WEIGHT_AXIS


class LayerInputError(ValueError):
    """A problem found by one of our hooks inside the forward (reported as it is, not wrapped)."""


def is_quantizable(module: nn.Module) -> bool:
    """True for ``nn.Linear``, ``nn.Conv1d/2d/3d``, ``nn.ConvTranspose1d/2d/3d`` (and subclasses).

    >>> from torch import nn
    >>> is_quantizable(nn.Conv2d(1, 2, 3)), is_quantizable(nn.ReLU())
    (True, False)
    """
    return isinstance(module, QUANTIZABLE_TYPES)


def fit_weight(layer: nn.Module, bits: int, method: str = "mse", *, per_channel: bool = True,
               **options) -> UniformGrid:
    """Fit a grid to a layer's weight (per output channel, :func:`weight_axis`, by default).

    ``options`` go to :func:`qwidgets.fit_range` (``symmetric``, ``style``, ``percentile``, ...).

    >>> import torch
    >>> from torch import nn
    >>> _ = torch.manual_seed(0)
    >>> g = fit_weight(nn.Linear(8, 3), 4, "minmax")
    >>> g.axis, tuple(g.scale.shape)
    (0, (3,))
    """
    check_layer(layer, "layer")
    return fit_range(layer.weight.detach(), bits, method,
                     axis=weight_axis(layer) if per_channel else None, **options)


def layer_output(
    layer: nn.Module,
    inputs: torch.Tensor,
    weight_grid: UniformGrid | None = None,
    input_grid: UniformGrid | None = None,
) -> torch.Tensor:
    """The layer's output on ``inputs``, with its weight and / or its inputs fake-quantized.

    Computed with ``torch.nn.functional`` from the layer's weight, bias, stride, padding
    (and padding mode), dilation and groups; the layer itself is not called and not changed.
    Subclasses of Linear / Conv are evaluated with the base class's arithmetic. No gradient
    is recorded.

    >>> import torch
    >>> from torch import nn
    >>> lin = nn.Linear(3, 2)
    >>> x = torch.randn(5, 3)
    >>> torch.allclose(layer_output(lin, x), lin(x))
    True
    """
    check_layer(layer, "layer")
    x = check_tensor(inputs, "inputs")
    check_layer_grids(layer, weight_grid, input_grid)
    return output_on_grids(layer, x, weight_grid, input_grid)


def check_layer_grids(layer: nn.Module, weight_grid, input_grid) -> None:
    """Both grids None or a UniformGrid; a per-channel weight grid fits the weight's shape."""
    if input_grid is not None and not isinstance(input_grid, TokenGrid):
        check_grid(input_grid, "input_grid")
    if weight_grid is not None:
        check_grid(weight_grid, "weight_grid")
        grid_params(layer.weight.detach(), weight_grid)  # shape check with a clear message


def output_on_grids(layer: nn.Module, x: torch.Tensor, weight_grid=None, input_grid=None):
    """:func:`layer_output` for arguments already checked (by :func:`check_layer`,
    :func:`check_tensor` and :func:`check_layer_grids` at the public entry point)."""
    w = layer.weight.detach()
    with torch.no_grad():
        if input_grid is not None:
            x = quantize_unchecked(x, input_grid)
        if weight_grid is not None:
            w = quantize(w, weight_grid)  # the first look at the weight's values
        return layer_forward(layer, x, w)


def layer_forward(layer: nn.Module, x: torch.Tensor, w: torch.Tensor, *, use_bias: bool = True,
                  output_padding=None) -> torch.Tensor:
    b = None if (layer.bias is None or not use_bias) else layer.bias.detach()
    try:
        if isinstance(layer, nn.Linear):
            return F.linear(x, w, b)
        conv_t = next((f for t, f in _CONV_T.items() if isinstance(layer, t)), None)
        if conv_t is not None:
            op = layer.output_padding if output_padding is None else output_padding
            return conv_t(x, w, b, layer.stride, layer.padding, op, layer.groups, layer.dilation)
        conv = next(f for t, f in _CONV.items() if isinstance(layer, t))
        padding = layer.padding
        if layer.padding_mode != "zeros":
            x = F.pad(x, layer._reversed_padding_repeated_twice, mode=layer.padding_mode)
            padding = 0
        return conv(x, w, b, layer.stride, padding, layer.dilation, layer.groups)
    except RuntimeError as e:
        raise ValueError(
            f"inputs of shape {tuple(x.shape)} (dtype {x.dtype}) do not fit {describe_layer(layer)}: {e}"
        ) from e


def layer_macs(layer: nn.Module, input_shape: Iterable[int]) -> int:
    """Multiply-accumulates of one call of ``layer`` on an input of ``input_shape``.

    Counts the whole shape given (pass a batch of 1 for a per-sample count); bias additions
    are not counted. Uses a shape-only ("meta") evaluation, so it costs no arithmetic.

    >>> from torch import nn
    >>> layer_macs(nn.Linear(10, 4), (1, 10)), layer_macs(nn.Conv2d(3, 8, 3, padding=1), (1, 3, 32, 32))
    (40, 221184)
    """
    check_layer(layer, "layer")
    shape = tuple(int(s) for s in input_shape)
    w = layer.weight
    x = torch.empty(shape, device="meta", dtype=w.dtype)
    out = layer_forward(layer, x, torch.empty(w.shape, device="meta", dtype=w.dtype), use_bias=False)
    if isinstance(layer, nn.Linear):
        return out.numel() * layer.in_features
    if isinstance(layer, tuple(_CONV_T)):  # every input value meets (out / groups) * kernel weights
        return x.numel() * (layer.out_channels // layer.groups) * math.prod(layer.kernel_size)
    per_output = (layer.in_channels // layer.groups) * math.prod(layer.kernel_size)
    return out.numel() * per_output


BASE_FORWARDS = {t.forward for t in QUANTIZABLE_TYPES}


def check_same_math(module, name, x, output) -> None:
    """A subclass that overrides forward must still compute what layer_output computes."""
    ref = layer_forward(module, x, module.weight.detach())
    if not isinstance(output, torch.Tensor) or output.shape != ref.shape or not torch.allclose(
        output, ref, rtol=1e-4, atol=1e-5 * float(ref.abs().max().clamp(min=1))
    ):
        raise LayerInputError(
            f"layer {name!r} ({type(module).__name__}) overrides forward and its output differs "
            f"from the {base_type_name(module)} arithmetic qwidgets evaluates; it cannot be "
            "evaluated functionally"
        )


def check_layer(layer, name: str) -> None:
    if not isinstance(layer, nn.Module):
        raise TypeError(f"{name} must be a torch.nn.Module, got {type(layer).__name__}")
    if not is_quantizable(layer):
        raise TypeError(
            f"{name} is a {type(layer).__name__}; qwidgets evaluates only nn.Linear, "
            "nn.Conv1d/2d/3d and nn.ConvTranspose1d/2d/3d (and subclasses) functionally"
        )


def check_grid(grid, name: str) -> None:
    if not isinstance(grid, UniformGrid):
        raise TypeError(f"{name} must be a UniformGrid or None, got {type(grid).__name__}")


def check_tensor(x, name: str) -> torch.Tensor:
    if not isinstance(x, torch.Tensor):
        raise TypeError(f"{name} must be a torch.Tensor, got {type(x).__name__}")
    if x.numel() == 0:
        raise ValueError(f"{name} is empty (shape {tuple(x.shape)})")
    if x.is_floating_point():
        as_input(x, name)  # NaN / inf check with a count
    return x.detach()


def base_type_name(module) -> str:
    return next(t.__name__ for t in QUANTIZABLE_TYPES if isinstance(module, t))


def describe_layer(layer) -> str:
    if isinstance(layer, nn.Linear):
        return f"Linear(in_features={layer.in_features}, out_features={layer.out_features})"
    if isinstance(layer, QUANTIZABLE_TYPES):
        return (f"{base_type_name(layer)}(in_channels={layer.in_channels}, out_channels="
                f"{layer.out_channels}, kernel_size={layer.kernel_size})")
    return type(layer).__name__
