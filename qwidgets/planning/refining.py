"""Refine a whole plan: learn every entry's grids together against the model's output.

:func:`refine_plan` learns the scale, offset and noise width of every planned grid (weights
and, where the plan has them, inputs) at once by gradient descent through the relaxed
quantizer (:class:`qwidgets.learn.whole_plan.PlanGrids`), on what the whole model must
produce, and keeps the plan whose *hard* (round-to-nearest) model-output SQNR on the data was
best, the starting plan included.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Iterable, Mapping
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from numbers import Integral
from typing import Any

import torch
from torch import nn

from ..core.checks import check_positive
from ..core.device_rules import DeviceRules, check_rules
from ..core.metrics import error_stats
from ..learn.optim import Adam
from ..learn.whole_plan import LEARNABLE, SOURCES, PlanGrids
from ..model.outputs import check_output_fn, flat_output, float_parts, iter_tensors
from ..model.picking import join_batches, split_data
from ..model.running import check_data, check_model
from ..model.sources import Data
from .apply import match_plan
from .plan import Plan

__all__ = ["refine_plan", "RefineResult", "DEFAULT_LR", "MEASURE_TIMES", "TEMPERATURE", "NOISE_FACTOR"]

SMALL_MODEL = 1_000_000  # parameters; smaller models are refined on one torch thread
DEFAULT_LR = 0.05  # Adam's peak rate in log-scale / starting-step units
MEASURE_TIMES = 20  # hard measurements over a run (plus the start and the last step)
TEMPERATURE = (0.5, 0.1)  # concrete temperature at the first and the last step
NOISE_FACTOR = (1.0, 0.25)  # multiplier of the learned noise width at the first and the last step


@dataclass(frozen=True)
class RefineResult:
    """What :func:`refine_plan` found.

    ``plan``: the best plan by the hard quantizer's model-output SQNR on the data (same bit
    widths, integer zero points where the starting grids had them); ``start_sqnr_db`` /
    ``sqnr_db``: that SQNR for the starting and the returned plan; ``history``: one dict per
    measurement, ``{"step", "loss", "hard_sqnr_db"}`` (step 0 is the start, with ``loss``
    None; otherwise ``loss`` is the mean relaxed loss of the steps since the last
    measurement); ``best_step``: the step whose grids ``plan`` holds (0: the start);
    ``steps_run``: the steps taken (fewer than asked when the callback stopped the run);
    ``stopped``: True when the callback stopped it. A refined plan carries no
    ``predicted_sqnr_db`` (the allocator's prediction was for the starting grids); its measured
    figure is ``sqnr_db``.
    """

    plan: Plan
    start_sqnr_db: float
    sqnr_db: float
    history: list = field(repr=False)
    best_step: int
    steps_run: int = 0
    stopped: bool = False

    @property
    def improvement_db(self) -> float:
        """Hard model-output SQNR gained over the starting plan on the data given (>= 0)."""
        return self.sqnr_db - self.start_sqnr_db


def refine_plan(
    model: nn.Module,
    data: Data,
    plan: Plan,
    *,
    steps: int = 200,
    lr: float | None = None,
    loss: Callable[[Any, Any], torch.Tensor] | None = None,
    target: Any = None,
    batch_size: int = 64,
    learn: Iterable[str] = LEARNABLE,
    sources: Iterable[str] = SOURCES,
    progress: bool = True,
    seed: int = 0,
    callback: Callable[[int, RefineResult], object] | None = None,
    rules: DeviceRules | None = None,
    output: Callable | None = None,
    inputs: int | str | Callable | None = None,
) -> RefineResult:
    """Learn every planned grid together on the model's output (relaxed quantization).

    Works on a deep copy of ``model`` in eval mode (BatchNorm statistics and dropout untouched;
    the user's model stays bit-identical). Each entry's weight grid and input grid (where the
    plan has one) get a learned scale, offset (per channel for a per-channel grid) and noise
    width, as in :func:`qwidgets.learn_grid`, all trained at once with Adam on mini-batches of
    ``batch_size`` samples, the learning rate on a cosine decay to zero.

    The default loss is the mean squared difference between the relaxed model's output and
    the float model's (computed once), over the float output's mean square; with ``loss``,
    ``loss(output, target)`` is minimised instead (``target`` sliced along with the data;
    without ``target`` the float output is passed as the target).

    ``rules`` (:class:`qwidgets.DeviceRules`): the starting plan must obey them (else a
    ValueError lists what breaks them), and refining keeps it so: with power-of-two scales
    the scales are not learned (they stay the plan's powers of two), with symmetric weights
    the offsets are not learned (zero points stay as planned, 0 for the weights); widths,
    per-channel choices and integer zero points are never changed by refining.

    Annealing (common practice): the concrete temperature falls geometrically from 0.5 to 0.1
    and the noise width is multiplied by a factor falling geometrically from 1 to 0.25 over the
    run (never below 0.02 of a step), so the relaxed quantizer approaches the hard one.

    About 20 times in a run (and at the start and the last step) the hard (round-to-nearest)
    model's output SQNR on all of ``data`` is measured; the best plan measured, the starting
    plan included, is returned, so the result is never worse than the start on ``data``.
    ``callback(step, result_so_far)`` is called after each measurement (with the best plan so
    far); returning True stops the run there.

    Parameters
    ----------
    model : the user's model (only read)
    data : a batch the model accepts (tensor, tuple of args or dict of kwargs), or an iterable
        of such batches (a ``DataLoader``: joined along axis 0, held in memory); tensors whose
        first dimension is the number of samples are cut into mini-batches, others are passed whole
    plan : a :class:`qwidgets.Plan` made for ``model``
    steps : Adam steps (>= 0; 0 only measures the start)
    lr : peak learning rate (None: 0.05), in log-scale and starting-step units
    loss, target : see above
    batch_size : samples per step (all of them when there are fewer)
    learn : which of "scale", "offset", "noise" are learned
    sources : which grids are learned, of "weight" and "input" (the others stay fixed)
    progress : show a tqdm progress bar
    seed : seeds the mini-batches and the relaxed samples (a run is repeatable)
    callback : see above; for a widget: a progress readout and a stop button
    output : a function from the model's output to what is compared (the default loss and
        the hard SQNR; default: every floating-point tensor of the output)
    inputs : an index, a key or a function picking the model's inputs from the batch; then
        ``target`` may be an index, a key or a function picking the target from it

    >>> import torch
    >>> from torch import nn
    >>> from qwidgets import scan, plan_budget
    >>> _ = torch.manual_seed(0)
    >>> net = nn.Sequential(nn.Linear(8, 16), nn.ReLU(), nn.Linear(16, 4))
    >>> x = torch.randn(256, 8)
    >>> start = plan_budget(scan(net, x, bits=(2, 3), progress=False), mean_bits=9.0)  # stored bits per weight
    >>> r = refine_plan(net, x, start, steps=40, progress=False)
    >>> r.sqnr_db >= r.start_sqnr_db, r.plan.bits == start.bits
    (True, True)
    """
    check_model(model)
    output = check_output_fn(output)
    data, target = join_batches(*split_data(data, inputs, target), "refine_plan")
    if not isinstance(plan, Plan):
        raise TypeError(f"plan must be a Plan, got {type(plan).__name__}")
    _, skipped = match_plan(model, plan, strict=True)
    if skipped:
        raise ValueError(f"refine_plan needs every planned entry in the model; missing: {', '.join(skipped)}")
    steps = _check_int(steps, "steps", 0)
    batch_size = _check_int(batch_size, "batch_size", 1)
    seed = _check_int(seed, "seed", None)
    lr = DEFAULT_LR if lr is None else check_positive(lr, "lr")
    learn = _check_names(learn, "learn", LEARNABLE)
    sources = _check_names(sources, "sources", SOURCES)
    if check_rules(rules) is not None:
        broken = [f"{name} {role}: {why}" for name, s in plan.layers.items()
                  for role, g in (("weight", s.weight), ("input", s.input)) if g is not None
                  for why in rules.violations(g, role)]
        if broken:
            raise ValueError("the plan breaks the device rules, so refining cannot keep them: "
                             + "; ".join(broken[:5]) + ("; ..." if len(broken) > 5 else ""))
        learn = tuple(k for k in learn if not (k == "scale" and rules.pow2_scales)
                      and not (k == "offset" and rules.symmetric_weights))
    if not isinstance(progress, bool):
        raise TypeError(f"progress must be True or False, got {progress!r}")
    for name, fn in (("loss", loss), ("callback", callback)):
        if fn is not None and not callable(fn):
            raise TypeError(f"{name} must be callable or None, got {type(fn).__name__}")
    if target is not None and loss is None:
        raise ValueError("target is given but loss is None; give loss(output, target) to use targets "
                         "(without them the loss is the error against the float model's output)")
    data = check_data(model, data, None)
    n = _n_samples(data)
    if target is not None:
        _check_target(target, n)
    with _threads_for(model):
        return _refine(model, data, n, plan, steps=steps, lr=lr, loss=loss, target=target,
                       batch_size=batch_size, learn=learn, sources=sources, progress=progress,
                       seed=seed, callback=callback, output=output)


def _refine(model, data, n, plan, *, steps, lr, loss, target, batch_size, learn, sources,
            progress, seed, callback, output=None) -> RefineResult:
    grids = PlanGrids(model, plan.layers, learn=learn, sources=sources)
    reference = grids.float_output(data)
    ref_flat = flat_output(reference, "float", output)
    power = float(ref_flat.double().square().mean())
    if power == 0.0 and loss is None:
        raise ValueError("the model's float output is all zeros on this data; there is no error to learn against")
    shapes = [tuple(t.shape) for t in float_parts(reference, "float", output)]
    if any(len(sh) == 0 or sh[0] != n for sh in shapes):
        raise ValueError(f"the model's output tensors must have one row per sample ({n}) to be compared "
                         f"batch by batch, got shapes {shapes}")

    def measure(settings) -> float:
        return error_stats(ref_flat, flat_output(grids.hard(data, settings), "quantized", output)).sqnr_db

    start_settings = dict(plan.layers)
    best = [measure(start_settings), start_settings, 0]
    start_sqnr = best[0]
    history: list[dict] = [{"step": 0, "loss": None, "hard_sqnr_db": start_sqnr}]
    params = grids.parameters()
    opt = Adam(params)
    gen = torch.Generator().manual_seed(seed)
    order = torch.empty(0, dtype=torch.int64)
    every = max(1, steps // MEASURE_TIMES)
    window_losses: list[float] = []
    stopped, step = False, 0
    bar = _progress(steps, progress)
    try:
        for step in range(1, steps + 1):
            if order.numel() < min(batch_size, n):
                order = torch.cat([order, torch.randperm(n, generator=gen)])
            idx, order = order[:min(batch_size, n)], order[min(batch_size, n):]
            frac = (step - 1) / max(steps - 1, 1)
            out = grids.relaxed(_take(data, idx, n), temperature=_geometric(TEMPERATURE, frac),
                                noise_factor=_geometric(NOISE_FACTOR, frac), generator=gen)
            ref_batch = _take(reference, idx, n)
            if loss is None:
                value = (_flat_with_grad(out if output is None else output(out))
                         - flat_output(ref_batch, "float", output).to(torch.float64)).square().mean() / power
            else:
                value = _user_loss(loss, out, ref_batch if target is None else _take(target, idx, n))
            if params:
                for p in params:
                    p.grad = None
                value.backward()
                opt.step(lr * 0.5 * (1.0 + math.cos(math.pi * (step - 1) / steps)))
            window_losses.append(float(value.detach()))
            if bar is not None:
                bar.update(1)
            if step % every and step != steps:
                continue
            settings = grids.settings()
            sqnr = measure(settings)
            history.append({"step": step, "loss": sum(window_losses) / len(window_losses), "hard_sqnr_db": sqnr})
            window_losses = []
            if sqnr > best[0]:
                best = [sqnr, settings, step]
            if bar is not None:
                bar.set_postfix(hard_sqnr=f"{sqnr:.2f} dB", best=f"{best[0]:.2f} dB")
            if callback is not None and callback(step, _result(plan, best, start_sqnr, history, step, False)) is True:
                stopped = True
                break
    finally:
        if bar is not None:
            bar.close()
    return _result(plan, best, start_sqnr, history, step, stopped)


# ---------------------------------------------------------------------------- internals
@contextmanager
def _threads_for(model: nn.Module):
    """One torch thread for a small model: its small convolutions and matrix products gain
    nothing from a second thread and lose several times over when another process holds a
    core (measured on the demo model); restored afterwards."""
    threads = torch.get_num_threads()
    if sum(p.numel() for p in model.parameters()) < SMALL_MODEL:
        torch.set_num_threads(1)
    try:
        yield
    finally:
        torch.set_num_threads(threads)


def _result(plan, best, start_sqnr, history, steps_run, stopped) -> RefineResult:
    sqnr, settings, best_step = best
    new = plan if best_step == 0 else replace(plan, layers=settings, predicted_sqnr_db=None)
    return RefineResult(new, start_sqnr, sqnr, list(history), best_step, steps_run, stopped)


def _flat_with_grad(out) -> torch.Tensor:
    """Every floating-point tensor of the output, flattened and joined (keeps the graph)."""
    parts = [t.reshape(-1).to(torch.float64) for t in iter_tensors(out) if t.is_floating_point()]
    if not parts:
        raise ValueError(f"the model's output holds no floating-point tensor (got {type(out).__name__})")
    return parts[0] if len(parts) == 1 else torch.cat(parts)


def _user_loss(loss, out, target) -> torch.Tensor:
    value = loss(out, target)
    if not isinstance(value, torch.Tensor) or value.numel() != 1 or not value.is_floating_point():
        raise TypeError(f"loss(output, target) must return a floating-point tensor with one value, got "
                        f"{type(value).__name__}{'' if not isinstance(value, torch.Tensor) else tuple(value.shape)}")
    if not value.requires_grad:
        raise ValueError("loss(output, target) returned a value with no gradient; compute it from the "
                         "output with torch operations (no .item(), .detach() or numpy)")
    return value.reshape(())


def _geometric(ends: tuple[float, float], frac: float) -> float:
    return ends[0] * (ends[1] / ends[0]) ** frac


def _n_samples(data) -> int:
    for t in iter_tensors(data):
        if t.dim() >= 1:
            return int(t.shape[0])
    raise ValueError("data holds no tensor with a sample dimension to cut into mini-batches")


def _take(obj, idx: torch.Tensor, n: int):
    """``obj`` with every tensor whose first dimension is ``n`` indexed by ``idx`` (others whole)."""
    if isinstance(obj, torch.Tensor):
        return obj[idx] if obj.dim() >= 1 and obj.shape[0] == n else obj
    if isinstance(obj, Mapping):
        return {k: _take(v, idx, n) for k, v in obj.items()}
    if isinstance(obj, tuple):
        return tuple(_take(v, idx, n) for v in obj)
    if isinstance(obj, list):
        return [_take(v, idx, n) for v in obj]
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return dataclasses.replace(obj, **{f.name: _take(getattr(obj, f.name), idx, n)
                                           for f in dataclasses.fields(obj) if f.init})
    return obj


def _check_target(target, n: int) -> None:
    tensors = list(iter_tensors(target))
    if not tensors or not all(t.dim() >= 1 and t.shape[0] == n for t in tensors):
        shapes = [tuple(t.shape) for t in tensors]
        raise ValueError(f"target must hold tensors with one row per sample ({n}), got shapes {shapes}")


def _check_int(value, name: str, low: int | None) -> int:
    if isinstance(value, bool) or not isinstance(value, Integral):
        raise TypeError(f"{name} must be an int, got {value!r}")
    if low is not None and value < low:
        raise ValueError(f"{name} must be >= {low}, got {value}")
    return int(value)


def _check_names(value, name: str, allowed: tuple[str, ...]) -> tuple[str, ...]:
    if isinstance(value, str):
        value = (value,)
    if not isinstance(value, (tuple, list, set, frozenset)):
        raise TypeError(f"{name} must be a tuple of names from {allowed}, got {type(value).__name__}")
    bad = [v for v in value if v not in allowed]
    if bad:
        raise ValueError(f"{name} holds {bad}; allowed: {', '.join(map(repr, allowed))}")
    return tuple(dict.fromkeys(value))


def _progress(steps: int, show: bool):
    if not show or steps == 0:
        return None
    from tqdm.auto import tqdm

    return tqdm(total=steps, desc="refining the plan", unit="step", leave=False)
