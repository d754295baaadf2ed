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


class QuantizeTap(Tap):
    """Fake-quantizes each tapped entry's input on its grid.

    ``grids``: entry -> input grid (only entries with :func:`~.entries.tapped` inputs);
    ``check``: scan each value for NaN / inf before quantizing it (except tensors whose ``id``
    is in ``checked``); ``ran`` collects the names of the entries quantized.
    """

    def __init__(self, grids: Mapping[Entry, UniformGrid], *, check: bool = True, checked=frozenset()):
        self.grids = {e.name: g for e, g in grids.items()}
        self.products = {e.name: e.param for e in grids if e.kind == "product"}
        self.paths = {e.module if e.kind == "activation" else e.name.rpartition(".")[0]
                      for e in grids if e.kind != "product"}
        self.check, self.checked = check, checked
        self.ran: list[str] = []

    def attention(self, path: str) -> bool:
        return path in self.paths

    def parameters(self, named: dict) -> dict:
        return {id(named[p]): name for name, p in self.products.items() if p in named}

    def activation(self, name, t):
        grid = self.grids.get(name)
        return t if grid is None else self._quantize(name, t, grid)

    def operand(self, name, x, w, param, recompute, axis):
        return self._quantize(name, x, self.grids[name])

    def _quantize(self, name, t, grid):
        if name not in self.ran:
            self.ran.append(name)
        if self.check and id(t) not in self.checked and t.is_floating_point():
            finite_check(t, f"the input of {name!r}", LayerInputError)
        return quantize_unchecked(t, grid)


def tapped_inputs(settings: Mapping) -> dict:
    """The entries of ``settings`` (Entry -> LayerSetting) whose input grid goes through taps."""
    return {e: s.input for e, s in settings.items() if s.input is not None and tapped(e)}
