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


def golden_steps_by_hand(evaluate, t, best_i, best_e):
    """The golden-section phase of the range search as first written (both inner points compared
    after every step): 22 steps inside the bracket around each row's best sweep point ``best_i``
    of the 48 fractions ``t``; the best fraction seen, starting from ``best_e``."""
    gold = (math.sqrt(5.0) - 1.0) / 2.0
    best_t = t[best_i]
    a = torch.where(best_i == 0, 0.0, t[(best_i - 1).clamp(min=0)])
    b = t[(best_i + 1).clamp(max=47)]
    c, d = b - gold * (b - a), a + gold * (b - a)
    fc, fd = evaluate(c[:, None]).squeeze(1), evaluate(d[:, None]).squeeze(1)
    for _ in range(22):
        left = fc <= fd
        b, a = torch.where(left, d, b), torch.where(left, a, c)
        new = torch.where(left, b - gold * (b - a), a + gold * (b - a))
        fnew = evaluate(new[:, None]).squeeze(1)
        c, d, fc, fd = (torch.where(left, new, d), torch.where(left, c, new),
                        torch.where(left, fnew, fd), torch.where(left, fc, fnew))
        for cand, f in ((c, fc), (d, fd)):
            better = f < best_e
            best_t, best_e = torch.where(better, cand, best_t), torch.where(better, f, best_e)
    return best_t
