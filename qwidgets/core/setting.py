"""LayerSetting: the weight and input grids chosen for one layer."""

from __future__ import annotations

from dataclasses import dataclass

from .grid import UniformGrid

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
    input: UniformGrid | None = None

    def __post_init__(self):
        for name in ("weight", "input"):
            v = getattr(self, name)
            if v is not None and not isinstance(v, UniformGrid):
                raise TypeError(f"LayerSetting.{name} must be a UniformGrid or None, got {type(v).__name__}")

    @property
    def is_empty(self) -> bool:
        return self.weight is None and self.input is None
