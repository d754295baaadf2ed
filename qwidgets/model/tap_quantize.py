"""Quantizing the inputs that taps reach: attention activations, the context entering an
attention's output projection, the other operand of a weight found by use.

Used by the quantized passes of :mod:`qwidgets.model.forward` (inside :func:`.taps.tapping`)
and by a planned copy (:func:`.taps.attach`).
"""

from __future__ import annotations

from collections.abc import Mapping

from ..core.checks import finite_check
from ..core.grid import UniformGrid
from ..core.rounding import quantize_unchecked
from .entries import Entry, tapped
from .layers import LayerInputError
from .taps import Tap


class EachTap(Tap):
    """Applies ``fn(entry name, tensor) -> tensor`` to the input of each of ``entries`` (entries
    whose inputs go through taps: :func:`~.entries.tapped`) wherever the model computes it; the
    others are left alone. ``ran`` collects the names of the entries reached.

    A planned copy quantizes with it (:class:`QuantizeTap`); an export can mark the same points.
    """

    def __init__(self, entries, fn):
        entries = list(entries)
        self.names = {e.name for e in entries}
        self.products = {e.name: e.param for e in entries if e.kind == "product"}
        self.paths = {e.module if e.kind == "activation" else e.name.rpartition(".")[0]
                      for e in entries if e.kind != "product"}
        self.fn = fn
        self.ran: list[str] = []

    def attention(self, path: str) -> bool:
        return path in self.paths

    def parameters(self, named: dict) -> dict:
        return {id(named[p]): name for name, p in self.products.items() if p in named}

    def activation(self, name, t):
        return self._apply(name, t) if name in self.names else t

    def operand(self, name, x, w, param, recompute, axis):
        return self._apply(name, x)

    def _apply(self, name, t):
        if name not in self.ran:
            self.ran.append(name)
        return self.fn(name, t)


class QuantizeTap(EachTap):
    """Fake-quantizes each tapped entry's input on its grid.

    ``grids``: entry -> input grid (only entries with :func:`~.entries.tapped` inputs);
    ``check``: scan each value for NaN / inf before quantizing it (except tensors whose ``id``
    is in ``checked``); ``observe(name, value, quantized)``: called on each quantized value.
    """

    def __init__(self, grids: Mapping[Entry, UniformGrid], *, check: bool = True, checked=frozenset(),
                 observe=None):
        super().__init__(grids, self._quantize)
        self.grids = {e.name: g for e, g in grids.items()}
        self.check, self.checked, self.observe = check, checked, observe

    def _quantize(self, name, t):
        if self.check and id(t) not in self.checked and t.is_floating_point():
            finite_check(t, f"the input of {name!r}", LayerInputError)
        q = quantize_unchecked(t, self.grids[name])
        if self.observe is not None:
            self.observe(name, t, q)
        return q


def tapped_inputs(settings: Mapping) -> dict:
    """The entries of ``settings`` (Entry -> LayerSetting) whose input grid goes through taps."""
    return {e: s.input for e, s in settings.items() if s.input is not None and tapped(e)}
