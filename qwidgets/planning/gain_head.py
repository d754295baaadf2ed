"""The gain estimate past a wide final ``nn.Linear`` (a language model's output layer): probes
drawn at the layer's input, the layer's own error taken from Gram matrices.

When the model's output is a final Linear with weight ``W`` (``out x in``, ``out`` several
times ``in``), a standard normal probe ``r`` on the output reaches the layer's input as
``g = W^T r``, whose distribution is ``N(0, G)`` per position with ``G = W^T W``: the probe
can be drawn there directly, ``g = L z`` with ``G = L L^T`` and ``z ~ N(0, I)``, which saves
the backward pass through the ``out``-wide product (and the ``out``-wide probes) for every
probe. It stands for ``r = W G^{-1} g``, distributed ``N(0, P)`` with ``P = W G^{-1} W^T`` the
projector onto the columns of ``W``.

Every error made before the layer reaches the output as ``a = W d`` (``d`` its change at the
layer's input), in the columns of ``W``: ``r . a = g . d``, and ``E[(r . a)^2] = a^T P a =
||a||^2`` as with ``r ~ N(0, I)``. The layer's own error ``b = dW x`` (a quantized ``W``, or the
output place of a tied embedding) is not in them: its projected part ``r . b = g^T G^{-1} W^T
dW x`` goes into the probe's dot products (so the cross term ``E[(r . a)(r . b)] = a^T P b =
a^T b`` is the one the model has), and the rest of its power, ``||b||^2 - ||P b||^2 =
x^T (B - A^T G^{-1} A) x`` with ``A = W^T dW``, ``B = dW^T dW``, is added exactly. The sum is
an unbiased estimate of ``||a + b||^2``, like the one with probes on the output. The
``in x in`` matrices are made once per scan and entry (``2 out in^2`` multiply-adds per bit
width), the per-position work is ``in x in``.
"""

from __future__ import annotations

import torch
from torch import nn

from ..core.rounding import quantize_unchecked
from .gain_dots import power

WIDE = 2  # the shortcut applies when out_features >= WIDE x in_features


def head_candidate(module: nn.Module, configs_of_rows) -> bool:
    """A plain ``nn.Linear`` (its base forward), wide enough, whose entries quantize only its
    weight (an input grid makes the error nonlinear in the input)."""
    return (isinstance(module, nn.Linear) and type(module).forward is nn.Linear.forward
            and module.out_features >= WIDE * module.in_features
            and all(ig is None for configs in configs_of_rows for _, ig in configs))


class HeadShortcut:
    """``G = W^T W`` of one final Linear, its Cholesky factor, and per entry the matrices of
    each config's error (made on first use)."""

    def __init__(self, module: nn.Linear):
        self.w = module.weight.detach()
        with torch.no_grad():
            gram = (self.w.t() @ self.w).double()  # float32 product, float64 after
            self.chol, info = torch.linalg.cholesky_ex(gram)
        self.ok = int(info) == 0  # G positive definite: W has full column rank
        self.draw = self.chol.to(self.w.dtype).t().contiguous()  # z @ L^T ~ N(0, G) per row
        self.rows: dict = {}
        self.weight_powers: dict = {}  # row -> (||W||^2, each config's ||dW||^2), float64

    def probe(self, z: torch.Tensor) -> torch.Tensor:
        """The probe at the layer's input, ``g = L z`` per position, from standard normal ``z``."""
        return z @ self.draw

    def _matrices(self, row, configs):
        if row not in self.rows:
            c_all, q_all, b_all, noise = [], [], [], []
            with torch.no_grad():
                for wg, _ in configs:
                    d = torch.zeros_like(self.w) if wg is None else quantize_unchecked(self.w, wg) - self.w
                    noise.append(0.0 if wg is None else power(d))  # the weight scope, while d is here
                    a = (self.w.t() @ d).double()
                    b = (d.t() @ d).double()
                    del d
                    c = torch.cholesky_solve(a, self.chol)  # G^{-1} A
                    c_all.append(c)
                    q_all.append(b - a.t() @ c)
                    b_all.append(b)
            # x @ [C_1^T | C_2^T | ...]: every config's G^{-1} A x at once, float32 like the errors
            self.rows[row] = (torch.cat([c.t() for c in c_all], dim=1).to(self.w.dtype),
                              torch.stack(q_all), torch.stack(b_all))
            self.weight_powers[row] = (power(self.w), noise)
        return self.rows[row]

    def projected_errors(self, row, configs, x: torch.Tensor) -> torch.Tensor:
        """(rows, configs, values) float32: ``G^{-1} A x`` at every position, the layer's own
        error as the probes at its input see it (``r . b = g . G^{-1} A x``)."""
        c, _, _ = self._matrices(row, configs)
        n, width = x.shape[0], self.w.shape[1]
        y = (x.reshape(-1, width) @ c).reshape(n, -1, len(configs), width)
        return y.movedim(2, 1).reshape(n, len(configs), -1)

    def rest_power(self, row, configs, x: torch.Tensor) -> torch.Tensor:
        """Each config's ``sum x^T (B - A^T G^{-1} A) x`` over the positions (float64): the part
        of the layer's own error power the projected probes do not see."""
        _, q, _ = self._matrices(row, configs)
        return _quadratic(q, x, self.w.shape[1])

    def own_power(self, row, configs, x: torch.Tensor) -> torch.Tensor:
        """Each config's ``sum ||dW x||^2 = sum x^T B x`` over the positions (float64): the
        layer's own output error power (its layer scope)."""
        _, _, b = self._matrices(row, configs)
        return _quadratic(b, x, self.w.shape[1])


def _quadratic(mats: torch.Tensor, x: torch.Tensor, width: int) -> torch.Tensor:
    xd = x.reshape(-1, width).double()
    return torch.stack([((xd @ m) * xd).sum() for m in mats])
