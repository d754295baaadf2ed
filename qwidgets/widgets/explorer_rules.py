"""What the device rules allow the explorer's state: widths, offsets, grids moved onto them."""

from __future__ import annotations

from ..core.device_rules import conform_grid
from ..core.grid import UniformGrid

__all__ = ["RulesOfState", "role"]


class RulesOfState:
    """:class:`~.explorer_state.ExplorerState`'s device-rule methods (``self.rules``,
    ``self.values``, ``self.source`` are the state's)."""

    def allowed_bits(self, source: str, bits: int, up: bool = True) -> int:
        """``bits`` if the rules allow it for ``source``, else the next allowed width in the
        direction of the change (the nearest one at the ends of the menu)."""
        menu = self.bits_menu(source)
        if bits in menu:
            return bits
        ahead = [b for b in menu if (b > bits if up else b < bits)]
        if ahead:
            return min(ahead) if up else max(ahead)
        return min(menu, key=lambda b: (abs(b - bits), b))

    def bits_menu(self, source: str | None = None) -> tuple:
        """The widths offered for ``source`` (default: the current one)."""
        menu = None if self.rules is None else self.rules.bits_menu(role(source or self.source))
        return tuple(range(1, 17)) if menu is None else tuple(sorted(menu))

    def symmetric_only(self, source: str) -> bool:
        return self.rules is not None and self.rules.symmetric_weights and role(source) == "weight"

    def obeying(self, grid: UniformGrid, source: str) -> UniformGrid:
        """``grid`` moved onto the device rules (zero point, power-of-two scale), if any."""
        if self.rules is None:
            return grid
        return conform_grid(grid, self.values[source], self.rules, role(source))


def role(source: str) -> str:
    """Which device rules apply to a source: inputs follow the input rules, the rest the weight rules."""
    return "input" if source == "input" else "weight"
