"""Reference loops written for the tests (not qwidgets code): the slow, obvious way to get a
figure, which qwidgets' own figures are checked against."""

from __future__ import annotations

import copy
import math

import torch
from torch import nn

from qwidgets import Plan, quantize


def naive_sqnr_db(model: nn.Module, x, plan: Plan) -> float:
    """Reference written here: deep copy, overwrite each weight with its quantized values, a
    pre-hook quantizing each planned input, one full forward in eval mode, SQNR by hand.
    ``x``: a tensor, a tuple of positional inputs or a dict of keyword inputs."""
    ref_model = copy.deepcopy(model).eval()
    q_model = copy.deepcopy(model).eval()
    modules = dict(q_model.named_modules())
    for name, s in plan.layers.items():
        m = modules[name]
        with torch.no_grad():
            if s.weight is not None:
                m.weight.copy_(quantize(m.weight, s.weight))
        if s.input is not None:
            m.register_forward_pre_hook(lambda mod, args, g=s.input: (quantize(args[0], g),))
    with torch.no_grad():
        ref, out = (_call(m, x).double() for m in (ref_model, q_model))
    return 10 * math.log10(float(ref.square().sum()) / float((out - ref).square().sum()))


def naive_weight_sqnr_db(model: nn.Module, x, name: str, grid) -> float:
    """Reference written here: deep copy, overwrite one layer's weight with its quantized
    version, one full forward, SQNR of the model's output by hand (float64)."""
    with torch.no_grad():
        ref = model(x).double()
        c = copy.deepcopy(model)
        layer = c.get_submodule(name)
        layer.weight.copy_(quantize(layer.weight, grid))
        out = c(x).double()
    noise = float((out - ref).square().sum())  # no error at all: an infinite SQNR
    return math.inf if noise == 0 else 10 * math.log10(float(ref.square().sum()) / noise)


def _call(model: nn.Module, x):
    if isinstance(x, tuple):
        return model(*x)
    return model(**x) if isinstance(x, dict) else model(x)
