"""Taking a grid from a GridExplorer into the budget planner's plan (a mixin of BudgetPlanner)."""

from __future__ import annotations

from ..planning.plan import Plan

__all__ = ["GridTaking"]


class GridTaking:
    """``link_explorer`` and ``use_grid`` for :class:`~qwidgets.widgets.planner.BudgetPlanner`
    (which holds ``plan``, ``report``, ``controls``, ``message``, ``_taken`` and ``measure``)."""

    def link_explorer(self, source) -> GridTaking:
        """Let "use explorer's grid" take grids from ``source``: a GridExplorer, or a ScanView
        (its currently open explorer)."""
        if not (hasattr(source, "to_setting") or hasattr(source, "explorer")):
            raise TypeError(f"source must be a GridExplorer or a ScanView, got {type(source).__name__}")
        self._explorer_source = source
        b = self.controls["use_grid"]
        b.disabled = False
        b.tooltip = "put the linked explorer's grid into this plan (at the explorer's bit width)"
        return self

    def use_grid(self, explorer=None) -> Plan:
        """Put ``explorer``'s grid (default: the linked one) into the plan for its layer.

        The plan becomes :meth:`Plan.with_setting` of the explorer's layer and grid; the layer
        takes the explorer's bit width. The grid is remembered for that (layer, bits): moving
        the budget away and back brings it again. The new plan is measured at once (its
        prediction was for the scan's grids).
        """
        if explorer is None:
            explorer = self._explorer_source
            if explorer is not None and not hasattr(explorer, "to_setting"):
                explorer = explorer.explorer  # a ScanView: its open explorer
        if explorer is None:
            raise ValueError("no explorer: open one (ScanView: explore layer) or link one with link_explorer")
        name = explorer.layer_name
        if name is None:
            raise ValueError("the explorer shows a bare tensor, not a layer of this model")
        if name not in self.plan.layers:
            raise ValueError(f"layer {name!r} is not in the plan; planned layers: {list(self.plan.layers)}")
        setting = explorer.to_setting(explorer.source)
        old = self.plan.bits[name]
        self.plan = self.plan.with_setting(name, setting)
        self._taken[(name, self.plan.bits[name])] = setting
        self.report = None
        self.measure()
        self.message.info(f"{name}: now uses the explorer's {explorer.source} grid at {self.plan.bits[name]} bits"
                          f"{'' if old == self.plan.bits[name] else f' (was {old})'}; measured "
                          f"{self.report.measured_sqnr_db:.2f} dB on {self._measured_on()}")
        return self.plan
