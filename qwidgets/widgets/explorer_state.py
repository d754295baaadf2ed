"""The grid explorer's state: one ``traitlets.HasTraits`` model, the one place it lives.

:class:`ExplorerState` holds what the explorer shows as traits (``source``, ``bits``,
``signed``, ``per_channel``, ``channel``, ``scale``, ``offset``, ``method``, ``keep_clip``,
``noise_steps``, ``temperature``, ``probe``) and the exact current grid (``grid``). A user
can ``observe`` it or ``link`` their own controls to it; the explorer's controls are bound to
it the same way and its views only render it. Setting a trait is an edit, validated at this
boundary (a clear error names the trait):

- ``bits``: refits the range with ``method`` (unless ``keep_clip``: the clip range is cut into
  the new number of steps), or brings back the grid learned earlier for that (source, width);
  a width the device rules do not run moves to the next allowed one and ``note`` says so;
- ``scale`` / ``offset``: the step and offset of the grid (of the channel / block shown),
  moved onto the device rules (power-of-two steps, whole-step or zero offsets);
- ``signed``, ``per_channel``, ``granularity`` (``"tensor"``, ``"channel"`` or a block size of
  :meth:`ExplorerState.block_options`): refit with that choice; ``channel``: which channel is
  shown, ``block``: which block of it (block grids; ``per_channel`` is then True too);
- ``source``: which tensor (``"weight"`` / ``"input"``, or ``"values"``); each keeps its grid.

Traits that describe the grid follow it when it changes by other means (a fit, a learning
run, a loaded setting); an edit asking for what the grid already is changes nothing. Grids
come from the core (:class:`qwidgets.core.ranges.RangeFitter`, one per source, method and
layout: a new width costs the range search, not another sort).
"""

from __future__ import annotations

import math

import torch
import traitlets

from ..core.checks import check_bits
from ..core.device_rules import DeviceRules
from ..core.grid import UniformGrid
from ..core.grid_cache import fit_cached
from ..core.ranges import METHODS, RangeFitter
from ..model.layers import WEIGHT_AXIS
from . import explorer_blocks as blocks
from .explorer_blocks import ShownPart
from .explorer_rules import RulesOfState, role

__all__ = ["ExplorerState", "role", "PREFETCH_UP_TO"]

PREFETCH_UP_TO = 8  # widths fitted ahead while idle: all up to this many bits (the usual choices)


class ExplorerState(RulesOfState, ShownPart, traitlets.HasTraits):
    """What a :class:`~qwidgets.GridExplorer` shows (``explorer.state``); observe or link it.

    >>> import torch
    >>> _ = torch.manual_seed(0)
    >>> st = ExplorerState({"values": torch.randn(500)}, "values", method="minmax")
    >>> st.start(4, per_channel=False)
    >>> g4 = st.grid
    >>> st.bits = 6; st.grid.bits, st.grid.clip_range == g4.clip_range
    (6, False)
    >>> st.bits = 4; st.grid is g4  # back to the fitted 4-bit grid
    True
    >>> seen = []
    >>> st.observe(lambda ch: seen.append(ch["new"]), names="scale")
    >>> st.scale = 0.5; seen, st.grid.scale
    ([0.5], 0.5)
    """

    source = traitlets.Unicode(help="the tensor shown: 'weight', 'input' or 'values'")
    bits = traitlets.Int(4, help="bit width of the current grid")
    signed = traitlets.Bool(True, help="signed integer codes")
    per_channel = traitlets.Bool(False, help="one step and offset per output channel")
    channel = traitlets.Int(0, help="the channel shown (per-channel grids)")
    granularity = traitlets.Union([traitlets.Enum(("tensor", "channel")), traitlets.Int()], default_value="tensor",
                                  help="'tensor', 'channel' or a block size (a step per block of inputs)")
    block = traitlets.Int(0, help="the block shown, within the channel (block grids)")
    scale = traitlets.Float(1.0, help="the grid step (of the channel shown), exact")
    offset = traitlets.Float(0.0, help="the grid offset (of the channel shown), exact")
    method = traitlets.Enum(METHODS, default_value="mse", help="range fit of a new grid")
    keep_clip = traitlets.Bool(False, help="a new width keeps the clip range instead of a refit")
    noise_steps = traitlets.Float(0.3, help="logistic noise width, a fraction of the step")
    temperature = traitlets.Float(0.5, help="temperature of the relaxed samples")
    probe = traitlets.Float(0.0, help="the value whose bin probabilities are drawn")
    grid = traitlets.Instance(UniformGrid, allow_none=True, help="the current grid, exact")
    note = traitlets.Unicode("", help="what changed that was not asked for, and why")

    def __init__(self, values: dict, source: str, *, method: str = "mse", noise_steps: float = 0.3,
                 temperature: float = 0.5, rules: DeviceRules | None = None):
        self.values = values  # source -> float32 tensor
        self.rules = rules  # what the device runs (None: anything)
        self.grids: dict = {}  # source -> current grid
        self.kept: dict = {}  # (source, bits) -> (grid, origin): learned or edited by hand
        self.origins: dict = {}  # source -> how its current grid came about (see origin())
        self.probes: dict = {}  # source -> probe value
        self._fitted: dict = {}  # (source, bits, method, signed, granularity) -> grid
        self._fitters: dict = {}  # (source, method, signed, granularity) -> RangeFitter
        self._ranges: dict = {}  # (source, channel shown) -> (min, max); source -> share below 0
        super().__init__(source=source, method=method, noise_steps=noise_steps, temperature=temperature)

    @property
    def sources(self) -> tuple:
        return tuple(self.values)

    # ------------------------------------------------------------------ validation
    @traitlets.validate("source")
    def _check_source(self, proposal):
        if proposal["value"] not in self.values:
            raise traitlets.TraitError(f"source must be one of {self.sources}, got {proposal['value']!r}")
        return proposal["value"]

    @traitlets.validate("bits")
    def _check_bits(self, proposal):
        bits = check_bits(proposal["value"])
        now = self.grid.bits if self.grid is not None else bits
        allowed = self.allowed_bits(self.source, bits, up=bits > now)
        if allowed != bits:
            self.note = f"{bits} bits is not in the device's menu for {self.source}: {allowed} bits"
        return allowed

    @traitlets.validate("scale")
    def _check_scale(self, proposal):
        v = float(proposal["value"])
        if not (v > 0 and math.isfinite(v)):
            raise traitlets.TraitError(f"scale must be a finite number > 0, got {proposal['value']!r}")
        if self.rules is not None and self.rules.pow2_scales and self.grid is not None:
            v = 2.0 ** round(math.log2(v))  # the device's steps are powers of two
        return v

    @traitlets.validate("offset")
    def _check_offset(self, proposal):
        v = float(proposal["value"])
        if not math.isfinite(v):
            raise traitlets.TraitError(f"offset must be a finite number, got {proposal['value']!r}")
        if self.grid is None or v == float(self.shown_grid().offset):
            return v
        if self.symmetric_only(self.source):
            return 0.0  # symmetric weights: zero point 0
        if self.rules is not None:  # an integer zero point: the offset moves in whole steps
            step = float(self.shown_grid().scale)
            return -round(-v / step) * step + 0.0
        return v

    @traitlets.validate("noise_steps", "temperature")
    def _check_positive(self, proposal):
        v = float(proposal["value"])
        if not (v > 0 and math.isfinite(v)):
            raise traitlets.TraitError(f"{proposal['trait'].name} must be a finite number > 0, "
                                       f"got {proposal['value']!r}")
        return v

    @traitlets.validate("per_channel")
    def _check_per_channel(self, proposal):
        if proposal["value"] and self.source and not self.can_per_channel(self.source):
            raise traitlets.TraitError(
                "per-channel grids are offered for weights, not for "
                f"{'the layer input' if self.source == 'input' else self.source}")
        return proposal["value"]

    @traitlets.validate("granularity")
    def _check_granularity(self, proposal):
        v = proposal["value"]
        if v == "tensor" or (self.grid is not None and v == self.grid.granularity):
            return v
        if not self.can_per_channel(self.source) or (self.rules is not None and not self.rules.per_channel_weights):
            raise traitlets.TraitError(f"granularity {v!r}: only 'tensor' is offered for {self.source} here")
        if v != "channel" and v not in self.block_options():
            raise traitlets.TraitError(f"granularity must be 'tensor', 'channel' or a block size of "
                                       f"{list(self.block_options())}, got {v!r}")
        return v

    @traitlets.validate("block")
    def _check_block(self, proposal):
        n = blocks.blocks_per_channel(self.grid) if self.grid is not None else 1
        if not 0 <= int(proposal["value"]) < n:
            raise traitlets.TraitError(f"block must be in 0..{n - 1}, got {proposal['value']}")
        return int(proposal["value"])

    @traitlets.validate("channel")
    def _check_channel(self, proposal):
        n = self.n_channels() if self.grid is not None else 1
        if not 0 <= int(proposal["value"]) < n:
            raise traitlets.TraitError(f"channel must be in 0..{n - 1}, got {proposal['value']}")
        return int(proposal["value"])

    # ------------------------------------------------------------------ edits
    @traitlets.observe("bits")
    def _on_bits(self, change):
        g = self.grid
        bits = change["new"]
        if g is None or bits == g.bits:
            return
        grid, origin = self.grid_for_bits(bits)
        self.set_grid(grid, origin=origin)

    def grid_for_bits(self, bits: int) -> tuple:
        """(grid, origin) that a change of the current source to ``bits`` bits shows: a learned
        or hand-edited grid kept for that width, else the same clip range cut into more (or
        fewer) steps with :attr:`keep_clip`, else the fitted range. Nothing is changed."""
        g = self.grid
        kept, origin = self.kept.get((self.source, bits), (None, None))
        if kept is not None and kept.signed == g.signed and kept.granularity == g.granularity:
            return kept, origin  # a learned or hand-edited grid stays
        if self.keep_clip:  # the same clip range cut into more (or fewer) steps
            new = g.replace(bits=bits)
            ratio = max(g.qmax - g.qmin, 1) / max(new.qmax - new.qmin, 1)
            scale = g.scale * ratio if isinstance(g.scale, torch.Tensor) else float(g.scale) * ratio
            return self.obeying(g.replace(bits=bits, scale=scale), self.source), ("clip range kept", g.bits)
        return self.fitted(self.source, bits, g.signed, g.granularity), ("fitted", self.method)

    @traitlets.observe("scale", "offset")
    def _on_channel_param(self, change):
        if self.grid is None:
            return
        name, value = change["name"], float(change["new"])
        if value == float(getattr(self.shown_grid(), name)):
            return
        g = self.grid
        if g.axis is None:
            new = g.replace(**{name: value})
        else:
            t = (g.scale_tensor() if name == "scale" else g.offset_tensor()).detach().clone()
            if g.blocked:  # the block shown, of the channel shown
                t = t.expand_as(g.scale_tensor()).contiguous()
                t.view(-1)[blocks.block_flat_index(g, self.channel, self.block)] = value
            else:
                t[self.channel] = value
            new = g.replace(**{name: t})
        self.kept[(self.source, new.bits)] = (new, ("edited", None))
        self.set_grid(new, origin=("edited", None))

    @traitlets.observe("signed", "per_channel", "granularity")
    def _on_layout(self, change):
        g = self.grid
        if g is None:
            return
        if change["name"] == "per_channel":  # per channel (blocks are within channels too)
            if self.per_channel != (g.axis is not None):
                self.granularity = "channel" if self.per_channel else "tensor"
            return
        if self.signed == g.signed and self.granularity == g.granularity:
            return
        new = self.fitted(self.source, g.bits, self.signed, self.granularity)
        self.set_grid(new, origin=("fitted", self.method))

    @traitlets.observe("channel", "block")
    def _on_channel(self, change):
        self._follow()

    @traitlets.observe("source")
    def _on_source(self, change):
        if self.source in self.grids:
            self.channel = 0
            self.grid = self.grids[self.source]
            self.probe = self.probes[self.source]
            self._follow()

    @traitlets.observe("probe")
    def _on_probe(self, change):
        if self.source:
            self.probes[self.source] = float(change["new"])

    def set_grid(self, grid: UniformGrid, source: str | None = None, origin: tuple = ("given", None)) -> None:
        """Make ``grid`` the current grid of ``source`` (default: the current source);
        ``origin``: how it came about, ``(kind, detail)`` (see :meth:`origin`)."""
        source = source or self.source
        if not isinstance(grid, UniformGrid):  # a TokenGrid's scales come from each row, at run time
            raise TypeError(f"grid must be a UniformGrid (a fixed grid to explore), got {type(grid).__name__}")
        self.grids[source] = grid
        self.origins[source] = origin
        if source == self.source:
            with self.hold_trait_notifications():  # observers see the new grid with its channel
                if grid.axis is None or self.channel >= self.n_channels_of(grid, source):
                    self.channel = 0 if grid.axis is None else min(self.channel, 0)
                if self.block >= blocks.blocks_per_channel(grid):
                    self.block = 0
                self.grid = grid
            self._follow()

    def _follow(self) -> None:
        """The traits that describe the grid take its values (edits that change nothing)."""
        g, shown = self.grid, self.shown_grid()
        with self.hold_trait_notifications():
            self.signed = g.signed
            self.per_channel = g.axis is not None
            self.granularity = g.granularity
            self.bits = g.bits
            self.scale = float(shown.scale)
            self.offset = float(shown.offset)

    # ------------------------------------------------------------------ fitting
    def can_per_channel(self, source: str) -> bool:
        # Per-channel grids are offered for weights (one per output channel, the layout integer
        # kernels use) and for a tensor's first axis; activations get one grid (common practice).
        v = self.values[source]
        return source != "input" and v.dim() >= 2 and v.shape[0] > 1

    def block_options(self, source: str | None = None) -> tuple:
        """Block sizes offered for ``source`` (default: the current): shorter than its axis 1."""
        return blocks.block_options(self.values[source or self.source], self.can_per_channel(source or self.source))

    def fitted(self, source: str, bits: int, signed: bool | None, per_channel: bool | str | int,
               method: str | None = None) -> UniformGrid:
        """The range fitted by ``method`` (default: the selected one), cached; ``per_channel``:
        True / False, or a granularity (``"tensor"``, ``"channel"`` or a block size)."""
        method = self.method if method is None else method
        if isinstance(per_channel, bool):
            per_channel = "channel" if per_channel else "tensor"
        if isinstance(per_channel, int):  # blocks along the input axis of each channel
            layout = {"axis": 1 - WEIGHT_AXIS, "block_size": per_channel}
        else:
            layout = {"axis": WEIGHT_AXIS if per_channel == "channel" else None}
        key = (source, bits, method, signed, per_channel)
        if key not in self._fitted:
            fitter = self._fitters.get((source, method, signed, per_channel))
            if fitter is None:  # one per tensor and layout: its sorted copy serves every width
                extra = {} if self.rules is None else {"rules": self.rules, "role": role(source)}
                fitter = RangeFitter(self.values[source], method, signed=signed, **layout, **extra)
                self._fitters[(source, method, signed, per_channel)] = fitter
                self._fitters[(source, method, fitter.signed, per_channel)] = fitter
            g = fit_cached(fitter, (bits,))[0]  # shared with scans of the same values
            self._fitted[key] = self._fitted[(source, bits, method, g.signed, per_channel)] = g
        return self._fitted[key]

    def start(self, bits: int, per_channel: bool) -> None:
        """Fit every source's starting grid."""
        bits = check_bits(bits)
        for s in self.sources:
            pc = per_channel and self.can_per_channel(s)
            self.grids[s] = self.fitted(s, self.allowed_bits(s, bits), None, pc)
            self.origins[s] = ("fitted", self.method)
            v = self.values[s]
            self.probes.setdefault(s, float(v.mean() + v.std()) if v.numel() > 1 else float(v.reshape(-1)[0]))
        self.grid = self.grids[self.source]
        self.probe = self.probes[self.source]
        self._follow()

    def prefetch(self, limit: int | None = None) -> bool:
        """Fit ahead, nearest first: the widths next to the current one, the others up to
        :data:`PREFETCH_UP_TO` bits, then (without device rules) the other signedness.
        ``limit``: at most that many fits (a kernel fits one at a time while idle, so a move
        arriving meanwhile waits for one fit at most). Returns whether any is left to fit."""
        g, todo = self.grid, self.fits_left()
        for bits, signed in todo[:limit]:
            self.fitted(self.source, bits, signed, g.granularity)
        return limit is not None and len(todo) > limit

    def fits_left(self) -> list:
        """(bits, signed) of the fits :meth:`prefetch` has still to make, in its order."""
        g = self.grid
        todo = [(b, g.signed) for b in self.widths_ahead()] + [(g.bits, not g.signed)] * (self.rules is None)
        return [(b, sg) for b, sg in todo if (self.source, b, self.method, sg, g.granularity) not in self._fitted]

    def widths_ahead(self) -> tuple:
        """The widths worked on ahead, nearest first: those next to the current one, then the
        others up to :data:`PREFETCH_UP_TO` bits (the current one included)."""
        g, menu = self.grid, self.bits_menu()
        i = menu.index(g.bits) if g.bits in menu else 0
        near = menu[max(i - 1, 0):i + 2]
        rest = sorted((b for b in menu if b <= PREFETCH_UP_TO and b not in near), key=lambda b: (abs(b - g.bits), b))
        return (*near, *rest)

    def fitted_now(self) -> UniformGrid:
        """The fitted grid for the current source, bits, signedness and per-channel choice."""
        g = self.grid
        return self.fitted(self.source, g.bits, g.signed, g.granularity)

    def fit(self, method: str | None = None) -> UniformGrid:
        """Refit the current grid's range (with ``method``, which becomes the selected one)."""
        if method is not None:
            self.method = method
        self.kept.pop((self.source, self.grid.bits), None)  # the person replaced it
        self.set_grid(self.fitted_now(), origin=("fitted", self.method))
        return self.grid

    def remember_learned(self, grid: UniformGrid, source: str, steps: int | None = None) -> None:
        grid = self.obeying(grid, source)
        self.kept[(source, grid.bits)] = (grid, ("learned", steps))
        self.set_grid(grid, source, origin=("learned", steps))

    def reset(self) -> None:
        """Back to the fitted grid of the current bit width (a learned or edited one is forgotten)."""
        self.kept.pop((self.source, self.grid.bits), None)
        self.set_grid(self.fitted_now(), origin=("fitted", self.method))

    def origin(self) -> tuple:
        """How the current grid came about: ``("fitted", method)``, ``("learned", steps)``,
        ``("edited", None)``, ``("clip range kept", from_bits)`` or ``("given", None)``."""
        return self.origins.get(self.source, ("given", None))
