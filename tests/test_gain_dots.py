"""The check that a model keeps its samples apart (gain_dots.keeps_samples_apart), against a naive
loop written here: a backward pass for the first and for the last output row, every other row of
every layer output must get a zero gradient (the check's definition: a model in which only a
middle row reads another one passes it, as the case "one middle row" shows)."""

from __future__ import annotations

import pytest
import torch

from qwidgets.planning.gain_dots import keeps_samples_apart

MIXERS = {
    "per sample": lambda h: torch.tanh(h),
    "batch mean": lambda h: h + h.mean(0, keepdim=True),
    "causal along the batch": lambda h: h.cumsum(0),
    "reversed along the batch": lambda h: h.flip(0).cumsum(0).flip(0),
    "shift by one": lambda h: torch.roll(h, 1, 0) + h,
    "sorted over the batch": lambda h: h.sort(0).values,
    "one middle row": lambda h: h + (torch.arange(h.shape[0])[:, None] == 1) * h[2:3],
}


def _graph(mix, n, seed=0):
    g = torch.Generator().manual_seed(seed)
    lin1, lin2 = torch.randn(5, 4, generator=g), torch.randn(3, 5, generator=g)
    x = torch.randn(n, 4, generator=g)
    z1 = torch.zeros(n, 5, requires_grad=True)  # leaves on the layer outputs, as the probes use
    h1 = x @ lin1.T + z1
    z2 = torch.zeros(n, 3, requires_grad=True)
    out = mix(torch.relu(h1)) @ lin2.T + z2
    return [out], [z1, z2]


def _naive(parts, leaves, n):
    for i in sorted({0, n - 1}):  # the first and the last row, one pass each
        r = [torch.zeros_like(p) for p in parts]
        for t in r:
            t[i] = 1.0
        for gr in torch.autograd.grad(parts, leaves, grad_outputs=r, retain_graph=True, allow_unused=True):
            if gr is not None and (bool(gr[:i].ne(0).any()) or bool(gr[i + 1:].ne(0).any())):
                return False
    return True


@pytest.mark.parametrize("name, n", [(name, n) for name in MIXERS for n in (2, 3, 6)
                                     if n >= 3 or name != "one middle row"])  # that one reads row 2
def test_the_check_agrees_with_every_row_checked(name, n):
    parts, leaves = _graph(MIXERS[name], n)
    assert keeps_samples_apart(parts, leaves, n) == _naive(parts, leaves, n)
