"""Relaxed quantization: bin probabilities under logistic noise, concrete samples, expectation.

A value ``x`` plus logistic noise ``e ~ Logistic(0, noise)`` falls into grid bin ``k`` (the
interval ``[g_k - scale/2, g_k + scale/2)``, the outer two open to -inf / +inf) with probability

    P_k = sigmoid((g_k + scale/2 - x) / noise) - sigmoid((g_k - scale/2 - x) / noise).

We evaluate it through the exact identity

    sigmoid(u) - sigmoid(l) = sigmoid(u) * sigmoid(-l) * (1 - exp(-(u - l))),

in logs, so probabilities far out in either tail keep their relative precision and the log
probabilities fed to the Gumbel-softmax never hit ``log(0)``. Note ``u - l = scale / noise``,
and that neighbouring bins share an edge, so one ``log sigmoid`` per edge serves two bins
(``log sigmoid(-l) = log sigmoid(l) - l``).

With ``window=w`` only the ``w`` bins centred on the nearest grid point are kept (shifted
inward at the grid ends) and renormalised, so the cost does not depend on the bit width.

Internally the bins are the leading dimension (``(K,) + x.shape``): every elementwise step then
runs over long contiguous rows, where a trailing bin dimension of 3 or 5 would make each
operation loop over tiny rows (measured several times slower). Expectations and samples are
taken in code units, ``sum_k P_k g_k = scale * sum_k P_k k + offset`` (the weights sum to 1),
and mapped to grid values with ``grid.code_values``, the arithmetic ``quantize`` uses.
"""

from __future__ import annotations

from numbers import Integral

import torch
import torch.nn.functional as F

from .checks import as_input, check_positive
from .grid import (
    UniformGrid,
    channel_shape,
    code_values,
    grid_params,
    param_layout,
    place_param,
    zero_point_param,
)

__all__ = ["bin_probabilities", "expected_quantize", "relaxed_quantize", "relaxed_views"]

_MAX_FULL_ELEMENTS = 1 << 28  # values x bins beyond this need a window (about 1 GiB a temporary)


def bin_probabilities(x: torch.Tensor, grid: UniformGrid, noise: float | torch.Tensor,
                      window: int | None = None) -> tuple[torch.Tensor, torch.Tensor]:
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
    b = _log_probs(x, grid, noise, window)
    if b.window is None:
        probs = _exp_probs(b.logp)  # sums to 1 by construction (telescoping CDF differences)
        codes = torch.arange(grid.qmin, grid.qmax + 1, device=b.logp.device)
    else:
        probs = _normalised(b.logp)
        ks = torch.arange(b.window, device=b.logp.device).reshape((-1,) + (1,) * b.start.dim())
        codes = (b.start.to(torch.int64) + ks).movedim(0, -1).contiguous()
    return probs.movedim(0, -1).contiguous().to(b.out_dtype), codes


def expected_quantize(x: torch.Tensor, grid: UniformGrid, noise: float | torch.Tensor,
                      window: int | None = None) -> torch.Tensor:
    """``sum_k P_k g_k``: the mean grid value under the noise (a smooth quantizer).

    >>> import torch
    >>> round(float(expected_quantize(torch.tensor(0.5), UniformGrid(2, 1.0), noise=0.05)), 4)
    0.5
    """
    b = _log_probs(x, grid, noise, window)
    probs = _exp_probs(b.logp) if b.window is None else _normalised(b.logp)
    return b.grid_value(_code_mean(probs, b.start)).to(b.out_dtype)


def relaxed_quantize(
    x: torch.Tensor,
    grid: UniformGrid,
    noise: float | torch.Tensor,
    temperature: float | torch.Tensor,
    hard: bool = False,
    window: int | None = None,
    generator: torch.Generator | None = None,
) -> torch.Tensor:
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
    t = temperature
    if isinstance(t, torch.Tensor):
        if t.numel() != 1:
            raise ValueError(f"temperature must be a single value, got {t.numel()} values")
    b = _log_probs(x, grid, noise, window)
    logp = b.logp
    if isinstance(t, torch.Tensor):
        t = t.to(logp).reshape(())
    # G = -log(-log U), U ~ Uniform(0, 1) kept off 0 so G stays finite. (A window's missing
    # renormalisation is a per-value constant: softmax and argmax do not see it.)
    u = torch.rand(logp.shape, dtype=logp.dtype, device=logp.device, generator=generator)
    gumbel = u.clamp_min_(torch.finfo(logp.dtype).tiny).log_().neg_().log_().neg_()
    logits = logp + gumbel
    z = torch.softmax(logits / t, dim=0)
    soft = b.grid_value(_code_mean(z, b.start))
    if not hard:
        return soft.to(b.out_dtype)
    with torch.no_grad():
        k = b.start + logits.argmax(dim=0).to(logp.dtype)
        chosen = code_values(k, b.s.detach(), b.o.detach(), b.z)  # a member of grid.levels
    return (chosen + (soft - soft.detach())).to(b.out_dtype)


def relaxed_views(curve: torch.Tensor, samples: torch.Tensor, probe: torch.Tensor, grid: UniformGrid,
                  noise: float, temperature: float, window: int | None = None,
                  generator: torch.Generator | None = None) -> tuple:
    """``(expected_quantize(curve), relaxed_quantize(samples), bin_probabilities(probe))`` of
    one per-tensor grid and noise, from one table of log bin probabilities (one pass over the
    bins for the three inputs, where three calls make three): what a plot of the quantizer
    shows after a change of the grid. ``samples`` draw their Gumbel noise as
    ``relaxed_quantize(samples, ...)`` does with the same ``generator``; each result equals
    its own call up to float rounding (the elementwise functions may round the last bit
    differently where the inputs are joined).

    >>> import torch
    >>> g = UniformGrid(3, 0.5)
    >>> e, s, (p, k) = relaxed_views(torch.tensor([0.2]), torch.tensor([0.2]), torch.tensor([0.2]), g, 0.1, 0.5)
    >>> torch.allclose(e, expected_quantize(torch.tensor([0.2]), g, 0.1)), p.shape, k.shape
    (True, torch.Size([1, 8]), torch.Size([8]))
    """
    if grid.axis is not None or grid.blocked:
        raise ValueError("relaxed_views needs a per-tensor grid; call expected_quantize, relaxed_quantize "
                         "and bin_probabilities for a per-channel or block grid")
    temperature = check_positive(temperature, "temperature")
    if generator is not None and not isinstance(generator, torch.Generator):
        raise TypeError(f"generator must be a torch.Generator or None, got {type(generator).__name__}")
    parts = [as_input(v, name) for v, name in ((curve, "curve"), (samples, "samples"), (probe, "probe"))]
    dtypes = {x.dtype for x, _ in parts}
    if len(dtypes) > 1:
        raise ValueError(f"curve, samples and probe must share a dtype, got {sorted(map(str, dtypes))}")
    sizes = [x.numel() for x, _ in parts]
    b = _log_probs(torch.cat([x.reshape(-1) for x, _ in parts]), grid, noise, window)
    logp = b.logp.split(sizes, dim=1)
    starts = b.start.split(sizes) if b.start.dim() else (b.start,) * 3
    (xc, dc), (xs, ds), (xp, dp) = parts
    # the curve: the mean code under the noise
    probs = _exp_probs(logp[0]) if b.window is None else _normalised(logp[0])
    expected = b.grid_value(_code_mean(probs, starts[0])).to(dc).reshape(xc.shape)
    # the samples: Gumbel noise drawn in relaxed_quantize's shape and order
    ls = logp[1].reshape((-1,) + xs.shape)
    u = torch.rand(ls.shape, dtype=ls.dtype, device=ls.device, generator=generator)
    gumbel = u.clamp_min_(torch.finfo(ls.dtype).tiny).log_().neg_().log_().neg_()
    z = torch.softmax((ls + gumbel) / temperature, dim=0)
    start_s = starts[1].reshape(xs.shape) if starts[1].dim() else starts[1]
    sampled = b.grid_value(_code_mean(z, start_s)).to(ds)
    # the probe's bins, as bin_probabilities gives them
    lp = logp[2]
    if b.window is None:
        p = _exp_probs(lp)
        codes = torch.arange(grid.qmin, grid.qmax + 1, device=lp.device)
    else:
        p = _normalised(lp)
        ks = torch.arange(b.window, device=lp.device).reshape(-1, 1)
        codes = (starts[2].to(torch.int64) + ks).movedim(0, -1).contiguous().reshape(xp.shape + (-1,))
    p = p.reshape((-1,) + xp.shape).movedim(0, -1).contiguous().to(dp)
    return expected, sampled, (p, codes)


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


class _Bins:
    """Log bin probabilities, bins first: ``logp`` has shape ``(K,) + x.shape``.

    Column ``j`` is code ``start + j``; for a window ``logp`` is not yet renormalised.
    """

    __slots__ = ("logp", "start", "s", "o", "z", "window", "out_dtype")

    def __init__(self, logp, start, s, o, z, window, out_dtype):
        self.logp, self.start, self.s, self.o, self.z = logp, start, s, o, z
        self.window, self.out_dtype = window, out_dtype

    def grid_value(self, code: torch.Tensor) -> torch.Tensor:
        return code_values(code, self.s, self.o, self.z)


def _log_probs(x, grid: UniformGrid, noise, window) -> _Bins:
    window = _check_window(window, grid)
    x, out_dtype = as_input(x)
    s, o = grid_params(x, grid)
    n = noise_param(noise, x, grid)
    r = (x - o) / s  # x in grid steps
    beta = s / n  # a bin's width in noise units: u - l
    if window is None:
        k = grid.n_levels
        if x.numel() * k > _MAX_FULL_ELEMENTS:
            raise ValueError(
                f"the full {k}-bin table for {x.numel()} values is too large; "
                "pass window=3 or 5 (the bins near each value carry nearly all the probability)"
            )
        start = torch.tensor(float(grid.qmin), dtype=x.dtype, device=x.device)
        first_open = last_open = True
    else:
        k = window
        with torch.no_grad():
            nearest = torch.clamp(torch.round(r), grid.qmin, grid.qmax)
            start = torch.clamp(nearest - (window // 2), grid.qmin, grid.qmax - window + 1)
            first_open = start == grid.qmin
            last_open = start == grid.qmax - window + 1
    # With b_i = (x - e_i) / noise at the bin edges e_i: log sigmoid(u_j) = -softplus(b_{j+1}) and
    # log sigmoid(-l_j) = -softplus(-b_j), so (open outer bins drop terms)
    #     log P_j = log(1 - exp(-scale / noise)) - softplus(-b_j) - softplus(b_{j+1}).
    # Both softplus signs are evaluated directly: rewriting one through the other cancels
    # catastrophically far in the tails. b is (r - edge in steps) * beta: one small rounding
    # for the edges near x.
    width = torch.log(-torch.expm1(-beta))
    lead = (-1,) + (1,) * x.dim()
    if window is None:
        # interior edges only (the outer two are at -inf / +inf): e_i = qmin + i - 1/2, i = 1..k-1
        edges = torch.arange(1, k, dtype=x.dtype, device=x.device) + (grid.qmin - 0.5)
        b = (r - edges.reshape(lead)) * beta
        up, down = _softplus(b), _softplus(-b)
        logp = torch.cat([-up[:1], width - (down[:-1] + up[1:]), -down[-1:]])
    elif k == 1:  # a single-bin window holds all the (renormalised) probability
        logp = torch.zeros((1,) + x.shape, dtype=x.dtype, device=x.device)
    else:
        # edges start + i - 1/2, i = 0..k; rows taken with unbind (its backward is one stack,
        # where slicing would allocate and zero a full-size gradient per slice)
        edges = torch.arange(k + 1, dtype=x.dtype, device=x.device) - 0.5
        b = ((r - start) - edges.reshape(lead)) * beta
        up, down = _softplus(b), _softplus(-b)
        if _needs_grad(b):
            up, down = up.unbind(0), down.unbind(0)
            rows = [width - (down[j] + up[j + 1]) for j in range(k)]
            rows[0] = torch.where(first_open, -up[1], rows[0])
            rows[-1] = torch.where(last_open, -down[k - 1], rows[-1])
            logp = torch.stack(rows)
        else:  # no gradient: the same sums for every bin at once (a few ops, not k)
            logp = width - (down[:-1] + up[1:])
            logp[0] = torch.where(first_open, -up[1], logp[0])
            logp[-1] = torch.where(last_open, -down[k - 1], logp[-1])
    return _Bins(logp, start, s, o, zero_point_param(x, grid), window, out_dtype)


_FLOOR = {torch.float64: -700.0}  # below this, exp(b) would leave the normal range
_FLOOR_DEFAULT = -80.0  # float32: exp(-80) = 1.8e-35, still a normal number
_LINEAR = {torch.float64: 40.0}  # above this softplus(b) is b to the dtype's resolution
_LINEAR_DEFAULT = 20.0


def _softplus(b: torch.Tensor) -> torch.Tensor:
    """``log(1 + exp(b))`` with the argument of ``exp`` kept in the normal range.

    Values clipped hundreds of steps past the grid give ``|b|`` in the thousands, where
    ``exp`` overflows or turns subnormal, and both cost several times a normal ``exp`` (torch's
    softplus evaluates ``exp`` on every element, also where it then returns ``b``). So ``b``
    is clamped to ``[floor, linear]`` first, and ``max(b, softplus(clamped))`` restores the
    linear part above ``linear`` (there ``softplus(b) = b`` to the dtype's resolution, and
    below it ``softplus(b) > b``). Below ``floor`` the result stays ``exp(floor)`` (1.8e-35 in
    float32), a term below the resolution of everything it is added to."""
    lo = _FLOOR.get(b.dtype, _FLOOR_DEFAULT)
    hi = _LINEAR.get(b.dtype, _LINEAR_DEFAULT)
    sp = F.softplus(b.clamp(lo, hi), threshold=hi)
    if _needs_grad(b):
        return torch.maximum(b, sp)
    return torch.maximum(sp, b, out=sp)  # no gradient: in place, one temporary fewer


def _exp_probs(logp: torch.Tensor) -> torch.Tensor:
    """``exp(logp)`` with log probabilities below the floor clamped first (``logp`` is
    overwritten when no gradient is needed). Bins hundreds of steps from a value (log
    probabilities in the thousands below zero) would make ``exp`` underflow through its slow
    subnormal path; their probabilities (under 1.8e-35 in float32) are below the resolution
    of the bins that carry the mass."""
    floor = _FLOOR.get(logp.dtype, _FLOOR_DEFAULT)
    if _needs_grad(logp):
        return logp.clamp_min(floor).exp()
    return logp.clamp_min_(floor).exp_()  # no gradient: logp is not used after this


def _needs_grad(t: torch.Tensor) -> bool:
    return t.requires_grad and torch.is_grad_enabled()


def _normalised(logp: torch.Tensor) -> torch.Tensor:
    """Probabilities from unnormalised log probabilities over dim 0 (the window)."""
    shifted = logp - logp.detach().amax(dim=0, keepdim=True)  # the shift cancels exactly
    # far bins of far-clipped values: exp would go subnormal (slow); 1e-35 next to the
    # largest term, 1, is below float32's resolution, so the normalised result is unchanged
    p = shifted.clamp_min(_FLOOR.get(shifted.dtype, _FLOOR_DEFAULT)).exp()
    return p / p.sum(dim=0, keepdim=True)


def _code_mean(weights: torch.Tensor, start: torch.Tensor) -> torch.Tensor:
    """``start + sum_j j w_j`` for weights over dim 0 that sum to 1 (a matrix-vector product)."""
    k = weights.shape[0]
    j = torch.arange(k, dtype=weights.dtype, device=weights.device)
    return start + torch.matmul(j, weights.reshape(k, -1)).reshape(weights.shape[1:])


def noise_param(noise, x: torch.Tensor, grid: UniformGrid, name: str = "noise") -> torch.Tensor:
    """The logistic noise width as a tensor broadcastable against ``x`` (scalar, per channel
    or per block)."""
    check_positive(noise, name)
    if isinstance(noise, torch.Tensor) and noise.numel() > 1:
        if grid.blocked:
            if noise.numel() != grid.scale.numel():
                raise ValueError(f"{name} has {noise.numel()} values but the grid has "
                                 f"{grid.scale.numel()} blocks; give one, or one per block")
            return place_param(noise, x, param_layout(x, grid), x.dtype)
        shape = channel_shape(x, grid)
        if shape is None:
            raise ValueError(f"{name} has {noise.numel()} values but the grid is per-tensor; give one")
        n = shape[grid.axis % x.dim()]
        if noise.numel() != n:
            raise ValueError(f"{name} has {noise.numel()} values but the tensor has {n} channels")
        return noise.to(device=x.device, dtype=x.dtype).reshape(shape)
    return place_param(noise, x, None, x.dtype)
