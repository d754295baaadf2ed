"""What the grid explorer looks at: a tensor, or one layer with its input (copied, float32).

:class:`ExplorerSubject` takes the explorer's first arguments (a tensor; a layer and its
input; a model, data and a layer name) and keeps float32 copies: the tensor, or the layer's
weight, its input (captured with :func:`qwidgets.capture_inputs`, so any data source the model
layer accepts works) and a float32 copy of the layer when the model computes in half
precision. The user's model is only read.
"""

from __future__ import annotations

import copy

import numpy as np
import torch
from torch import nn

from ..core.checks import as_input
from ..core.metrics import FixedReference
from ..core.setting import LayerSetting
from ..model.capture import capture_inputs
from ..model.layers import is_quantizable, layer_output
from ..model.picking import check_picker, split_data

__all__ = ["ExplorerSubject"]

SCATTER_POINTS = 3000


class ExplorerSubject:
    """Float32 copies of what is explored, and a heading that says what it is.

    >>> import torch
    >>> from torch import nn
    >>> s = ExplorerSubject(nn.Linear(4, 3).half(), torch.randn(5, 4).half(), None, None)
    >>> s.heading
    'Layer (Linear), weight 3x4; the model computes in float16, shown in float32'
    >>> s.values["weight"].dtype, s.reference.shape
    (torch.float32, torch.Size([5, 3]))
    """

    def __init__(self, obj, data, layer: str | None, max_samples: int | None, inputs=None):
        self.layer: nn.Module | None = None
        inputs = check_picker(inputs, "inputs")
        self.layer_name: str | None = None
        if isinstance(obj, (torch.Tensor, np.ndarray)):
            if data is not None or layer is not None or inputs is not None:
                raise TypeError("GridExplorer(tensor) takes no data, layer or inputs; give a layer "
                                "and its input as GridExplorer(layer, data)")
            values, _ = as_input(obj, "tensor")
            if values.numel() == 0:
                raise ValueError("tensor is empty; there is nothing to explore")
            self.dtype = values.dtype
            self.values = {"values": values.detach().float().clone()}
            shape = "x".join(map(str, values.shape)) or "scalar"
            self.heading = (f"A bare tensor ({shape}, {values.numel():,} values, "
                            f"{str(self.dtype).replace('torch.', '')}): no layer, so no layer output")
            return
        if not isinstance(obj, nn.Module):
            raise TypeError(f"GridExplorer takes a tensor, a layer or a model, got {type(obj).__name__}")
        if data is None:
            raise TypeError("a layer or model needs data: GridExplorer(layer, inputs) or "
                            "GridExplorer(model, data, layer='name')")
        if layer is not None:
            if not isinstance(layer, str):
                raise TypeError(f"layer must be the name of a layer in the model, got {type(layer).__name__}")
            captured = capture_inputs(obj, data, [layer], max_samples=max_samples, inputs=inputs)
            module = obj.get_submodule(layer) if layer else obj
            inputs = captured[layer]
            self.layer_name = layer
        else:
            if not is_quantizable(obj):
                names = [n for n, m in obj.named_modules() if is_quantizable(m)]
                raise ValueError(
                    f"{type(obj).__name__} is not a Linear / Conv layer; to explore one of a "
                    f"model's layers give its name, e.g. layer={names[0]!r} (layers: {names})"
                    if names else f"{type(obj).__name__} has no Linear / Conv layer to explore"
                )
            module, inputs = obj, (data if inputs is None else split_data(data, inputs)[0])
            if not isinstance(inputs, torch.Tensor):
                raise TypeError(f"data must be the layer's input tensor, got {type(inputs).__name__}")
            if max_samples is not None:
                inputs = inputs[:max_samples]
        if not is_quantizable(module):
            raise TypeError(f"layer {layer!r} is a {type(module).__name__}; the explorer needs a "
                            "Linear or Conv layer")
        x, _ = as_input(inputs, "data")
        self.dtype = module.weight.dtype
        if self.dtype != torch.float32:
            # half-precision models: measure in float32 on a copy (the user's layer is untouched)
            module = copy.deepcopy(module).float()
        self.layer = module
        self.inputs = x.detach().float().clone()
        self.values = {"weight": module.weight.detach().float().clone(), "input": self.inputs}
        self.reference = layer_output(module, self.inputs)  # the float output, computed once
        self.fixed_reference = FixedReference(self.reference)  # its float64 slices, kept
        ref = self.reference.reshape(-1)
        gen = torch.Generator().manual_seed(0)
        n = min(SCATTER_POINTS, ref.numel())
        self.scatter_idx = torch.randperm(ref.numel(), generator=gen)[:n]
        self.scatter_x = ref[self.scatter_idx].double().numpy()
        shape = "x".join(map(str, module.weight.shape))
        name = f"Layer {self.layer_name!r}" if self.layer_name else "Layer"
        self.heading = f"{name} ({type(module).__name__}), weight {shape}"
        if self.dtype != torch.float32:
            self.heading += (f"; the model computes in {str(self.dtype).replace('torch.', '')}, "
                             "shown in float32")

    @property
    def has_layer(self) -> bool:
        return self.layer is not None

    @property
    def sources(self) -> tuple:
        return tuple(self.values)

    def setting(self, grids: dict, sources=None) -> LayerSetting:
        """``grids`` (source -> grid) as a :class:`LayerSetting`: ``sources`` picks
        ``"weight"``, ``"input"`` or both (the default for a layer); a tensor's grid is the
        weight grid."""
        if not self.has_layer:
            return LayerSetting(weight=grids["values"])
        if sources is None:
            sources = ("weight", "input")
        if isinstance(sources, str):
            sources = (sources,)
        bad = [s for s in sources if s not in ("weight", "input")]
        if bad:
            raise ValueError(f"sources must name 'weight' and / or 'input', got {bad}")
        return LayerSetting(weight=grids["weight"] if "weight" in sources else None,
                            input=grids["input"] if "input" in sources else None)
