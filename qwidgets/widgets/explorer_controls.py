"""The grid explorer's controls: layout, the observers that edit the state, and the sync of
the controls from the state (a mixin of :class:`~qwidgets.widgets.explorer.GridExplorer`).

Each control's change goes through one observer: the message line is cleared (a message
describes a state that has just changed), the state is edited, and one redraw is scheduled;
an invalid value shows its error on the message line and puts the controls back.
"""

from __future__ import annotations

import html

import ipywidgets as widgets

from ..viz.explorer_figure import ExplorerFigure
from .events import MessageLine, observe_value
from .explorer_panel import fmt_value, make_controls, step_window
from .image_canvas import PlotCanvas

__all__ = ["ExplorerControls", "CSS"]

CSS = {"root": "qw-explorer", "plot": "qw-plot", "readout": "qw-readout",
       "message": "qw-message", "heading": "qw-heading"}


class ExplorerControls:
    """Controls of a grid explorer (needs ``state``, ``subject``, ``figure`` and ``_updater``)."""

    # ================================================================== widgets
    def _build_widgets(self, width: int, height: int, output) -> None:
        st = self.state
        c = make_controls(self.subject.sources, st.source, st.method, st.noise_steps,
                          st.temperature, has_layer=self.subject.has_layer)
        self.controls = c
        for name in ("bits", "scale", "offset", "noise", "temperature", "probe", "source",
                     "signed", "per_channel", "channel", "method", "keep_clip"):
            observe_value(c[name], self._make_observer(name))
        self.message = MessageLine()
        c["fit"].on_click(lambda _b: self.message.run("fit range", self.fit))
        c["learn"].on_click(lambda _b: self.message.run("learn", self._learn_clicked))
        c["reset"].on_click(lambda _b: self.message.run("reset", self.reset))
        self.heading = widgets.HTML(f"<b>{html.escape(self.subject.heading)}</b>")
        self.heading.add_class(CSS["heading"])
        self.canvas = PlotCanvas(width, height)
        self.canvas.image.add_class(CSS["plot"])
        self.figure = ExplorerFigure(self.canvas, has_layer=self.subject.has_layer)
        self.readout = widgets.HTML(layout=widgets.Layout(width="270px", margin="0 0 0 8px"))
        self.readout.add_class(CSS["readout"])
        self.progress = output if output is not None else widgets.Output(
            layout=widgets.Layout(min_height="0px"))
        self.progress_bar = widgets.FloatProgress(value=0.0, min=0.0, max=1.0,
                                                  layout=widgets.Layout(width="300px"))
        self.progress_label = widgets.Label("")
        self.progress_box = widgets.HBox([self.progress_bar, self.progress_label],
                                         layout=widgets.Layout(display="none"))
        row1 = widgets.HBox([c["source"], c["signed"], c["per_channel"], c["channel"]],
                            layout=widgets.Layout(align_items="center"))
        row2 = widgets.HBox([c["method"], c["keep_clip"], c["fit"], c["steps"], c["learn"],
                             c["reset"]], layout=widgets.Layout(align_items="center"))
        self.children = [
            self.heading, row1,
            widgets.HBox([widgets.VBox([c["bits"], c["scale"], c["offset"]]),
                          widgets.VBox([c["noise"], c["temperature"], c["probe"]])]),
            row2, self.progress_box,
            # the readouts sit beside the plots, and wrap below them in a narrow notebook
            widgets.HBox([self.canvas.image, self.readout],
                         layout=widgets.Layout(flex_flow="row wrap", align_items="flex-start")),
            self.progress, self.message.widget,
        ]
        self.add_class(CSS["root"])

    _syncing = False

    def _make_observer(self, name: str):
        handler = getattr(self, f"_set_{name}")

        def observe(change):
            if self._syncing:
                return
            before = self._state_key()
            try:
                handler(change["new"])
            except Exception as exc:
                self.message.error(exc, f"setting {name}")
                self._sync_controls()  # put the controls back to the state that is still valid
                return
            if self._state_key() != before:
                self.message.clear()  # a message describes a state that has just changed
            self._updater.request()

        return observe

    def _state_key(self) -> tuple:
        """What the explorer shows, to tell a change of state from a control event that changed
        nothing (a front end re-sending a value): only a change clears the message."""
        st = self.state
        return (repr(st.shown_grid()), st.source, st.noise_steps, st.temperature, st.method,
                st.keep_clip, st.channel, st.grid.axis)

    # ================================================================== edits from controls
    def _set_bits(self, value) -> None:
        self.state.set_bits(value)
        self._sync_controls()  # a width the device does not run: the slider shows the one taken

    def _set_scale(self, value) -> None:
        self.state.set_channel_param("scale", float(value))

    def _set_offset(self, value) -> None:
        self.state.set_channel_param("offset", float(value))

    def _set_noise(self, value) -> None:
        self.state.set_noise_steps(value)

    def _set_temperature(self, value) -> None:
        self.state.set_temperature(value)

    def _set_probe(self, value) -> None:
        self.state.probe[self.state.source] = float(value)

    def _set_source(self, value) -> None:
        self.state.set_source(value)
        self._select_static()
        self._sync_controls()

    def _set_signed(self, value) -> None:
        self.state.set_signed(bool(value))
        self._sync_controls()

    def _set_per_channel(self, value) -> None:
        self.state.set_per_channel(bool(value))
        self._select_static()
        self._sync_controls()

    def _set_channel(self, value) -> None:
        self.state.set_channel(value)
        self._select_static()
        self._sync_controls()

    def _set_method(self, value) -> None:
        self.state.set_method(value)

    def _set_keep_clip(self, value) -> None:
        self.state.keep_clip = bool(value)

    # ================================================================== controls <- state
    def _sync_controls(self) -> None:
        c, st = self.controls, self.state
        g = st.shown_grid()
        self._syncing = True
        try:
            with self.hold_sync():
                c["source"].value = st.source
                c["bits"].value = g.bits
                step_window(c["scale"], st.fitted_step(), float(g.scale))
                off = c["offset"]
                r = max(abs(self._data_range[0]), abs(self._data_range[1]), 2 * abs(float(g.offset)), 1e-12)
                off.min, off.max = -r, r
                off.min = -r
                off.step = r / 2000
                # an offset within rounding of zero is shown as 0 (as the readout prints it)
                zero = fmt_value(float(g.offset), float(g.scale)) == "0"
                off.value = 0.0 if zero else float(g.offset)
                c["noise"].value = st.noise_steps
                c["temperature"].value = st.temperature
                c["signed"].value = g.signed
                c["per_channel"].value = st.grid.axis is not None
                c["per_channel"].disabled = not st.can_per_channel(st.source) or (
                    st.rules is not None and not st.rules.per_channel_weights)
                off.disabled = st.symmetric_only(st.source)
                c["channel"].max = max(st.n_channels() - 1, 0)
                c["channel"].value = st.channel
                c["channel"].disabled = st.grid.axis is None
                c["method"].value = st.method
                c["keep_clip"].value = st.keep_clip
            self._sync_probe_range()
        finally:
            self._syncing = False

    def _sync_probe_range(self) -> None:
        view = self.figure.view
        if view is None:
            return
        p = self.controls["probe"]
        was, self._syncing = self._syncing, True
        try:
            lo, hi = view
            if p.min > hi:
                p.min = lo
            p.max, p.min = hi, lo
            p.step = (hi - lo) / 2000
            value = min(max(self.state.probe[self.source], lo), hi)
            self.state.probe[self.source] = value
            p.value = value
        finally:
            self._syncing = was

    def set_controls_enabled(self, enabled: bool) -> None:
        """Enable or disable every control but the learn / stop button (while learning)."""
        for name, w in self.controls.items():
            if name != "learn" and hasattr(w, "disabled"):
                w.disabled = not enabled
        if enabled:
            self._sync_controls()  # per-channel and channel enablement follow the state
            self.controls["source"].disabled = len(self.subject.sources) == 1

