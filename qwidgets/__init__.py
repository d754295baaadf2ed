"""qwidgets: choose per-layer bit widths and uniform grids for a trained PyTorch model.

The public API is listed once, here. Names are imported on first use, so ``import qwidgets``
stays light and the core math never pulls in ipywidgets or matplotlib.
"""

from __future__ import annotations

import importlib
import sys
import types

# ``quantize`` names both a submodule and a function: the first import of the submodule (other
# modules do ``from .quantize import ...``) would bind the module object as ``qwidgets.quantize``
# and hide the lazy export, so the function is bound here, eagerly.
from .quantize import quantize  # noqa: F401  (re-exported, see _EXPORTS)

__version__ = "0.1.0"

_EXPORTS = {
    # core math
    "UniformGrid": "grid",
    "quantize": "quantize",
    "to_codes": "quantize",
    "from_codes": "quantize",
    "bin_probabilities": "relaxed",
    "expected_quantize": "relaxed",
    "relaxed_quantize": "relaxed",
    "ErrorStats": "metrics",
    "error_stats": "metrics",
    "GridUsage": "metrics",
    "grid_usage": "metrics",
    # probing a model
    "fit_range": "ranges",
    "LayerSetting": "setting",
    "capture_inputs": "probe",
    "layer_error": "probe",
    "model_error": "probe",
    "ModelError": "probe",
    "learn_grid": "learn",
    "LearnResult": "learn",
    # scan, budget, plan
    "scan": "scan",
    "SensitivityTable": "scan",
    "plan_budget": "budget",
    "pareto_front": "budget",
    "Plan": "plan",
    "apply_plan": "plan",
    "evaluate_plan": "plan",
    "PlanReport": "plan",
    "export_codes": "plan",
    # widgets
    "GridExplorer": "widgets.explorer",
    "ScanView": "widgets.scanview",
    "BudgetPlanner": "widgets.planner",
}

__all__ = sorted(_EXPORTS) + ["__version__"]


def __getattr__(name: str):
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'qwidgets' has no attribute {name!r}")
    value = getattr(importlib.import_module(f".{module}", __name__), name)
    globals()[name] = value
    return value


def __dir__():
    return __all__


class _Package(types.ModuleType):
    """``quantize`` and ``scan`` name both a submodule and the function it exports. Python sets
    a package attribute to each submodule when it is first imported, which would make
    ``qwidgets.scan`` the module once anything imported it; the exported function wins."""

    def __setattr__(self, name, value):
        if isinstance(value, types.ModuleType) and _EXPORTS.get(name) == name:
            value = getattr(value, name)
        super().__setattr__(name, value)


sys.modules[__name__].__class__ = _Package
