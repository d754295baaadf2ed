"""The grid explorer's readout panel: text only, from the state and the measured figures.

The readout table's value cells carry ``qw-r-<row name>`` (``qw-r-tensor-sqnr``,
``qw-r-layer-output-sqnr``, ...) so front-end tests can find them. Values print in
engineering notation with 4 significant digits, as the controls' boxes print them.
"""

from __future__ import annotations

import html
import math

from .explorer_blocks import block_label, granularity_label
from .number_control import eng

__all__ = ["METHOD_LABELS", "SOURCE_LABELS", "WARN_CLIPPED", "fmt3", "fmt_value", "readout_html",
           "clip_warning", "origin_text", "readout_rows"]

WARN_CLIPPED = 0.05  # a grid clipping more than this share of the values gets a warning
METHOD_LABELS = {"mse": "MSE-optimal", "percentile": "percentile (99.99)", "minmax": "min-max"}
SOURCE_LABELS = {"weight": "weights", "input": "layer input", "values": "values"}


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


def fmt3(v: float) -> str:
    """Three significant digits (noise in steps, temperature: numbers near 1).

    >>> fmt3(0.4), fmt3(2.0), fmt3(0.012345)
    ('0.4', '2', '0.0123')
    """
    return f"{v:.3g}"


def fmt_value(v: float, unit: float) -> str:
    """A value in engineering notation with 4 significant digits, as the controls' boxes print
    it; within rounding of zero (below 1e-6 of ``unit``, e.g. the step) it prints as 0.

    >>> fmt_value(-1.110e-16, 0.043), fmt_value(0.0431512, 0.043), fmt_value(-0.25, 1.0)
    ('0', '43.15m', '-250m')
    """
    if not math.isfinite(v):
        return str(v)
    if abs(v) <= 1e-6 * abs(unit):
        return "0"
    return eng(v)


def readout_rows(state, tensor, layer, *, map_codes=None, ticks_every: int = 1) -> list:
    """The readout as (name, text) rows; a text of None is a section heading.

    ``tensor``: (ErrorStats, GridUsage) of the whole tensor; ``layer``: the layer-output
    ErrorStats, a sampled estimate (``.stats``, ``.sqnr_se_db``, ``.rows``, ``.total``) or
    None. In per-channel mode the channel's grid and the whole tensor's figures are headed as
    such; with a block grid, the block's (``block 3 of 8 (inputs 96-127)``). ``map_codes``: the codes the bin map shows; ``ticks_every``: 1 in that many grid
    points is drawn in the histogram.
    """
    g, shown = state.grid, state.shown_grid()
    stats, usage = tensor
    step = float(shown.scale)
    per_channel = g.axis is not None
    per = "" if g.axis is None else f", {granularity_label(g.granularity)}"  # per channel / blocks of g
    rows = [("bits", f"{g.bits} ({g.n_levels:,} levels, {'signed' if g.signed else 'unsigned'}){per}"),
            ("grid shown", origin_text(state.origin()))]
    if per_channel:
        s = g.scale_tensor()
        rows.append((f"channel {state.channel} of {state.n_channels()}", None))
        if g.blocked:  # the figures above the whole tensor's are the block's
            rows.append((block_label(g, state.channel, state.block, state.values[state.source].shape[g.axis]),
                         None))
    rows.append(("step", fmt_value(step, step)))
    rows.append(("offset", fmt_value(float(shown.offset), step)))
    lo, hi = shown.clip_range
    rows.append(("clip range", f"{fmt_value(lo, step)} to {fmt_value(hi, step)}"))
    if map_codes is not None:
        rows.append(("codes drawn in the bin map", f"{map_codes[0]} to {map_codes[1]}"))
    if ticks_every > 1:
        rows.append(("grid points drawn", f"1 in {ticks_every}"))
    if per_channel:
        rows.append((f"steps of all {'blocks' if g.blocked else 'channels'}",
                     f"{float(s.min()):.3g} to {float(s.max()):.3g}"))
        rows.append(("whole tensor", None))
    rows.append(("clipped", f"{100 * usage.clipped_fraction:.3g} %"))
    if usage.clipped_fraction > WARN_CLIPPED:
        why = " (unsigned codes on signed values)" if not g.signed and \
            state.negative_share(state.source) > 0 else ""
        rows.append(("warning", f"{100 * usage.clipped_fraction:.3g} % of the values clip{why}"))
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
    rows.append(("noise (steps)", f"{fmt3(state.noise_steps)} ({eng(state.noise_steps * step)} in value units)"))
    rows.append(("temperature", fmt3(state.temperature)))
    return rows


def origin_text(origin: tuple) -> str:
    """How the grid shown came about, in words.

    >>> origin_text(("fitted", "percentile")), origin_text(("learned", 40))
    ('fitted, percentile (99.99)', 'learned (40 steps)')
    """
    kind, detail = origin
    if kind == "fitted":
        return f"fitted, {METHOD_LABELS[detail]}"
    if kind == "learned":
        return "learned" if detail is None else f"learned ({detail} steps)"
    if kind == "clip range kept":
        return f"clip range kept from {detail} bits"
    return {"edited": "edited by hand", "given": "given (a setting or a script)",
            "learning": "learning (latest step)"}.get(kind, str(kind))


def clip_warning(state, usage) -> str:
    """A warning when the grid clips a large share of the values ("" when it does not).

    ``usage``: the :class:`~qwidgets.core.metrics.GridUsage` of the grid on the values.
    """
    if usage.clipped_fraction <= WARN_CLIPPED:
        return ""
    why = ""
    negative = state.negative_share(state.source)
    if not state.grid.signed and negative > 0:
        why = f" (unsigned codes on signed values: {100 * negative:.3g} % are negative)"
    return f"warning: this grid clips {100 * usage.clipped_fraction:.3g} % of the values{why}"
