"""Every planned entry's grids as learnable numbers, and a copy of the model run with them.

:class:`PlanGrids` is the machinery behind :func:`qwidgets.refine_plan`: it deep-copies the
model (eval mode, parameters frozen), parameterises each entry's weight grid and input grid as
:func:`qwidgets.learn_grid` does, and runs the copy either with *relaxed* grids (concrete
samples through :func:`qwidgets.relaxed_quantize`, differentiable in every scale, offset and
noise width at once) or with *hard* grids (round to nearest, what :func:`qwidgets.apply_plan`
computes). A per-token input (:class:`qwidgets.TokenGrid`) has nothing to learn: it is kept
as it is and quantizes the same way in both modes, gradients passing straight through.

Entries are the plan's, found with :func:`qwidgets.model.entries.find_entries` (Linear, Conv,
ConvTranspose, attention projections, recurrent matrices, embeddings; a tied tensor once):
weights are substituted by parameter name with :func:`torch.func.functional_call` (tied
weights kept tied), inputs (for entries that run as modules) quantized by forward pre-hooks on
the copy. The user's model is only read (deep-copied once).

Parametrisation, per entry and source: ``scale = scale0 * exp(a)``, ``offset = offset0 +
scale0 * b`` (``a`` and ``b`` per channel for a per-channel grid) and the noise width
``exp(c) * scale`` (``c`` one value: the noise as a fraction of the step), so one learning rate
suits every entry whatever its range.
"""

from __future__ import annotations

import copy
import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass

import torch
from torch import nn

from ..core.grid import UniformGrid, grid_params
from ..core.relaxed import relaxed_quantize
from ..core.rounding import quantize, quantize_unchecked
from ..core.setting import SOURCES, LayerSetting
from ..core.token_grid import TokenGrid
from ..model.entries import find_entries, replace_inputs, tapped
from ..model.fastpath import attention_fastpath_off
from ..model.tap_quantize import EachTap
from ..model.taps import attach
from ..model.usage import entries_named
from .one_grid import DEFAULT_NOISE_STEPS

__all__ = ["PlanGrids", "GridEntry", "LEARNABLE", "SOURCES", "MIN_NOISE"]

LEARNABLE = ("scale", "offset", "noise")
MIN_NOISE = 0.02  # fraction of the grid step; below it the relaxed gradients vanish


@dataclass(eq=False)
class GridEntry:
    """One learned grid: ``name`` (the plan's entry), ``source`` ("weight" / "input"), the
    starting grid, the weight's parameter name, and the learned numbers ``a`` (log scale
    factor), ``b`` (offset shift in starting steps) and ``c`` (log noise fraction)."""

    name: str
    source: str
    start: UniformGrid
    param: str
    a: torch.Tensor
    b: torch.Tensor
    c: torch.Tensor
    zero_point: bool

    def grid(self, a=None, b=None) -> UniformGrid:
        """The grid for the current (or the given) numbers, attached to the autograd graph."""
        a = self.a if a is None else a
        b = self.b if b is None else b
        scale = self._s0() * torch.exp(a)
        return self.start.replace(scale=scale, offset=self._offset(scale, b))

    def _offset(self, scale: torch.Tensor, b: torch.Tensor) -> torch.Tensor:
        s0 = self._s0()
        if not self.zero_point:
            return self._o0() + s0 * b
        # keep an integer zero point: Z = round(Z0 - b), with the straight-through gradient of
        # Z0 - b, so the relaxed and the hard quantizer see the same grid (common practice)
        z = -self._o0() / s0 - b
        z = z + (torch.round(z) - z).detach()
        return -z * scale

    def noise_width(self, grid: UniformGrid, factor: float, c=None) -> torch.Tensor:
        """The logistic noise in the values' units: ``max(exp(c) * factor, MIN_NOISE) * scale``."""
        c = self.c if c is None else c
        return (torch.exp(c) * factor).clamp(min=MIN_NOISE) * grid.scale_tensor()

    def final(self) -> UniformGrid:
        """The current grid, detached (an integer zero point where the start had one)."""
        with torch.no_grad():
            scale = (self._s0() * torch.exp(self.a)).clone()
            offset = self._offset(scale, self.b).clone()
        if self.start.axis is None and not isinstance(self.start.scale, torch.Tensor):
            g = self.start.replace(scale=float(scale), offset=float(offset) + 0.0)
        else:
            g = self.start.replace(scale=scale, offset=offset)
        return g.snapped() if self.zero_point else g  # snapped: exact multiples after rounding

    def _s0(self) -> torch.Tensor:
        return self.start.scale_tensor().to(self.a.dtype)

    def _o0(self) -> torch.Tensor:
        return self.start.offset_tensor().to(self.b.dtype)


class _InputHook:
    """Forward pre-hook on the copy: quantizes the entry's inputs (relaxed or hard): a
    layer's first argument, an attention projection's query / key / value (the arguments
    :func:`qwidgets.apply_plan` quantizes)."""

    def __init__(self, owner: PlanGrids, entry):
        self.owner, self.entry = owner, entry

    def __call__(self, module, args, kwargs):
        if self.owner._mode is None:
            return None
        return replace_inputs(self.entry, args, kwargs,
                              lambda v: self.owner._quantize_input(self.entry.name, v))


class PlanGrids:
    """A frozen, eval-mode copy of ``model`` whose planned grids are learnable.

    ``settings``: entry name -> :class:`qwidgets.LayerSetting` (a plan's ``layers``);
    ``learn``: which of "scale", "offset", "noise" get gradients; ``sources``: which of
    "weight", "input" are learned (the other grids still quantize, fixed); ``noise_steps``:
    the starting noise width as a fraction of the step (the core functions' ``noise`` is
    ``noise_steps * scale``, in value units).

    >>> import torch
    >>> from torch import nn
    >>> from qwidgets import LayerSetting, UniformGrid
    >>> net = nn.Sequential(nn.Linear(4, 3), nn.ReLU(), nn.Linear(3, 2))
    >>> pg = PlanGrids(net, {"0": LayerSetting(weight=UniformGrid(3, 0.1)),
    ...                      "2": LayerSetting(input=UniformGrid(4, 0.05, signed=False))})
    >>> x = torch.randn(5, 4)
    >>> out = pg.relaxed(x, temperature=0.5, noise_factor=1.0, generator=torch.Generator())
    >>> out.requires_grad, len(pg.parameters())
    (True, 6)
    >>> torch.equal(pg.hard(x, pg.settings()), pg.hard(x, pg.settings()))
    True
    """

    def __init__(self, model: nn.Module, settings: Mapping[str, LayerSetting], *,
                 learn: Iterable[str] = LEARNABLE, sources: Iterable[str] = SOURCES,
                 noise_steps: float = DEFAULT_NOISE_STEPS):
        learn, sources = set(learn), set(sources)
        self.model = copy.deepcopy(model).eval()
        for p in self.model.parameters():
            p.requires_grad_(False)
            p.grad = None
        found = {e.name: e for e in find_entries(self.model)}
        found.update(entries_named(self.model, [n for n in settings if n not in found]))
        self.entries: list[GridEntry] = []
        self._inputs: dict[str, GridEntry | None] = {}  # None: a per-token input (kept fixed)
        self._token: dict[str, TokenGrid] = {}
        self._mode: tuple | None = None  # how the input hooks quantize during a forward
        through_taps = []  # attention activations, out_proj's context, inputs of weights found by use
        for name, setting in settings.items():
            entry = found.get(name)
            if entry is None:
                raise ValueError(f"plan entry {name!r} is not a quantizable weight of the model; "
                                 f"entries: {list(found)}")
            w = _float_like(self.model) if entry.kind == "activation" else entry.parameter(self.model)
            for source in SOURCES:
                grid = getattr(setting, source)
                if isinstance(grid, TokenGrid):  # a scale per row at run time: nothing to learn
                    self._token[name] = grid
                    continue
                if grid is None:
                    continue
                if source == "weight":
                    grid_params(w, grid)  # per-channel size check, with a clear message
                elif not entry.input_args:  # its owner's forward uses the weight directly
                    raise ValueError(f"plan entry {name!r} ({entry.type_name}) is weight-only; "
                                     "it has no input to quantize")
                self.entries.append(self._entry(name, source, grid.detached(), entry.param, w.dtype,
                                                noise_steps, learn if source in sources else set()))
            if setting.input is not None:
                self._inputs[name] = next((e for e in self.entries if e.name == name and e.source == "input"), None)
                if tapped(entry):
                    through_taps.append(entry)
                    continue
                owner = self.model.get_submodule(entry.module) if entry.module else self.model
                owner.register_forward_pre_hook(_InputHook(self, entry), with_kwargs=True)
        if through_taps:  # reached by taps on the copy (qwidgets.model.taps), quantized like a hook's
            attach(self.model, EachTap(through_taps, self._tapped_input))

    @staticmethod
    def _entry(name, source, start, pname, dtype, noise_steps, learn) -> GridEntry:
        dtype = dtype if dtype in (torch.float32, torch.float64) else torch.float32
        s0 = start.scale_tensor().to(dtype)
        o0 = start.offset_tensor().to(dtype)
        a = torch.zeros_like(s0, requires_grad="scale" in learn)
        b = torch.zeros_like(o0, requires_grad="offset" in learn)
        c = torch.tensor(math.log(noise_steps), dtype=dtype, requires_grad="noise" in learn)
        return GridEntry(name, source, start, pname, a, b, c, start.has_zero_point())

    # ------------------------------------------------------------------ numbers
    def parameters(self) -> list[torch.Tensor]:
        """The learned numbers (those with gradients), for an optimiser."""
        return [t for e in self.entries for t in (e.a, e.b, e.c) if t.requires_grad]

    def settings(self) -> dict[str, LayerSetting]:
        """The current grids as settings (detached, integer zero points kept where they were)."""
        out: dict[str, dict] = {}
        for e in self.entries:
            out.setdefault(e.name, {})[e.source] = e.final()
        for name, g in self._token.items():
            out.setdefault(name, {})["input"] = g
        return {n: LayerSetting(**g) for n, g in out.items()}

    # ------------------------------------------------------------------ forwards
    def relaxed(self, data, *, temperature: float, noise_factor: float,
                generator: torch.Generator | None, window: int | None = None):
        """The copy's output with every grid relaxed (concrete samples), differentiable."""
        grids = {id(e): e.grid() for e in self.entries}
        weights = {}
        for e in self.entries:
            if e.source == "weight":
                g = grids[id(e)]
                w = self.model.get_parameter(e.param)
                weights[e.param] = relaxed_quantize(w, g, e.noise_width(g, noise_factor), temperature,
                                                    window=_window(g, window), generator=generator)
        self._mode = ("relaxed", grids, temperature, noise_factor, generator, window)
        try:
            return _call(self.model, weights, data)
        finally:
            self._mode = None

    @torch.no_grad()
    def hard(self, data, settings: Mapping[str, LayerSetting]):
        """The copy's output with ``settings``' grids, rounded to nearest (as apply_plan does)."""
        weights = {}
        for e in self.entries:
            if e.source == "weight":
                w = self.model.get_parameter(e.param)
                weights[e.param] = quantize(w, settings[e.name].weight)
        self._mode = ("hard", settings)
        try:
            return _call(self.model, weights, data)
        finally:
            self._mode = None

    @torch.no_grad()
    def float_output(self, data):
        """The copy's float output (no grid applied)."""
        return _call(self.model, {}, data)

    def _quantize_input(self, name: str, x: torch.Tensor):
        mode = self._mode
        if mode is None:
            return None
        if name in self._token:  # the same rounding either way; gradients pass straight through
            return quantize_unchecked(x, self._token[name])
        if mode[0] == "hard":
            return quantize(x, mode[1][name].input)
        _, grids, temperature, factor, generator, window = mode
        e = self._inputs[name]
        g = grids[id(e)]
        return relaxed_quantize(x, g, e.noise_width(g, factor), temperature,
                                window=_window(g, window), generator=generator)


    def _tapped_input(self, name: str, x: torch.Tensor):
        q = self._quantize_input(name, x)
        return x if q is None else q


def _float_like(model: nn.Module) -> torch.Tensor:
    """A tensor of the model's floating-point type (an activation's grid numbers use it)."""
    return next((p for p in model.parameters() if p.is_floating_point()), torch.zeros(()))


def _window(grid: UniformGrid, window):
    if window is not None:
        return window
    return None if grid.n_levels <= 8 else 5  # the cost then does not grow with the bit width


def _call(model: nn.Module, weights: dict, data):
    from torch.func import functional_call

    args, kwargs = ((), dict(data)) if isinstance(data, Mapping) else (
        (data if isinstance(data, tuple) else (data,)), {})
    with attention_fastpath_off():  # the decomposed attention, whose inputs the hooks quantize
        return functional_call(model, weights, args, kwargs)
