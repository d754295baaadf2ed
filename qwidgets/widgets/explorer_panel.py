"""The grid explorer's controls and readout panel: widget construction and text, no state.

Every control carries a stable CSS class ``qw-<name>`` (``qw-bits``, ``qw-scale``, ...,
underscores as hyphens) so front-end tests and the demo can find it; the readout table's
value cells carry ``qw-r-<row name>`` (``qw-r-tensor-sqnr``, ``qw-r-layer-output-sqnr``, ...).
"""

from __future__ import annotations

import html

import ipywidgets as widgets

from ..core.ranges import METHODS

__all__ = ["METHOD_LABELS", "SOURCE_LABELS", "make_controls", "readout_html"]

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
    c["scale"] = widgets.FloatLogSlider(value=1.0, base=10, min=-2, max=2, step=0.005,
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
        cls = "qw-r-" + name.replace(" ", "-").lower()
        lines.append(f"<tr><td style='padding-right:8px;color:#555;vertical-align:top'>"
                     f"{html.escape(name)}</td><td class='{cls}'>{html.escape(text)}</td></tr>")
    lines.append("</table></div>")
    return "".join(lines)
