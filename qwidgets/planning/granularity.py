"""Weight granularity options: one scale per tensor, per output channel, or per block.

``scan(..., granularity=("channel", 32, 128))`` measures every option at every width (the
columns of the passes: every width of the first option, then of the next, ...); the first
option gives the table's default rows and must be ``"tensor"`` or ``"channel"``; an entry
whose input axis is shorter than a block skips that option (NaN rows, no grids) and the
table's coverage says so (``skipped_options``).

An option is ``"tensor"``, ``"channel"`` or an int ``g`` >= 1 (one scale per block of ``g``
consecutive weights along the input axis: 1 for a Linear / Conv weight [out, in, ...], 0 for
a weight stored [in, out, ...] such as a transposed convolution's; embedding rows are blocked
along the embedding dimension). Blocks follow the ONNX opset 21 blocked layout (see
``core.blocks``).
"""

from __future__ import annotations

from collections.abc import Sequence
from numbers import Integral

import numpy as np

from ..core.checks import check_int
from ..core.grid_cache import fit_cached_together
from ..core.ranges import RangeFitter

__all__ = ["check_granularity", "check_option", "input_axis", "option_label", "option_from_label",
           "block_skip_reason", "grid_options", "scan_granularity", "split_granularities",
           "granularity_rows", "fit_options"]


def check_option(option, name: str = "granularity"):
    """One option: ``"tensor"``, ``"channel"`` or a block size (an int >= 1)."""
    if isinstance(option, str):
        if option not in ("tensor", "channel"):
            raise ValueError(f"{name} options are 'tensor', 'channel' or a block size (an int "
                             f">= 1), got {option!r}")
        return option
    if isinstance(option, bool) or not isinstance(option, Integral):
        raise TypeError(f"{name} options are 'tensor', 'channel' or a block size (an int >= 1), "
                        f"got {option!r} ({type(option).__name__})")
    return check_int(option, f"{name} block size", minimum=1)


def check_granularity(granularity, per_channel: bool = True, *, given_per_channel: bool = False,
                      name: str = "granularity") -> tuple:
    """The options to measure, in the order given, duplicates dropped. None: ``("channel",)``
    (``("tensor",)`` when ``per_channel`` is False). Giving both ``per_channel=False``
    (``given_per_channel``) and ``granularity`` is refused: say ``"tensor"`` instead.

    >>> check_granularity(("channel", 32, 32, "tensor"))
    ('channel', 32, 'tensor')
    """
    if granularity is None:
        return ("channel",) if per_channel else ("tensor",)
    if given_per_channel:
        raise ValueError(f"give per_channel=False or {name}=, not both: per_channel=False is "
                         f"{name}=('tensor',)")
    if isinstance(granularity, (str, Integral)):
        granularity = (granularity,)
    if not isinstance(granularity, Sequence) or not granularity:
        raise TypeError(f"{name} must be a non-empty tuple of options ('tensor', 'channel' or block "
                        f"sizes), got {granularity!r}")
    out: list = []
    for v in granularity:
        v = check_option(v, name)
        if v not in out:
            out.append(v)
    return tuple(out)


def input_axis(channel_axis: int) -> int:
    """The blocked (input) axis of a weight whose per-channel (output) axis is ``channel_axis``."""
    return 1 if channel_axis == 0 else 0


def block_skip_reason(shape: Sequence[int], channel_axis: int, g: int) -> str | None:
    """Why a weight of ``shape`` cannot take blocks of ``g`` (None when it can)."""
    if len(shape) < 2:
        return f"blocks of {g}: the weight has no input axis"
    n = shape[input_axis(channel_axis)]
    if n < g:
        return f"blocks of {g}: its input axis holds {n} values, fewer than a block"
    return None


def grid_options(option, channel_axis: int) -> dict:
    """The ``fit_range`` keywords (axis, block_size) of an option for a weight."""
    if option == "tensor":
        return {"axis": None}
    if option == "channel":
        return {"axis": channel_axis}
    return {"axis": input_axis(channel_axis), "block_size": option}


def option_label(option) -> str:
    """An option as a JSON object key: ``"tensor"``, ``"channel"`` or the block size in digits."""
    return option if isinstance(option, str) else str(int(option))


def option_from_label(label: str, where: str):
    if label in ("tensor", "channel"):
        return label
    if isinstance(label, str) and label.isdigit() and int(label) >= 1:
        return int(label)
    raise ValueError(f"{where}: a granularity is 'tensor', 'channel' or a block size, got {label!r}")


def scan_granularity(granularity, per_channel, rules, quantize) -> tuple:
    """(the options a scan measures, the table's per_channel), checked against the scan's other
    arguments (see ``scan``'s ``granularity``)."""
    grans = check_granularity(granularity, per_channel, given_per_channel=per_channel is False)
    if grans[0] not in ("tensor", "channel"):
        raise ValueError(f"granularity={granularity!r}: the first option gives the table's default "
                         "rows and must be 'channel' or 'tensor', e.g. ('channel', 32, 128)")
    if granularity is not None and quantize == "input":
        raise ValueError("granularity= chooses weight grids; quantize='input' scans no weights")
    if rules is not None and not rules.per_channel_weights:
        per_channel = False
        if granularity is None:
            grans = ("tensor",)
        elif grans != ("tensor",):
            raise ValueError(f"granularity={granularity!r} conflicts with the device rules "
                             "(per_channel_weights=False: one scale per tensor); use ('tensor',)")
    return grans, (per_channel if quantize == "input" else grans[0] == "channel")


def split_granularities(fields: dict) -> dict:
    """A scan's fields with the columns of every granularity option (one block of widths per
    option) split into the table's rows of the first option and ``granularity_rows`` of the
    others; NaN where an entry skipped an option."""
    grans = fields.pop("granularities", None)
    if grans is None:
        return fields
    n, out = len(fields["bits"]), dict(fields)
    wg = fields["weight_grids"]
    rows = {}
    for k, opt in enumerate(grans):
        part = {}
        for scope in ("layer", "model"):
            arr = fields[f"{scope}_sqnr"]
            if arr is not None:
                arr = np.array(arr[:, k * n:(k + 1) * n], dtype=float)
                for i, name in enumerate(fields["layers"]):
                    if wg[name] is not None and wg[name][k] is None:  # skipped (None: no weight)
                        arr[i] = np.nan
            part[f"{scope}_sqnr"] = arr
        part["weight_grids"] = {name: None if wg[name] is None else (wg[name][k] or [None] * n)
                                for name in fields["layers"]}  # None: no weight (an activation)
        rows[opt] = part
    first = rows.pop(grans[0])
    out.update(first, granularities=grans, granularity_rows=rows)
    return out


def granularity_rows(rows, grans: tuple, layers: list, n_bits: int, sqnr: dict) -> dict:
    """A table's rows of its options after the first, checked: option -> {"layer", "model"
    (arrays of ``len(layers) x n_bits`` given exactly where the table's own ``sqnr`` is),
    "grids" (entry -> grids, or None)}."""
    rows = dict(rows or {})
    if set(rows) != set(grans[1:]):
        raise ValueError(f"granularity_rows must hold the options {list(grans[1:])} (the first, "
                         f"{grans[0]!r}, is the table's own rows), got {list(rows)}")
    out, shape = {}, (len(layers), n_bits)
    for opt, part in rows.items():
        more = {}
        for scope in ("layer", "model"):
            arr = part.get(f"{scope}_sqnr")
            if (arr is None) != (sqnr[scope] is None) or (arr is not None and np.shape(arr) != shape):
                raise ValueError(f"granularity_rows[{opt!r}]['{scope}_sqnr'] must be a {shape} array "
                                 f"exactly when {scope}_sqnr is given")
            more[scope] = None if arr is None else np.asarray(arr, dtype=float).copy()
        g = part.get("weight_grids")
        more["grids"] = None if g is None else {n: None if g.get(n) is None else list(g[n]) for n in layers}
        out[opt] = more
    return out


def fit_options(weights: list, options: tuple, bits, method, rules, notes: list, workers: int = 1) -> dict:
    """Entry name -> the grids of each granularity option at every width (None where the entry
    skips the option, and why appended to ``notes``). ``weights``: (values checked by the caller,
    entry, grid-cache digest or None) per entry. Every missing grid is fitted in one call
    (:func:`~qwidgets.core.grid_cache.fit_cached_together`: the searches of weights that share
    a row length run as one, on ``workers`` threads; a weight of
    :data:`~qwidgets.core.fit_groups.GROUP_VALUES` values or more is searched alone and its sorted
    copy dropped once fitted, so a large model's weights are not all held sorted at once)."""
    fitters, where, out = [], [], {}
    for w, e, digest in weights:
        out[e.name] = [None] * len(options)
        for k, option in enumerate(options):
            why = block_skip_reason(e.shape, e.axis, option) if isinstance(option, int) else None
            if why is not None:
                notes.append((e.name, why))
                continue
            fitter = RangeFitter(w, method, rules=rules, check_finite=False, **grid_options(option, e.axis))
            fitter.digest = digest  # the scan's state digest: no second hash of the weight
            fitters.append(fitter)
            where.append((e.name, k))
    grids_of = fit_cached_together(fitters, bits, workers=workers, release=True)
    for i, (name, k) in enumerate(where):
        out[name][k] = grids_of[i]
    return out
