"""The grid explorer's controls, bound to its :class:`~.explorer_state.ExplorerState`.

Every control is bound to one trait of the state (:func:`~.number_control.bind`, or a
:class:`~.number_control.NumberControl` for numbers): a person's move sets the trait, a change
of the trait shows in the control. The kernel writes into a control only what it can show
(a width among the bit buttons, a whole slider position, text), so a browser has nothing to
echo and every message from it is a person's move. The numbers' slider windows follow the
state (the step's window is centred on the fitted step, the offset's spans the values, the
probe's the drawn value axis); the exact values are in the state and the boxes.

Every control carries a stable CSS class ``qw-<name>`` (``qw-bits``, ``qw-scale``, ...,
underscores as hyphens) so front-end tests and the demo can find it.
"""

from __future__ import annotations

import ipywidgets as widgets

from ..core.ranges import METHODS
from .explorer_blocks import blocks_per_channel, granularity_label
from .explorer_panel import METHOD_LABELS, SOURCE_LABELS, fmt3
from .explorer_state import ExplorerState
from .number_control import LinearPositions, LogPositions, NumberControl, bind

__all__ = ["ExplorerControls", "STEP_WINDOW", "STEP_POSITIONS"]

STEP_WINDOW = 8.0  # the step control spans the fitted step divided / multiplied by this
STEP_POSITIONS = 900  # positions of the step control over that window (about 0.5 % apart)
OFFSET_POSITIONS = 2000
PROBE_POSITIONS = 2000


class ExplorerControls:
    """The controls of one explorer (``.controls`` by name), bound to ``state``.

    ``on_error(exc, name)`` receives a value the state refused (the control shows the state
    again); ``before()`` runs before a control's value goes to the state.

    >>> import torch
    >>> st = ExplorerState({"values": torch.linspace(-1, 1, 101)}, "values")
    >>> st.start(4, per_channel=False)
    >>> c = ExplorerControls(st, has_layer=False).controls
    >>> c["bits"].set_state({"index": c["bits"].options.index(("6", 6))})  # a person's click
    >>> st.bits, st.grid.bits
    (6, 6)
    """

    def __init__(self, state: ExplorerState, *, has_layer: bool, on_error=None, before=None):
        self.state = state
        st = state
        small = {"description_width": "60px"}
        c: dict[str, widgets.Widget] = {}
        c["bits"] = widgets.ToggleButtons(options=self._bits_options(), value=st.bits,
                                          description="bits", tooltip="bit width of the grid",
                                          style={"description_width": "92px", "button_width": "38px"})
        c["scale"] = NumberControl(st, "scale", self._step_positions(), description="step",
                                   on_error=on_error, before=before, description_width="92px",
                                   tooltip="the grid step (type a value: 0.012, 12m, 1.2e-2)")
        c["offset"] = NumberControl(st, "offset", self._offset_positions(), description="offset",
                                    on_error=on_error, before=before, description_width="92px",
                                    tooltip="the grid offset, in value units")
        c["noise"] = NumberControl(st, "noise_steps", LogPositions(0.01, 10 ** 0.5, n=250),
                                   description="noise (steps)", fmt=fmt3, on_error=on_error, before=before,
                                   tooltip="logistic noise width, a fraction of the step")
        c["temperature"] = NumberControl(st, "temperature", LogPositions(0.01, 10.0, n=300),
                                         description="temperature", fmt=fmt3, on_error=on_error,
                                         before=before)
        c["probe"] = NumberControl(st, "probe", LinearPositions(-1.0, 1.0, PROBE_POSITIONS),
                                   description="probe value", on_error=on_error, before=before,
                                   tooltip="the value whose bin probabilities are drawn")
        c["source"] = widgets.ToggleButtons(
            options=[(SOURCE_LABELS[s], s) for s in st.sources], value=st.source,
            description="quantize", style={"description_width": "60px", "button_width": "100px"},
            disabled=len(st.sources) == 1)
        c["signed"] = widgets.Checkbox(description="signed codes", indent=False,
                                       layout=widgets.Layout(width="130px"))
        c["per_channel"] = widgets.Checkbox(description="per channel", indent=False,
                                            layout=widgets.Layout(width="120px"))
        c["granularity"] = widgets.Dropdown(options=self._granularity_options(), value=st.granularity,
                                            description="grid per", style={"description_width": "52px"},
                                            tooltip="one step per tensor, per output channel, or per "
                                                    "block of that many inputs of a channel",
                                            layout=widgets.Layout(width="180px"))
        c["channel"] = widgets.BoundedIntText(value=0, min=0, max=0, description="channel", style=small,
                                              layout=widgets.Layout(width="150px"))
        c["block"] = widgets.BoundedIntText(value=0, min=0, max=0, description="block",
                                            style={"description_width": "40px"},
                                            tooltip="the block shown, within the channel (block grids)",
                                            layout=widgets.Layout(width="120px"))
        c["keep_clip"] = widgets.Checkbox(description="keep clip range", indent=False,
                                          tooltip="a new bit width keeps the clip range instead of "
                                                  "refitting it", layout=widgets.Layout(width="130px"))
        c["method"] = widgets.Dropdown(options=[(METHOD_LABELS[m], m) for m in METHODS],
                                       description="next fit", style=small,
                                       tooltip="the range fit of the next fitted grid (the readout "
                                               "says how the grid shown came about)",
                                       layout=widgets.Layout(width="220px"))
        c["fit"] = widgets.Button(description="fit range", icon="arrows-h",
                                  layout=widgets.Layout(width="100px"))
        c["steps"] = widgets.BoundedIntText(value=200, min=1, max=100000, description="steps",
                                            style={"description_width": "40px"},
                                            layout=widgets.Layout(width="120px"))
        c["learn"] = widgets.Button(description="learn", icon="graduation-cap", disabled=not has_layer,
                                    tooltip="learn scale, offset and noise (relaxed quantization)",
                                    layout=widgets.Layout(width="90px"))
        c["reset"] = widgets.Button(description="reset", icon="undo", layout=widgets.Layout(width="80px"))
        for name, w in c.items():
            w.add_class(f"qw-{name.replace('_', '-')}")
        self.controls = c
        bind(st, "bits", c["bits"], on_error=on_error, before=before, show=self._show_bits)
        bind(st, "channel", c["channel"], on_error=on_error, before=before, show=self._show_channel)
        bind(st, "block", c["block"], on_error=on_error, before=before, show=self._show_channel)
        bind(st, "granularity", c["granularity"], on_error=on_error, before=before, show=self._show_granularity)
        for name in ("source", "signed", "per_channel", "keep_clip", "method"):
            bind(st, name, c[name], on_error=on_error, before=before)
        st.observe(self._layout_changed, names=["source", "bits", "signed", "per_channel", "channel",
                                                "granularity", "block"])
        st.observe(lambda _ch: self._place_offset(), names="offset")
        st.observe(lambda _ch: self._place_step(), names="scale")
        self.enable(True)

    def layout(self, heading, progress_box, plot, readout, progress, message) -> list:
        """The explorer's rows: heading, choices, bit buttons, numbers, actions, plots."""
        c, row = self.controls, widgets.Layout(align_items="center")
        return [
            heading,
            widgets.HBox([c["source"], c["signed"], c["per_channel"], c["granularity"], c["channel"],
                          c["block"]], layout=row),
            c["bits"],
            widgets.HBox([widgets.VBox([c["scale"], c["offset"]]),
                          widgets.VBox([c["noise"], c["temperature"], c["probe"]])]),
            widgets.HBox([c["method"], c["keep_clip"], c["fit"], c["steps"], c["learn"], c["reset"]],
                         layout=row),
            progress_box,
            # the readouts sit beside the plots, and wrap below them in a narrow notebook
            widgets.HBox([plot, readout], layout=widgets.Layout(flex_flow="row wrap",
                                                                align_items="flex-start")),
            progress, message,
        ]

    # ------------------------------------------------------------------ windows
    def _bits_options(self) -> list:
        return [(str(b), b) for b in self.state.bits_menu()]

    def _show_bits(self) -> None:
        b = self.controls["bits"]
        options = self._bits_options()
        with b.hold_sync():
            if list(b.options) != options:
                b.options = options
            b.value = self.state.bits

    def _show_channel(self) -> None:
        for name, n, v in (("channel", self.state.n_channels(), self.state.channel),
                           ("block", blocks_per_channel(self.state.grid), self.state.block)):
            box = self.controls[name]
            with box.hold_sync():
                box.max = max(n - 1, 0)
                box.value = v

    def _granularity_options(self) -> list:
        st = self.state
        opts = ["tensor"] + (["channel", *st.block_options()] if st.can_per_channel(st.source) else [])
        if st.granularity not in opts:  # a grid given from elsewhere (a plan's block size)
            opts.append(st.granularity)
        return [(granularity_label(o), o) for o in opts]

    def _show_granularity(self) -> None:
        d = self.controls["granularity"]
        options = self._granularity_options()
        with d.hold_sync():
            if list(d.options) != options:
                d.options = options
            d.value = self.state.granularity

    def _step_positions(self) -> LogPositions:
        centre = self.state.fitted_step()
        lo, hi = centre / STEP_WINDOW, centre * STEP_WINDOW
        v = self.state.scale
        if not lo <= v <= hi:  # a value outside the window: widen it to hold the value
            lo, hi = min(lo, v / 1.12), max(hi, v * 1.12)
        return LogPositions(lo, hi, n=STEP_POSITIONS)

    def _offset_positions(self) -> LinearPositions:
        lo, hi = self.state.shown_range()
        r = max(abs(lo), abs(hi), 2 * abs(self.state.offset), 1e-12)
        return LinearPositions(-r, r, OFFSET_POSITIONS)

    def _place_step(self) -> None:
        """Keep the step's window still while it is dragged; widen it for a value outside."""
        if not self.controls["scale"].positions.contains(self.state.scale):
            self.controls["scale"].set_positions(self._step_positions())

    def _place_offset(self) -> None:
        if not self.controls["offset"].positions.contains(self.state.offset):
            self.controls["offset"].set_positions(self._offset_positions())

    def _layout_changed(self, _change=None) -> None:
        """A new width, source, channel or layout: the windows follow the fitted grid."""
        self.controls["scale"].set_positions(self._step_positions())
        self.controls["offset"].set_positions(self._offset_positions())
        self._show_channel()
        self._show_granularity()
        self.enable(self.enabled)

    def place_probe(self, view: tuple) -> None:
        """The probe's slider spans the drawn value axis; the probe stays inside it."""
        lo, hi = view
        if not hi > lo:
            return
        if not lo <= self.state.probe <= hi:
            self.state.probe = min(max(self.state.probe, lo), hi)
        self.controls["probe"].set_positions(LinearPositions(lo, hi, PROBE_POSITIONS))

    def enable(self, enabled: bool) -> None:
        """Enable or disable every control but the learn / stop button (while learning);
        enabled, the per-channel and granularity choices, channel, block and offset follow the state."""
        st, c = self.state, self.controls
        self.enabled = enabled
        for name, w in c.items():
            if name != "learn":
                w.disabled = not enabled
        if enabled:
            c["source"].disabled = len(st.sources) == 1
            c["per_channel"].disabled = not st.can_per_channel(st.source) or (
                st.rules is not None and not st.rules.per_channel_weights)
            c["granularity"].disabled = c["per_channel"].disabled
            c["channel"].disabled = st.grid.axis is None
            c["block"].disabled = not st.grid.blocked
            c["offset"].disabled = st.symmetric_only(st.source)

