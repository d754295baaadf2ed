"""Relaxed quantization: bin probabilities under logistic noise, concrete samples, expectation.

A value ``x`` plus logistic noise ``e ~ Logistic(0, noise)`` falls into grid bin ``k`` (the
interval ``[g_k - scale/2, g_k + scale/2)``, the outer two open to -inf / +inf) with probability

    P_k = sigmoid((g_k + scale/2 - x) / noise) - sigmoid((g_k - scale/2 - x) / noise).

We evaluate it through the exact identity

    sigmoid(u) - sigmoid(l) = sigmoid(u) * sigmoid(-l) * (1 - exp(-(u - l))),

in logs, so probabilities far out in either tail keep their relative precision and the log
probabilities fed to the Gumbel-softmax never hit ``log(0)``. Note ``u - l = scale / noise``.

With ``window=w`` only the ``w`` bins centred on the nearest grid point are kept (shifted
inward at the grid ends) and renormalised, so the cost does not depend on the bit width.
"""

from __future__ import annotations

from numbers import Integral

import torch
import torch.nn.functional as F

from ._prep import as_input, grid_params, noise_param
from .grid import UniformGrid, check_positive

__all__ = ["bin_probabilities", "expected_quantize", "relaxed_quantize"]

_MAX_FULL_ELEMENTS = 1 << 28  # values x bins beyond this need a window (about 1 GiB a temporary)


def bin_probabilities(x: torch.Tensor, grid: UniformGrid, noise, window: int | None = None):
    """Probabilities of each grid bin for ``x + Logistic(0, noise)`` noise.

    Returns ``(probs, codes)``: ``probs`` has shape ``x.shape + (K,)`` (K = all ``n_levels``
    bins, or ``window``); ``codes`` (int64, broadcastable to ``probs``) gives the integer ``k``
    of each column. ``noise`` is the logistic scale in the units of ``x`` (a float, or one value
    per channel for a per-channel grid). Differentiable in ``x``, scale, offset and noise.

    >>> import torch
    >>> p, k = bin_probabilities(torch.tensor([0.1]), UniformGrid(2, 1.0), noise=0.2)
    >>> k.tolist(), [round(v, 4) for v in p[0].tolist()]
    ([-2, -1, 0, 1], [0.0003, 0.0471, 0.8334, 0.1192])
    """
    logp, codes, _, out_dtype = _log_probs(x, grid, noise, window)
    return logp.exp().to(out_dtype), codes


def expected_quantize(x: torch.Tensor, grid: UniformGrid, noise, window: int | None = None):
    """``sum_k P_k g_k``: the mean grid value under the noise (a smooth quantizer).

    >>> import torch
    >>> round(float(expected_quantize(torch.tensor(0.5), UniformGrid(2, 1.0), noise=0.05)), 4)
    0.5
    """
    logp, _, g, out_dtype = _log_probs(x, grid, noise, window)
    return (logp.exp() * g).sum(-1).to(out_dtype)


def relaxed_quantize(
    x: torch.Tensor,
    grid: UniformGrid,
    noise,
    temperature,
    hard: bool = False,
    window: int | None = None,
    generator: torch.Generator | None = None,
):
    """A concrete (Gumbel-softmax) sample over the bins: ``sum_k z_k g_k``.

    ``z = softmax((log P + G) / temperature)`` with ``G ~ Gumbel(0, 1)``. With ``hard=True`` the
    forward value is the grid point of ``argmax(log P + G)`` (a Gumbel-max sample from ``P``) and
    the gradient is the relaxed one (straight-through). Differentiable in ``x``, scale, offset and
    noise; pass a seeded ``generator`` for repeatable samples.

    >>> import torch
    >>> g = torch.Generator().manual_seed(0)
    >>> y = relaxed_quantize(torch.tensor([0.3]), UniformGrid(4, 0.25), 0.05, 0.5, hard=True, generator=g)
    >>> float(y) in UniformGrid(4, 0.25).levels.tolist()
    True
    """
    temperature = check_positive(temperature, "temperature")
    if not isinstance(hard, bool):
        raise TypeError(f"hard must be a bool, got {hard!r}")
    if generator is not None and not isinstance(generator, torch.Generator):
        raise TypeError(f"generator must be a torch.Generator or None, got {type(generator).__name__}")
    logp, _, g, out_dtype = _log_probs(x, grid, noise, window)
    gumbel = -torch.empty(logp.shape, dtype=logp.dtype, device=logp.device).exponential_(
        generator=generator
    ).log()
    logits = logp + gumbel
    t = temperature.to(logits) if isinstance(temperature, torch.Tensor) else temperature
    z = torch.softmax(logits / t, dim=-1)
    g_full = g.expand(logits.shape)
    soft = (z * g_full).sum(-1)
    if not hard:
        return soft.to(out_dtype)
    pick = logits.argmax(dim=-1, keepdim=True)
    chosen = g_full.gather(-1, pick).squeeze(-1)
    return (chosen.detach() + (soft - soft.detach())).to(out_dtype)


# ---------------------------------------------------------------------------- internals
def _check_window(window, grid: UniformGrid) -> int | None:
    if window is None:
        return None
    if isinstance(window, bool) or not isinstance(window, Integral):
        raise TypeError(f"window must be None or an odd int >= 1, got {window!r}")
    window = int(window)
    if window < 1 or window % 2 == 0:
        raise ValueError(f"window must be an odd int >= 1, got {window}")
    if window > grid.n_levels:
        raise ValueError(
            f"window={window} is larger than the grid ({grid.n_levels} levels at {grid.bits} bits)"
        )
    return window


def _log_probs(x, grid: UniformGrid, noise, window):
    """(log P, codes, grid values of those codes, dtype to return) for ``x``."""
    window = _check_window(window, grid)
    x, out_dtype = as_input(x)
    s, o = grid_params(x, grid)
    n = noise_param(noise, x, grid)
    s_, o_, n_, x_ = s.unsqueeze(-1), o.unsqueeze(-1), n.unsqueeze(-1), x.unsqueeze(-1)
    if window is None:
        if x.numel() * grid.n_levels > _MAX_FULL_ELEMENTS:
            raise ValueError(
                f"the full {grid.n_levels}-bin table for {x.numel()} values is too large; "
                "pass window=3 or 5 (the bins near each value carry nearly all the probability)"
            )
        codes = torch.arange(grid.qmin, grid.qmax + 1, device=x.device)
    else:
        with torch.no_grad():
            nearest = torch.clamp(torch.round((x - o) / s), grid.qmin, grid.qmax)
            start = torch.clamp(nearest - (window // 2), grid.qmin, grid.qmax - window + 1)
        codes = start.to(torch.int64).unsqueeze(-1) + torch.arange(window, device=x.device)
    g = s_ * codes.to(x.dtype) + o_
    logp = _bin_log_probs(x_, g, s_, n_, codes == grid.qmin, codes == grid.qmax)
    if window is not None:
        logp = logp - torch.logsumexp(logp, dim=-1, keepdim=True)
    return logp, codes, g, out_dtype


def _bin_log_probs(x, g, s, n, is_first, is_last):
    """log P_k for bins centred at ``g``; the first / last bins are open to -inf / +inf."""
    half = 0.5 * s
    upper = F.logsigmoid((g + half - x) / n).masked_fill(is_last, 0.0)  # log sigmoid(u)
    lower = F.logsigmoid((x - g + half) / n).masked_fill(is_first, 0.0)  # log sigmoid(-l)
    width = torch.log(-torch.expm1(-s / n))  # log(1 - exp(-(u - l)))
    width = torch.where(is_first | is_last, torch.zeros((), dtype=x.dtype, device=x.device), width)
    return upper + lower + width
