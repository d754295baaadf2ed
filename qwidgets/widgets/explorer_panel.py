"""The grid explorer's controls and readout panel: widget construction and text, no state.

Every control carries a stable CSS class ``qw-<name>`` (``qw-bits``, ``qw-scale``, ...,
underscores as hyphens) so front-end tests and the demo can find it; the readout table's
value cells carry ``qw-r-<row name>`` (``qw-r-tensor-sqnr``, ``qw-r-layer-output-sqnr``, ...).
"""

from __future__ import annotations

import html
import math

import ipywidgets as widgets

from ..core.ranges import METHODS

__all__ = ["METHOD_LABELS", "SOURCE_LABELS", "fmt_value", "make_controls", "readout_html",
           "readout_rows", "step_window"]

STEP_WINDOW = 8.0  # the step control spans the fitted step divided / multiplied by this
STEP_POSITIONS = 900  # positions of the step control over that window (about 0.5 % apart)

METHOD_LABELS = {"mse": "MSE-optimal", "percentile": "percentile (99.99)", "minmax": "min-max"}
SOURCE_LABELS = {"weight": "weights", "input": "layer input", "values": "values"}


def make_controls(sources: tuple, source: str, method: str, noise: float, temperature: float,
                  *, has_layer: bool) -> dict:
    """The explorer's controls by name (values are set later from the explorer's state).

    >>> c = make_controls(("values",), "values", "mse", 0.3, 0.5, has_layer=False)
    >>> c["bits"].max, c["learn"].disabled, "qw-per-channel" in c["per_channel"]._dom_classes
    (16, True, True)
    """
    style = {"description_width": "92px"}
    wide = widgets.Layout(width="330px")
    c: dict[str, widgets.Widget] = {}
    c["bits"] = widgets.IntSlider(value=4, min=1, max=16, description="bits",
                                  style=style, layout=wide, continuous_update=True)
    c["scale"] = widgets.FloatLogSlider(value=1.0, base=10, min=-1, max=1, step=0.002,
                                        description="scale (step)", readout_format=".4g",
                                        style=style, layout=wide)
    c["offset"] = widgets.FloatSlider(value=0.0, min=-1, max=1, step=0.001, description="offset",
                                      readout_format=".4g", style=style, layout=wide)
    c["noise"] = widgets.FloatLogSlider(value=noise, base=10, min=-2, max=0.5, step=0.01,
                                        description="noise (steps)", readout_format=".3g",
                                        style=style, layout=wide)
    c["temperature"] = widgets.FloatLogSlider(value=temperature, base=10, min=-2, max=1,
                                              step=0.01, description="temperature",
                                              readout_format=".3g", style=style, layout=wide)
    c["probe"] = widgets.FloatSlider(value=0.0, min=-1, max=1, step=0.001, description="probe value",
                                     readout_format=".4g", style=style, layout=wide)
    c["source"] = widgets.ToggleButtons(
        options=[(SOURCE_LABELS[s], s) for s in sources], value=source,
        description="quantize", style={"description_width": "60px", "button_width": "100px"},
        disabled=len(sources) == 1,
    )
    c["signed"] = widgets.Checkbox(value=True, description="signed codes", indent=False,
                                   layout=widgets.Layout(width="130px"))
    c["per_channel"] = widgets.Checkbox(value=False, description="per channel", indent=False,
                                        layout=widgets.Layout(width="120px"))
    c["channel"] = widgets.BoundedIntText(value=0, min=0, max=0, description="channel",
                                          style={"description_width": "60px"},
                                          layout=widgets.Layout(width="150px"))
    c["keep_clip"] = widgets.Checkbox(value=False, description="keep clip range", indent=False,
                                      tooltip="a new bit width keeps the clip range instead of "
                                              "refitting it", layout=widgets.Layout(width="130px"))
    c["method"] = widgets.Dropdown(options=[(METHOD_LABELS[m], m) for m in METHODS],
                                   value=method, description="range fit",
                                   style={"description_width": "60px"},
                                   layout=widgets.Layout(width="220px"))
    c["fit"] = widgets.Button(description="fit range", icon="arrows-h",
                              layout=widgets.Layout(width="100px"))
    c["steps"] = widgets.BoundedIntText(value=200, min=1, max=100000, description="steps",
                                        style={"description_width": "40px"},
                                        layout=widgets.Layout(width="120px"))
    c["learn"] = widgets.Button(description="learn", icon="graduation-cap",
                                disabled=not has_layer,
                                tooltip="learn scale, offset and noise (relaxed quantization)",
                                layout=widgets.Layout(width="90px"))
    c["reset"] = widgets.Button(description="reset", icon="undo",
                                layout=widgets.Layout(width="80px"))
    for name, w in c.items():
        w.add_class(f"qw-{name.replace('_', '-')}")
    return c


def readout_html(title: str, rows: list) -> str:
    """The readout panel: a titled two-column table, each value cell classed ``qw-r-<name>``.

    >>> readout_html("weights", [("tensor SQNR", "20.00 dB")]).count("qw-r-tensor-sqnr")
    1
    """
    lines = [f"<div style='font-size:12px;line-height:1.5'><b>{html.escape(title)}</b>"
             "<table style='border-collapse:collapse'>"]
    for name, text in rows:
        if text is None:  # a section heading
            lines.append(f"<tr><td colspan='2' style='padding-top:4px'><i>{html.escape(name)}"
                         "</i></td></tr>")
            continue
        cls = "qw-r-" + name.replace(" ", "-").replace("(", "").replace(")", "").lower()
        lines.append(f"<tr><td style='padding-right:8px;color:#555;vertical-align:top'>"
                     f"{html.escape(name)}</td><td class='{cls}'>{html.escape(text)}</td></tr>")
    lines.append("</table></div>")
    return "".join(lines)


def fmt_value(v: float, unit: float) -> str:
    """A value with 4 significant digits, the slider's format; within rounding of zero
    (below 1e-6 of ``unit``, e.g. the step) it prints as 0.

    >>> fmt_value(-1.110e-16, 0.043), fmt_value(0.0431512, 0.043), fmt_value(-0.25, 1.0)
    ('0', '0.04315', '-0.25')
    """
    if not math.isfinite(v):
        return str(v)
    if abs(v) <= 1e-6 * abs(unit):
        return "0"
    return f"{v:.4g}"


def step_window(slider, centre: float, value: float) -> None:
    """Put the log step slider's window at ``centre`` / 8 .. ``centre`` * 8 and show ``value``.

    The window moves only when the centre (the fitted step) changes or ``value`` falls
    outside it, never while the slider itself is dragged (its values stay inside).

    >>> s = widgets.FloatLogSlider(min=-1, max=1)
    >>> step_window(s, 0.01, 0.012)
    >>> round(10 ** s.min, 6), round(10 ** s.max, 6), s.value
    (0.00125, 0.08, 0.012)
    """
    e = math.log10(centre)
    half = math.log10(STEP_WINDOW)
    lo, hi = e - half, e + half
    v = math.log10(value)
    if abs(slider.min - lo) > 1e-9 or abs(slider.max - hi) > 1e-9 or not lo <= v <= hi:
        lo, hi = min(lo, v - 0.05), max(hi, v + 0.05)
        if lo >= slider.max:
            slider.max = hi
            slider.min = lo
        else:
            slider.min = lo
            slider.max = hi
        slider.step = (hi - lo) / STEP_POSITIONS
    slider.value = value


def readout_rows(state, tensor, layer, *, map_codes=None, ticks_every: int = 1) -> list:
    """The readout as (name, text) rows; a text of None is a section heading.

    ``tensor``: (ErrorStats, GridUsage) of the whole tensor; ``layer``: the layer-output
    ErrorStats, a sampled estimate (``.stats``, ``.sqnr_se_db``, ``.rows``, ``.total``) or
    None. In per-channel mode the channel's grid and the whole tensor's figures are headed as
    such. ``map_codes``: the codes the bin map shows; ``ticks_every``: 1 in that many grid
    points is drawn in the histogram.
    """
    g, shown = state.grid, state.shown_grid()
    stats, usage = tensor
    step = float(shown.scale)
    per_channel = g.axis is not None
    rows = [("bits", f"{g.bits} ({g.n_levels:,} levels, {'signed' if g.signed else 'unsigned'})")]
    if per_channel:
        s = g.scale_tensor()
        rows.append((f"channel {state.channel} of {s.numel()}", None))
    rows.append(("step", fmt_value(step, step)))
    rows.append(("offset", fmt_value(float(shown.offset), step)))
    lo, hi = shown.clip_range
    rows.append(("clip range", f"{fmt_value(lo, step)} to {fmt_value(hi, step)}"))
    if map_codes is not None:
        rows.append(("bin map", f"codes {map_codes[0]} to {map_codes[1]}"))
    if ticks_every > 1:
        rows.append(("grid points drawn", f"1 in {ticks_every}"))
    if per_channel:
        rows.append(("steps of all channels", f"{float(s.min()):.3g} to {float(s.max()):.3g}"))
        rows.append(("whole tensor", None))
    rows.append(("clipped", f"{100 * usage.clipped_fraction:.3g} %"))
    rows.append(("bins used", f"{usage.bins_used:,} of {usage.n_bins:,} "
                              f"({100 * usage.used_fraction:.0f} %)"))
    rows.append(("tensor SQNR", f"{stats.sqnr_db:.2f} dB"))
    if layer is not None:
        if hasattr(layer, "sqnr_se_db"):
            ls = layer.stats
            rows.append(("layer-output SQNR", f"{ls.sqnr_db:.2f} +-{layer.sqnr_se_db:.2f} dB "
                                              f"({layer.rows} of {layer.total} rows)"))
        else:
            ls = layer
            rows.append(("layer-output SQNR", f"{ls.sqnr_db:.2f} dB"))
        rows.append(("relative error", f"{ls.rel_err:.4g}"))
        rows.append(("cosine similarity", f"{ls.cosine:.6f}"))
    rows.append(("noise (steps)", f"{state.noise_steps:.3g} ({state.noise_steps * step:.3g} in value units)"))
    rows.append(("temperature", f"{state.temperature:.3g}"))
    return rows
