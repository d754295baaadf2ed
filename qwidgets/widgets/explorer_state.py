"""The grid explorer's state in one place: grids per source, fitted and learned grids, settings.

:class:`ExplorerState` is plain Python (no widgets, no drawing). The explorer's controls edit
it through its methods, and the figure and readouts are drawn from it. Grids come from the
core (:func:`qwidgets.fit_range`); the state only decides *which* grid is current:

- a new bit width refits the range with the selected method (unless ``keep_clip`` is set, in
  which case the clip range is kept and cut into the new number of steps), or brings back
  the grid learned earlier for that (source, bit width);
- ``reset()`` returns to the fitted grid of the current bit width;
- every change bumps ``version[source]``, the key the numbers are cached on;
- fitting keeps one :class:`qwidgets.core.ranges.RangeFitter` per source, method and layout,
  so a new bit width costs the range search, not another sort of the values.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import torch

from ..core.checks import check_bits, check_positive
from ..core.device_rules import DeviceRules, conform_grid
from ..core.grid import UniformGrid
from ..core.grid_cache import fit_cached
from ..core.ranges import METHODS, RangeFitter
from ..model.layers import WEIGHT_AXIS

__all__ = ["ExplorerState"]


@dataclass
class ExplorerState:
    """What the explorer shows: one grid per source and the settings around it.

    >>> import torch
    >>> _ = torch.manual_seed(0)
    >>> st = ExplorerState({"values": torch.randn(500)}, "values", method="minmax")
    >>> st.start(4, per_channel=False)
    >>> g4 = st.grid
    >>> st.set_bits(6); st.grid.bits, st.grid.clip_range == g4.clip_range
    (6, False)
    >>> st.set_bits(4); st.grid is g4  # back to the fitted 4-bit grid
    True
    """

    values: dict  # source -> float32 tensor
    source: str
    method: str = "mse"
    noise_steps: float = 0.3
    temperature: float = 0.5
    keep_clip: bool = False
    channel: int = 0
    grids: dict = field(default_factory=dict)  # source -> current grid
    learned: dict = field(default_factory=dict)  # (source, bits) -> learned grid
    probe: dict = field(default_factory=dict)  # source -> probe value
    version: dict = field(default_factory=dict)  # source -> edit counter
    rules: DeviceRules | None = None  # what the device runs (None: anything)
    _fitted: dict = field(default_factory=dict)  # (source, bits, method, signed, axis) -> grid
    _fitters: dict = field(default_factory=dict)  # (source, method, signed, axis) -> RangeFitter

    @property
    def sources(self) -> tuple:
        return tuple(self.values)

    @property
    def grid(self) -> UniformGrid:
        return self.grids[self.source]

    # ------------------------------------------------------------------ fitting
    def can_per_channel(self, source: str) -> bool:
        # Per-channel grids are offered for weights (one per output channel, the layout integer
        # kernels use) and for a tensor's first axis; activations get one grid (common practice).
        v = self.values[source]
        return source != "input" and v.dim() >= 2 and v.shape[0] > 1

    def fitted(self, source: str, bits: int, signed: bool | None, per_channel: bool,
               method: str | None = None) -> UniformGrid:
        """The range fitted by ``method`` (default: the selected one), cached."""
        method = self.method if method is None else method
        axis = WEIGHT_AXIS if per_channel else None
        key = (source, bits, method, signed, axis)
        if key not in self._fitted:
            fitter = self._fitters.get((source, method, signed, axis))
            if fitter is None:  # one per tensor and layout: its sorted copy serves every width
                extra = {} if self.rules is None else {"rules": self.rules, "role": role(source)}
                fitter = RangeFitter(self.values[source], method, signed=signed, axis=axis, **extra)
                self._fitters[(source, method, signed, axis)] = fitter
                self._fitters[(source, method, fitter.signed, axis)] = fitter
            g = fit_cached(fitter, (bits,))[0]  # shared with scans of the same values
            self._fitted[key] = self._fitted[(source, bits, method, g.signed, axis)] = g
        return self._fitted[key]

    def start(self, bits: int, per_channel: bool) -> None:
        """Fit every source's starting grid."""
        for s in self.sources:
            pc = per_channel and self.can_per_channel(s)
            self.grids[s] = self.fitted(s, self.allowed_bits(s, bits), None, pc)
            self.version.setdefault(s, 0)
            v = self.values[s]
            self.probe.setdefault(s, float(v.mean() + v.std()) if v.numel() > 1 else float(v.reshape(-1)[0]))

    def fitted_now(self) -> UniformGrid:
        """The fitted grid for the current source, bits, signedness and per-channel choice."""
        g = self.grid
        return self.fitted(self.source, g.bits, g.signed, g.axis is not None)

    # ------------------------------------------------------------------ edits
    def set_grid(self, grid: UniformGrid, source: str | None = None) -> None:
        source = source or self.source
        if not isinstance(grid, UniformGrid):
            raise TypeError(f"grid must be a UniformGrid, got {type(grid).__name__}")
        self.grids[source] = grid
        self.version[source] = self.version.get(source, 0) + 1

    # ------------------------------------------------------------------ device rules
    def allowed_bits(self, source: str, bits: int, up: bool = True) -> int:
        """``bits`` if the rules allow it for ``source``, else the next allowed width in the
        direction of the change (the nearest one at the ends of the menu)."""
        menu = None if self.rules is None else self.rules.bits_menu(role(source))
        if menu is None or bits in menu:
            return bits
        ahead = [b for b in menu if (b > bits if up else b < bits)]
        if ahead:
            return min(ahead) if up else max(ahead)
        return min(menu, key=lambda b: (abs(b - bits), b))

    def symmetric_only(self, source: str) -> bool:
        return self.rules is not None and self.rules.symmetric_weights and role(source) == "weight"

    def obeying(self, grid: UniformGrid, source: str) -> UniformGrid:
        """``grid`` moved onto the device rules (zero point, power-of-two scale), if any."""
        if self.rules is None:
            return grid
        return conform_grid(grid, self.values[source], self.rules, role(source))

    def set_bits(self, bits: int) -> None:
        g = self.grid
        bits = self.allowed_bits(self.source, check_bits(int(bits)), up=int(bits) > g.bits)
        if bits == g.bits:
            return
        learned = self.learned.get((self.source, bits))
        if learned is not None and learned.signed == g.signed and (learned.axis is None) == (g.axis is None):
            self.set_grid(learned)
        elif self.keep_clip:  # the same clip range cut into more (or fewer) steps
            new = g.replace(bits=bits)
            ratio = max(g.qmax - g.qmin, 1) / max(new.qmax - new.qmin, 1)
            scale = g.scale * ratio if isinstance(g.scale, torch.Tensor) else float(g.scale) * ratio
            self.set_grid(self.obeying(g.replace(bits=bits, scale=scale), self.source))
        else:
            self.set_grid(self.fitted(self.source, bits, g.signed, g.axis is not None))

    def set_channel_param(self, name: str, value: float) -> None:
        """Set the scale or offset (of the channel shown, for a per-channel grid)."""
        if name == "scale":
            value = float(check_positive(float(value), "scale"))
            if self.rules is not None and self.rules.pow2_scales:  # steps in powers of two
                value = 2.0 ** round(math.log2(value))
        elif self.symmetric_only(self.source):
            value = 0.0  # symmetric weights: zero point 0
        elif self.rules is not None:  # an integer zero point: the offset moves in whole steps
            step = float(self.shown_grid().scale)
            value = -round(-float(value) / step) * step + 0.0
        g = self.grid
        if g.axis is None:
            self.set_grid(g.replace(**{name: float(value)}))
        else:
            t = (g.scale_tensor() if name == "scale" else g.offset_tensor()).detach().clone()
            t[self.channel] = float(value)
            self.set_grid(g.replace(**{name: t}))

    def set_signed(self, signed: bool) -> None:
        g = self.grid
        if bool(signed) != g.signed:
            self.set_grid(self.fitted(self.source, g.bits, bool(signed), g.axis is not None))

    def set_per_channel(self, per_channel: bool) -> None:
        if per_channel and not self.can_per_channel(self.source):
            raise ValueError("per-channel grids are offered for weights, not for "
                             f"{'the layer input' if self.source == 'input' else self.source}")
        g = self.grid
        self.set_grid(self.fitted(self.source, g.bits, g.signed, bool(per_channel)))
        self.channel = 0

    def set_method(self, method: str) -> None:
        if method not in METHODS:
            raise ValueError(f"method must be one of {', '.join(map(repr, METHODS))}; got {method!r}")
        self.method = method

    def set_source(self, source: str) -> None:
        if source not in self.values:
            raise ValueError(f"source must be one of {self.sources}, got {source!r}")
        self.source = source
        self.channel = 0

    def set_channel(self, channel: int) -> None:
        n = self.n_channels()
        if not 0 <= int(channel) < n:
            raise ValueError(f"channel must be in 0..{n - 1}, got {channel}")
        self.channel = int(channel)

    def set_noise_steps(self, value: float) -> None:
        self.noise_steps = float(check_positive(float(value), "noise"))

    def set_temperature(self, value: float) -> None:
        self.temperature = float(check_positive(float(value), "temperature"))

    def fit(self, method: str | None = None) -> UniformGrid:
        if method is not None:
            self.set_method(method)
        self.set_grid(self.fitted_now())
        return self.grid

    def remember_learned(self, grid: UniformGrid, source: str) -> None:
        grid = self.obeying(grid, source)
        self.learned[(source, grid.bits)] = grid
        self.set_grid(grid, source)

    def reset(self) -> None:
        """Back to the fitted grid of the current bit width (the learned one is forgotten)."""
        g = self.grid
        self.learned.pop((self.source, g.bits), None)
        self.set_grid(self.fitted_now())

    # ------------------------------------------------------------------ views
    def n_channels(self) -> int:
        g = self.grid
        return 1 if g.axis is None else int(self.values[self.source].shape[g.axis])

    def shown_grid(self) -> UniformGrid:
        """The grid of the channel shown (the grid itself when it is per-tensor)."""
        g = self.grid
        if g.axis is None:
            return g
        return UniformGrid(g.bits, float(g.scale_tensor()[self.channel]),
                           float(g.offset_tensor()[self.channel]) + 0.0, signed=g.signed)

    def shown_values(self) -> torch.Tensor:
        v = self.values[self.source]
        if self.grid.axis is not None:
            return v.movedim(self.grid.axis, 0)[self.channel].reshape(-1)
        return v.reshape(-1)

    def fitted_step(self) -> float:
        """The fitted step of the channel shown (the centre of the step control's window)."""
        g = self.fitted_now()
        s = g.scale_tensor()
        return float(s[self.channel] if g.axis is not None else s.reshape(-1)[0])


def role(source: str) -> str:
    """Which device rules apply to a source: inputs follow the input rules, the rest the weight rules."""
    return "input" if source == "input" else "weight"
