"""Adam, written out (shared by the grid learners)."""

from __future__ import annotations

import math

import torch

__all__ = ["Adam"]


class Adam:
    """Adam (Kingma & Ba 2015) with the usual defaults, written out: torch.optim's first use
    imports its compiler stack (about two seconds), too slow for a button in a widget."""

    def __init__(self, params, betas=(0.9, 0.999), eps=1e-8):
        self.params = params
        self.b1, self.b2, self.eps = betas[0], betas[1], eps
        self.m = [torch.zeros_like(p) for p in params]
        self.v = [torch.zeros_like(p) for p in params]
        self.t = 0

    @torch.no_grad()
    def step(self, lr: float) -> None:
        self.t += 1
        c1, c2 = 1.0 - self.b1**self.t, 1.0 - self.b2**self.t
        for p, m, v in zip(self.params, self.m, self.v, strict=True):
            if p.grad is None:
                continue
            m.mul_(self.b1).add_(p.grad, alpha=1.0 - self.b1)
            v.mul_(self.b2).addcmul_(p.grad, p.grad, value=1.0 - self.b2)
            p.addcdiv_(m, v.sqrt().div_(math.sqrt(c2)).add_(self.eps), value=-lr / c1)
