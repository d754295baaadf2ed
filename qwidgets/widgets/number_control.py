"""A number in a model, shown by a slider of whole positions and a box that prints it exactly.

:class:`NumberControl` binds one float trait of a ``traitlets.HasTraits`` model to two
controls: an ``IntSlider`` over positions ``0..n`` (the mapping from positions to values,
:class:`LogPositions` or :class:`LinearPositions`, lives in the kernel) and a text box that
prints the model's value (:func:`eng`, or a formatter given) and takes a typed one
(:func:`parse_number`). The kernel writes only whole positions inside the slider's range and
text, which a browser shows as they are: it has nothing to send back, so every message from
the browser is a person's move and is taken. The model keeps the exact value; the slider
shows the position nearest to it.

A person's move on the slider sets the model to that position's value, unless the slider
already showed the model's value there (then nothing moved). A typed value goes to the model
as typed. A value the model refuses (its validation raises) is reported to ``on_error`` and
the controls show the model's value again. ``before()``, when given, runs before a
control's value goes to the model.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable

import ipywidgets as widgets

__all__ = ["NumberControl", "LogPositions", "LinearPositions", "bind", "eng", "parse_number"]

_PREFIXES = {-24: "y", -21: "z", -18: "a", -15: "f", -12: "p", -9: "n", -6: "µ", -3: "m",
             0: "", 3: "k", 6: "M", 9: "G", 12: "T", 15: "P", 18: "E", 21: "Z", 24: "Y"}
_SUFFIX = {v: k for k, v in _PREFIXES.items() if v}
_SUFFIX["u"] = -6


def eng(value: float, digits: int = 4) -> str:
    """``value`` in engineering notation: ``digits`` significant digits and an SI prefix.

    >>> eng(-0.17762345), eng(0.012), eng(1234567.0), eng(0.0), eng(2.5e-7), eng(1.0)
    ('-177.6m', '12m', '1.235M', '0', '250n', '1')
    """
    v = float(value)
    if v == 0 or not math.isfinite(v):
        return "0" if v == 0 else str(v)
    mant, exp = f"{abs(v):.{digits - 1}e}".split("e")
    e = int(exp)
    e3 = max(-24, min(24, 3 * math.floor(e / 3)))
    number = float(mant) * 10.0 ** (e - e3)
    text = f"{number:.{max(digits - 1 - (e - e3), 0)}f}"
    if "." in text:
        text = text.rstrip("0").rstrip(".")
    return ("-" if v < 0 else "") + text + _PREFIXES[e3]


def parse_number(text: str) -> float:
    """A typed number: plain or exponent notation, thousands commas, or an SI prefix.

    >>> parse_number("-177.6m"), parse_number("1,234"), parse_number("2.5e-3"), parse_number(" 12 k")
    (-0.1776, 1234.0, 0.0025, 12000.0)
    """
    t = str(text).strip().replace(",", "").replace(" ", "")
    m = re.fullmatch(r"([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)([yzafpnuµmkMGTPEZY]?)", t)
    if m is None:
        raise ValueError(f"expected a number (like 0.012, 12m or 1.2e-2), got {text!r}")
    return float(m.group(1)) * 10.0 ** _SUFFIX.get(m.group(2), 0) if m.group(2) else float(m.group(1))


class LinearPositions:
    """``n + 1`` evenly spaced values from ``lo`` to ``hi``.

    >>> p = LinearPositions(-1.0, 1.0, 200)
    >>> p.position(0.013), round(p.value(101), 12)
    (101, 0.01)
    """

    def __init__(self, lo: float, hi: float, n: int):
        if not hi > lo:
            raise ValueError(f"hi must be > lo, got {lo} .. {hi}")
        self.lo, self.hi, self.n = float(lo), float(hi), int(n)

    def value(self, position: int) -> float:
        return self.lo + (self.hi - self.lo) * position / self.n

    def position(self, value: float) -> int:
        p = round((float(value) - self.lo) / (self.hi - self.lo) * self.n)
        return int(min(max(p, 0), self.n))

    def contains(self, value: float) -> bool:
        return self.lo <= value <= self.hi


class LogPositions:
    """Values from ``lo`` to ``hi`` (both > 0) a constant ratio apart: ``ratio`` (e.g. 1.01,
    keyboard steps of 1 %) or ``n`` positions.

    >>> p = LogPositions(1.0, 100.0, n=200)
    >>> p.position(10.0), round(p.value(1), 6)
    (100, 1.023293)
    >>> LogPositions(2.0, 8.0, ratio=1.01).n
    140
    """

    def __init__(self, lo: float, hi: float, n: int | None = None, ratio: float | None = None):
        if not (0 < lo < hi):
            raise ValueError(f"a log scale needs 0 < lo < hi, got {lo} .. {hi}")
        self.lo, self.hi = float(lo), float(hi)
        span = math.log(self.hi / self.lo)
        self.n = int(n) if n is not None else max(1, math.ceil(span / math.log(ratio)))
        self._span = span

    def value(self, position: int) -> float:
        if position >= self.n:
            return self.hi
        return self.lo * math.exp(self._span * position / self.n)

    def position(self, value: float) -> int:
        v = float(value)
        if not v > 0:
            return 0
        p = round(math.log(v / self.lo) / self._span * self.n)
        return int(min(max(p, 0), self.n))

    def contains(self, value: float) -> bool:
        return self.lo <= value <= self.hi


class NumberControl(widgets.HBox):
    """A float trait ``name`` of ``model`` under a position slider and a text box.

    >>> import traitlets
    >>> class M(traitlets.HasTraits):
    ...     x = traitlets.Float(0.5)
    >>> m = M()
    >>> c = NumberControl(m, "x", LinearPositions(0.0, 1.0, 100), description="x")
    >>> c.slider.value, c.box.value
    (50, '500m')
    >>> c.slider.set_state({"value": 51})  # a person's move, as the browser sends it
    >>> m.x, c.box.value
    (0.51, '510m')
    >>> c.box.set_state({"value": "0.123"})  # a typed value is taken as typed
    >>> m.x, c.slider.value
    (0.123, 12)
    """

    def __init__(self, model, name: str, positions, *, description: str = "",
                 fmt: Callable[[float], str] = eng, on_error: Callable | None = None,
                 slider_width: str = "170px", box_width: str = "84px",
                 description_width: str = "92px", tooltip: str = "", before: Callable | None = None):
        self.slider = widgets.IntSlider(value=0, min=0, max=positions.n, step=1, readout=False,
                                        continuous_update=True, description=description,
                                        style={"description_width": description_width},
                                        layout=widgets.Layout(width=f"calc({slider_width} + "
                                                              f"{description_width})"))
        self.box = widgets.Text(value="", continuous_update=False, tooltip=tooltip,
                                layout=widgets.Layout(width=box_width))
        super().__init__([self.slider, self.box], layout=widgets.Layout(align_items="center"))
        self.model, self.name, self.fmt = model, name, fmt
        self.positions = positions
        self.on_error = on_error
        self.before = before
        self.show()
        model.observe(lambda _ch: self.show(), names=name)
        self.slider.observe(self._from_slider, names="value")
        self.box.observe(self._from_box, names="value")

    @property
    def disabled(self) -> bool:
        return self.slider.disabled

    @disabled.setter
    def disabled(self, value: bool) -> None:
        self.slider.disabled = self.box.disabled = bool(value)

    def set_positions(self, positions) -> None:
        """Use another mapping (e.g. a window around a new fitted value) and show the model."""
        self.positions = positions
        self.show()

    def show(self) -> None:
        """Write the model's value into the slider (nearest position) and the box (exact)."""
        v = getattr(self.model, self.name)
        with self.slider.hold_sync():
            if self.slider.max != self.positions.n:
                self.slider.max = self.positions.n
            self.slider.value = self.positions.position(v)
        self.box.value = self.fmt(v)

    def _set(self, value: float) -> None:
        if self.before is not None:
            self.before()
        try:
            setattr(self.model, self.name, value)
        except Exception as exc:  # refused by the model's validation: say so, show the model
            if self.on_error is None:
                raise
            self.on_error(exc, self.name)
            self.show()

    def _from_slider(self, change) -> None:
        if self.positions.position(getattr(self.model, self.name)) == change["new"]:
            return  # the slider shows the model's value: nothing moved
        self._set(self.positions.value(change["new"]))

    def _from_box(self, change) -> None:
        if change["new"] == self.fmt(getattr(self.model, self.name)):
            return  # the box shows the model's value
        try:
            value = parse_number(change["new"])
        except ValueError as exc:
            if self.on_error is None:
                raise
            self.on_error(exc, self.name)
            self.show()
            return
        self._set(value)


def bind(model, name: str, control, *, on_error: Callable | None = None, show: Callable | None = None,
         before: Callable | None = None, trait: str = "value") -> None:
    """Bind ``model.name`` and ``control.trait`` both ways (``widgets.link`` with errors kept).

    A value the model refuses goes to ``on_error(exc, name)`` and the control shows the model's
    value again. ``show()``, when given, writes the model into the control instead of a plain
    copy (e.g. new options first, then the value); ``before()`` runs before a control's value
    goes to the model (e.g. to clear a note about the state before).

    >>> import ipywidgets as widgets, traitlets
    >>> class M(traitlets.HasTraits):
    ...     on = traitlets.Bool(True)
    >>> m, box = M(), widgets.Checkbox()
    >>> bind(m, "on", box)
    >>> box.value, box.set_state({"value": False}), m.on
    (True, None, False)
    """
    def to_control(_change=None) -> None:
        if show is not None:
            show()
        else:
            setattr(control, trait, getattr(model, name))

    def to_model(change) -> None:
        if getattr(model, name) == change["new"]:
            return  # the control shows the model: nothing to take
        if before is not None:
            before()
        try:
            setattr(model, name, change["new"])
        except Exception as exc:
            if on_error is None:
                raise
            on_error(exc, name)
            to_control()

    to_control()
    model.observe(to_control, names=name)
    control.observe(to_model, names=trait)
