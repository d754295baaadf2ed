"""LayerSetting: the weight and input grids chosen for one layer."""

from __future__ import annotations

from dataclasses import dataclass

from .grid import UniformGrid
from .token_grid import TokenGrid

__all__ = ["LayerSetting", "SOURCES"]

SOURCES = ("weight", "input")  # the two sides of a layer a grid quantizes (LayerSetting's fields)


@dataclass(frozen=True)
class LayerSetting:
    """The grids for one layer: ``weight`` quantizes its weights, ``input`` what it receives.

    Either may be None (that side stays in float).

    >>> s = LayerSetting(weight=UniformGrid(4, 0.1))
    >>> s.weight.bits, s.input is None
    (4, True)
    """

    weight: UniformGrid | None = None
    input: UniformGrid | TokenGrid | None = None  # a TokenGrid: a scale per row, at run time

    def __post_init__(self):
        if self.weight is not None and not isinstance(self.weight, UniformGrid):
            raise TypeError(f"LayerSetting.weight must be a UniformGrid or None, got {type(self.weight).__name__}")
        if self.input is not None and not isinstance(self.input, (UniformGrid, TokenGrid)):
            raise TypeError(f"LayerSetting.input must be a UniformGrid, a TokenGrid or None, got "
                            f"{type(self.input).__name__}")

    @property
    def input_granularity(self) -> str | None:
        """``"token"`` for a :class:`TokenGrid` input, ``"tensor"`` / ``"channel"`` for a
        fitted one, None where the input stays float."""
        return None if self.input is None else self.input.granularity

    @property
    def is_empty(self) -> bool:
        return self.weight is None and self.input is None
