"""Learn one layer's grid (scale, offset, noise) by gradient descent through relaxed quantization.

The relaxed quantizer replaces rounding by a concrete (Gumbel-softmax) sample over the grid's
bins under logistic noise (:func:`qwidgets.relaxed_quantize`), so the layer's output error is
differentiable in the grid's scale and offset and in the noise width. :func:`learn_grid`
minimises that error with Adam and, after every step, measures the *hard* (round-to-nearest)
quantizer's layer-output error; it returns the grid that was best by that measure, the starting
grid included, so learning never leaves the user worse off than where they started.

Units: the core functions (:func:`qwidgets.relaxed_quantize`, ...) take ``noise``, the logistic
noise width in the units of the values; here the width is learned relative to the grid step,
as ``noise_steps`` (a fraction of the step: ``noise = noise_steps * scale``).

Parametrisation (so one learning rate suits any layer): ``scale = scale0 * exp(a)``,
``offset = offset0 + scale0 * b`` and ``noise_steps = exp(c)``, with ``a``, ``b`` (per channel
for a per-channel grid) and ``c`` (one value) the learned numbers. The learning rate follows a cosine decay to zero over the steps (common practice).
The user's layer is only read: its weights are detached and never receive gradients.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from numbers import Integral
from typing import Any

import torch

from ..core.checks import as_input, check_positive
from ..core.grid import UniformGrid
from ..core.metrics import ErrorStats, error_stats
from ..core.relaxed import relaxed_quantize
from ..core.rounding import quantize
from ..core.setting import SOURCES
from ..model.layers import check_layer, layer_forward, output_on_grids
from .optim import Adam

__all__ = ["learn_grid", "LearnResult", "SOURCES"]

DEFAULT_NOISE_STEPS = 0.3  # fraction of the grid step: nearest bin ~0.68 for a value at a bin centre
MIN_NOISE_STEPS = 0.02  # fraction of the step; below it the relaxed gradients vanish
_NOT_GIVEN = object()


@dataclass(frozen=True)
class LearnResult:
    """What :func:`learn_grid` found.

    grid: the best grid by the hard quantizer's layer-output error (scale / offset as floats,
    or 1-D tensors for a per-channel grid; nothing attached to an autograd graph);
    noise_steps: its logistic noise width as a fraction of the grid step (``noise_width``: the
    same width in the values' units, the ``noise`` the core functions take); loss: the relaxed quantizer's relative output error (mean squared error over
    the mean squared float output) at each step; hard_sqnr_db: the hard quantizer's layer-output
    SQNR of the starting grid (index 0) and after each step; best_step: the index in
    ``hard_sqnr_db`` of the grid returned; stats / start_stats: hard layer-output
    :class:`ErrorStats` of the returned and the starting grid.
    """

    grid: UniformGrid
    noise_steps: float
    source: str
    loss: list = field(repr=False)
    hard_sqnr_db: list = field(repr=False)
    best_step: int
    stats: ErrorStats
    start_stats: ErrorStats

    @property
    def noise_width(self) -> float | torch.Tensor:
        """The noise in the values' units (``noise_steps * scale``), as the core functions take it."""
        return self.noise_steps * self.grid.scale

    @property
    def noise(self) -> float:
        """Deprecated: the fraction of the step, now ``noise_steps`` (``noise_width`` is in value units)."""
        warnings.warn("LearnResult.noise is deprecated: use noise_steps (a fraction of the grid "
                      "step) or noise_width (value units)", DeprecationWarning, stacklevel=2)
        return self.noise_steps

    @property
    def improvement_db(self) -> float:
        """Hard layer-output SQNR gained over the starting grid (>= 0)."""
        return self.stats.sqnr_db - self.start_stats.sqnr_db


def learn_grid(
    layer: torch.nn.Module,
    inputs: torch.Tensor,
    grid: UniformGrid,
    *,
    source: str = "weight",
    noise_steps: float | None = None,
    temperature: float = 0.5,
    steps: int = 200,
    lr: float = 0.2,
    window: int | None = None,
    progress: bool = True,
    learn_offset: bool = True,
    seed: int = 0,
    callback: Callable[[int, UniformGrid, float, ErrorStats], object] | None = None,
    noise: Any = _NOT_GIVEN,
) -> LearnResult:
    """Learn ``grid``'s scale and offset and a noise width for one layer (relaxed quantization).

    Parameters
    ----------
    layer : ``nn.Linear`` or ``nn.Conv1d/2d/3d`` (read only, never modified)
    inputs : what the layer receives (e.g. from :func:`qwidgets.capture_inputs`): a tensor,
        a numpy array, or a ``DataLoader`` / iterable of them (joined along axis 0: every step
        reads all of them, so they are held in memory)
    grid : starting grid for ``source`` (per-tensor, or per-channel along its ``axis``)
    source : ``"weight"`` quantizes the layer's weights, ``"input"`` what it receives
    noise_steps : starting logistic noise width as a fraction of the grid step, >= 0.02
        (None: 0.3); the core functions' ``noise`` is ``noise_steps * scale``, in value units
    temperature : concrete (Gumbel-softmax) temperature of the relaxed samples, > 0
    steps : Adam steps (>= 0; 0 only measures the starting grid)
    lr : Adam's peak learning rate, in log-scale / grid-step units, cosine-decayed to 0
    window : bins per value for the relaxed quantizer; None picks all bins for grids of up to
        8 levels and 5 bins otherwise (the cost does not grow with the bit width)
    progress : show a tqdm progress bar
    learn_offset : also learn the offset (False keeps it, e.g. to keep an integer zero point)
    seed : seeds the relaxed samples, so a run is repeatable
    callback : called after every step as ``callback(step, grid, noise_steps, hard_stats)``
        (``noise_steps`` a fraction of the step; for a widget to follow the learning); when it
        returns True, learning stops after that step and the best grid so far is returned
    noise : deprecated alias of ``noise_steps`` (same unit: a fraction of the grid step; warns)

    >>> import torch
    >>> torch.manual_seed(0) and None
    >>> layer = torch.nn.Linear(16, 8)
    >>> x = torch.randn(64, 16)
    >>> poor = UniformGrid(3, 0.2)  # far too coarse for weights of about +-0.25
    >>> r = learn_grid(layer, x, poor, steps=60, progress=False)
    >>> r.stats.sqnr_db > r.start_stats.sqnr_db, r.grid.scale < 0.2
    (True, True)
    """
    check_layer(layer, "layer")
    if not isinstance(grid, UniformGrid):
        raise TypeError(f"grid must be a UniformGrid, got {type(grid).__name__}")
    if source not in SOURCES:
        raise ValueError(f"source must be 'weight' or 'input', got {source!r}")
    if isinstance(steps, bool) or not isinstance(steps, Integral):
        raise TypeError(f"steps must be an int >= 0, got {steps!r} ({type(steps).__name__})")
    if steps < 0:
        raise ValueError(f"steps must be an int >= 0, got {steps}")
    lr = check_positive(lr, "lr")
    temperature = check_positive(temperature, "temperature")
    name = "noise_steps"
    if noise is not _NOT_GIVEN:
        if noise_steps is not None:
            raise TypeError("give noise_steps only (noise is its deprecated alias), not both")
        warnings.warn("learn_grid(noise=...) is deprecated: call it noise_steps (a fraction of "
                      "the grid step; the core functions' noise is in value units)",
                      DeprecationWarning, stacklevel=2)
        noise_steps, name = noise, "noise"
    if noise_steps is None:
        noise_steps = DEFAULT_NOISE_STEPS
    noise_steps = check_positive(noise_steps, name)
    if isinstance(noise_steps, torch.Tensor):
        raise TypeError(f"{name} must be a float (a fraction of the grid step), got a tensor")
    if noise_steps < MIN_NOISE_STEPS:
        raise ValueError(f"{name} must be >= {MIN_NOISE_STEPS} (a fraction of the grid step), "
                         f"got {noise_steps}")
    if callback is not None and not callable(callback):
        raise TypeError(f"callback must be callable or None, got {type(callback).__name__}")
    x, _ = as_input(_joined(inputs, layer), "inputs")
    w = layer.weight.detach().float()
    target = w if source == "weight" else x.detach().float()
    window = _pick_window(window, grid)

    with torch.no_grad():
        reference = output_on_grids(layer, x).float()
    ref_power = float(reference.double().square().mean())
    if ref_power == 0.0:
        raise ValueError("the layer's float output is all zeros; there is no error to learn against")

    def hard_stats(g: UniformGrid) -> ErrorStats:
        with torch.no_grad():
            return error_stats(reference, _output(layer, x, source, quantize(target, g)))

    start = grid.detached()
    start_stats = hard_stats(start)
    best = (start_stats, start, float(noise_steps), 0)
    losses: list[float] = []
    sqnr = [start_stats.sqnr_db]

    s0 = start.scale_tensor().float()
    o0 = start.offset_tensor().float()
    log_scale = torch.zeros_like(s0, requires_grad=True)
    shift = torch.zeros_like(o0, requires_grad=True)
    log_noise = torch.tensor(math.log(float(noise_steps)), requires_grad=True)
    params = [log_scale, log_noise] + ([shift] if learn_offset else [])
    opt = Adam(params)
    gen = torch.Generator(device=target.device).manual_seed(int(seed))
    bar = _progress(steps, progress)
    try:
        for step in range(1, steps + 1):
            scale = s0 * torch.exp(log_scale)
            offset = o0 + s0 * shift
            frac = torch.exp(log_noise).clamp(min=MIN_NOISE_STEPS)
            g = start.replace(scale=scale, offset=offset)
            relaxed = relaxed_quantize(target, g, frac * scale,
                                       temperature, window=window, generator=gen)
            out = _output(layer, x, source, relaxed)
            loss = (out - reference).square().mean() / ref_power
            for p in params:
                p.grad = None
            loss.backward()
            opt.step(lr * 0.5 * (1.0 + math.cos(math.pi * (step - 1) / steps)))
            losses.append(loss.item())
            current = _detached_grid(start, s0 * torch.exp(log_scale), o0 + s0 * shift)
            stats = hard_stats(current)
            sqnr.append(stats.sqnr_db)
            if stats.sqnr_db > best[0].sqnr_db:
                best = (stats, current, float(torch.exp(log_noise.detach()).clamp(min=MIN_NOISE_STEPS)), step)
            stop = False
            if callback is not None:
                stop = callback(step, current, float(torch.exp(log_noise.detach()).clamp(min=MIN_NOISE_STEPS)),
                                stats) is True
            if bar is not None:
                bar.update(1)
                bar.set_postfix(hard_sqnr=f"{stats.sqnr_db:.2f} dB", best=f"{best[0].sqnr_db:.2f} dB")
            if stop:
                break
    finally:
        if bar is not None:
            bar.close()
    stats, best_grid, best_noise, best_step = best
    return LearnResult(best_grid, best_noise, source, losses, sqnr, best_step, stats, start_stats)


# ---------------------------------------------------------------------------- internals
def _output(layer, x, source, quantized):
    """The layer's arithmetic with the quantized weight or input in place (differentiable)."""
    if source == "weight":
        return layer_forward(layer, x, quantized)
    return layer_forward(layer, quantized, layer.weight.detach())


def _pick_window(window, grid: UniformGrid):
    if window is not None:
        return window  # validated by the relaxed quantizer
    return None if grid.n_levels <= 8 else 5




def _detached_grid(start: UniformGrid, scale: torch.Tensor, offset: torch.Tensor) -> UniformGrid:
    scale, offset = scale.detach().clone(), offset.detach().clone()
    if start.axis is None and not isinstance(start.scale, torch.Tensor):
        return start.replace(scale=float(scale), offset=float(offset) + 0.0)
    return start.replace(scale=scale, offset=offset)


def _progress(steps: int, show: bool):
    if not show or steps == 0:
        return None
    from tqdm.auto import tqdm

    return tqdm(total=steps, desc="learning the grid", unit="step", leave=False)


def _joined(inputs, layer):
    """A tensor from a tensor, a numpy array or an iterable of them (joined along axis 0)."""
    if isinstance(inputs, torch.Tensor):
        return inputs
    from ..model.sources import data_source

    batches = list(data_source(layer, inputs, name="inputs"))
    if not all(isinstance(b, torch.Tensor) for b in batches):
        raise TypeError("inputs must be a tensor, a numpy array or an iterable of tensors")
    return batches[0] if len(batches) == 1 else torch.cat(batches)
