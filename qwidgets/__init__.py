"""qwidgets: choose per-layer bit widths and uniform grids for a trained PyTorch model.

The public API is listed once, here. Names are imported on first use, so ``import qwidgets``
stays light and the core math never pulls in ipywidgets or matplotlib.

The package is layered; each layer imports only from the layers below it:

``core``      grids, hard and relaxed quantization, metrics, range fitting (no nn.Module)
``model``     quantizable layers, running the model, capturing inputs, quantized forwards
``learn``     grids learned by gradient descent through the relaxed quantizer
``planning``  the scan and its table, costs, the solver, plans, the JSON schema, evaluation
``viz``       drawing (the only place matplotlib is imported)
``widgets``   the notebook widgets (the only place ipywidgets is imported)
"""

from __future__ import annotations

import importlib

__version__ = "0.1.0"

_EXPORTS = {
    # core math
    "UniformGrid": "core.grid",
    "TokenGrid": "core.token_grid",
    "quantize": "core.rounding",
    "to_codes": "core.rounding",
    "from_codes": "core.rounding",
    "bin_probabilities": "core.relaxed",
    "expected_quantize": "core.relaxed",
    "relaxed_quantize": "core.relaxed",
    "ErrorStats": "core.metrics",
    "error_stats": "core.metrics",
    "GridUsage": "core.metrics",
    "grid_usage": "core.metrics",
    "fit_range": "core.ranges",
    "LayerSetting": "core.setting",
    "DeviceRules": "core.device_rules",
    # probing a model
    "capture_inputs": "model.capture",
    "layer_error": "model.forward",
    "model_error": "model.forward",
    "ModelError": "model.forward",
    "fold_batchnorm": "model.folding",
    "foldable_batchnorm": "model.folding",
    # learning grids
    "learn_grid": "learn.one_grid",
    "LearnResult": "learn.one_grid",
    # scan, budget, plan
    "scan": "planning.scanning",
    "SensitivityTable": "planning.table",
    "plan_budget": "planning.solver",
    "pareto_front": "planning.solver",
    "Plan": "planning.plan",
    "apply_plan": "planning.apply",
    "evaluate_plan": "planning.evaluate",
    "PlanReport": "planning.evaluate",
    "metric_curve": "planning.curve",
    "CurvePoint": "planning.curve",
    "export_codes": "planning.apply",
    "export_onnx": "planning.onnx_export",
    "check_onnx": "planning.onnx_check",
    "OnnxCheck": "planning.onnx_check",
    "refine_plan": "planning.refining",
    "RefineResult": "planning.refining",
    # drawing
    "plot_sensitivity": "viz.heatmap",
    # widgets
    "GridExplorer": "widgets.explorer",
    "ScanView": "widgets.scanview",
    "BudgetPlanner": "widgets.planner",
    # the widgets' state models (traitlets.HasTraits: observe them, link controls to them)
    "ExplorerState": "widgets.explorer_state",
    "ScanState": "widgets.scanview",
    "PlannerState": "widgets.planner_state",
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
