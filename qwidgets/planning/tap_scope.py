"""The layer scope of entries reached by taps, measured in place during one float pass.

- an activation (attention's query / key / value / probabilities, sdpa operands): the SQNR of
  the activation itself on each input grid;
- the context entering an attention's output projection: that projection's output;
- a weight found by use: the product's output, recomputed with the quantized weight (viewed
  the way the product uses it) and / or the quantized other operand.
"""

from __future__ import annotations

import numpy as np
import torch
import torch.nn.functional as F

from ..core.rounding import quantize_unchecked as _quantize
from ..model.tap_quantize import EachTap
from ..model.taps import same_view


def _power(t: torch.Tensor) -> float:
    return float(torch.linalg.vector_norm(t, dtype=torch.float64)) ** 2


class TapScope(EachTap):
    """Adds each tapped entry's output power and error power per config to ``signal`` / ``noise``
    (the model's own output is kept: the written-out attention is only observed)."""

    keep_output = True

    def __init__(self, model, entries, configs, signal, noise):
        entries = list(entries)
        super().__init__(entries, None)
        self.model, self.configs, self.signal, self.noise = model, configs, signal, noise
        self.by_name = {e.name: e for e in entries}
        self._weights: dict = {}

    def activation(self, name, t):
        e = self.by_name.get(name)
        if e is None:
            return t
        t = t.detach()
        if e.kind == "activation":
            self._add(name, _power(t), [0.0 if ig is None else _power(_quantize(t, ig) - t)
                                        for _, ig in self.configs[name]])
            return t
        out_proj = self.model.get_submodule(e.module)  # the context of an attention's out_proj
        w, b = out_proj.weight.detach(), None if out_proj.bias is None else out_proj.bias.detach()
        ref = F.linear(t, w, b)
        noises = []
        for wg, ig in self.configs[name]:
            y = F.linear(t if ig is None else _quantize(t, ig), w if wg is None else _quantize(w, wg), b)
            noises.append(_power(y - ref))
        self._add(name, _power(ref), noises)
        return t

    def operand(self, name, x, w, param, recompute, axis):
        x = x.detach()
        ref = recompute(x, w)
        noises = []
        for j, (wg, ig) in enumerate(self.configs[name]):
            wq = w
            if wg is not None:
                key = (name, j)
                if key not in self._weights:
                    self._weights[key] = _quantize(param.detach(), wg)
                wq = same_view(w, param, self._weights[key])
            noises.append(_power(recompute(x if ig is None else _quantize(x, ig), wq) - ref))
        self._add(name, _power(ref), noises)
        return x

    def _add(self, name, s, noises):
        self.signal[name] += s
        self.noise[name] += np.asarray(noises)
