"""The arithmetic of the gain estimate's probes (:mod:`.gain_probes`): each layer's errors in one
tensor, their dot products with the probes' gradients, one-hot directions, and the checks that
tell whether a model keeps its samples apart along axis 0."""

from __future__ import annotations

import torch
import torch.nn.functional as F
from torch import nn
from torch.overrides import TorchFunctionMode

from ..core.grid import UniformGrid
from ..core.rounding import quantize_unchecked
from ..model import layers


def power(t: torch.Tensor) -> float:
    """Sum of squares, accumulated in float64 (the layer scope's signal power)."""
    return float(torch.linalg.vector_norm(t, dtype=torch.float64)) ** 2


def error_powers(errs: torch.Tensor) -> torch.Tensor:
    """Each config's error power of a (rows, configs, values) float32 tensor: float32 sums over
    each row's values (short, accurate), float64 across the rows (the layer scope's arithmetic,
    :func:`.passes.layer_scope_powers`)."""
    return errs.square().sum(-1).double().sum(0)


def layer_errors(module, x: torch.Tensor, w: torch.Tensor, configs) -> torch.Tensor:
    """Each weight-only config's error of a layer's output, (rows, configs, values) float32.

    The layer is linear in its weight, so the error of ``w_q`` is the layer's output for
    ``w_q - w`` without bias, and every config's difference goes in one call (stacked along the
    output channels: the input read, and for a convolution unfolded, once), which is also more
    accurate than a difference of two outputs."""
    n = w.shape[0]
    deltas = w.new_zeros((len(configs) * n, *w.shape[1:]))  # each difference written in place
    for i, (wg, _) in enumerate(configs):
        if wg is not None:
            torch.sub(quantize_unchecked(w, wg), w, out=deltas[i * n:(i + 1) * n])
    y = layers.layer_forward(module, x, deltas, use_bias=False)
    b = len(configs)
    if isinstance(module, nn.Linear):  # (rows, ..., configs * out) -> (rows, configs, ... x out)
        y = y.unflatten(-1, (b, -1)).movedim(-2, 1)
    return y.reshape(y.shape[0], b, -1).float()


def stacks_outputs(module, ref: torch.Tensor) -> bool:
    """Whether configs' weights stack along the output channels: a Linear, or a convolution with
    one group and its channels on weight axis 0 (not an embedding), output rows along axis 0."""
    if ref.dim() < 2 or isinstance(module, nn.Embedding) or layers.weight_axis(module) != 0:
        return False
    return isinstance(module, nn.Linear) or (isinstance(module, (nn.Conv1d, nn.Conv2d, nn.Conv3d))
                                             and module.groups == 1)


def stacked(errs) -> torch.Tensor:
    """Each config's output error in one (rows, configs, values) float32 tensor: rows along
    axis 0 of a layer output of two or more axes, else one row."""
    if errs[0].dim() < 2:
        return torch.stack([v.float().reshape(-1) for v in errs]).unsqueeze(0)
    return torch.stack([v.float().reshape(v.shape[0], -1) for v in errs], dim=1)


def dots(gs: list, errs: torch.Tensor, per_sample: bool) -> torch.Tensor:
    """(rows, probes, configs) dot products of each probe's gradient with each config's error
    (one batched matrix product of float32 terms, the errors read as they lie), or
    (1, probes, configs) over the whole batch; float64."""
    rows = errs.shape[0]
    g = torch.stack([v.float().reshape(rows, -1) for v in gs], dim=1)  # (rows, probes, values)
    d = torch.bmm(g, errs.transpose(1, 2)).double()
    return d if per_sample else d.sum(0, keepdim=True)


def batch_rows(parts, leaves) -> int | None:
    """The common length of axis 0 of every output part and of the layer outputs (of two or
    more axes) that have it, when that is the batch's; else None. A layer output whose axis 0
    differs (a position embedding's (positions, width)) is measured over the whole batch."""
    sizes = {t.shape[0] if t.dim() else None for t in parts}
    if len(sizes) != 1 or None in sizes:
        return None
    n = next(iter(sizes))
    if any(z.dim() < 2 for z in leaves) or not any(z.shape[0] == n for z in leaves):
        return None
    return n


def place_output(module: nn.Module, x: torch.Tensor, w: torch.Tensor) -> torch.Tensor:
    """The module's output with weight ``w`` (an embedding or a layer)."""
    if isinstance(module, nn.Embedding):
        return F.embedding(x, w, module.padding_idx)
    return layers.layer_forward(module, x, w)


def looked_up_errors(module: nn.Embedding, x: torch.Tensor, w: torch.Tensor, ref: torch.Tensor,
                     configs) -> list | None:
    """Each config's output error of a plain embedding, quantizing only the rows it looked up
    (a 50257-row table read for 128 tokens: 128 rows, not the table, per config); None when a
    grid's parameters do not follow the rows (blocks along the rows)."""
    rows, inverse = torch.unique(x, return_inverse=True)
    grids = [None if wg is None else rows_grid(wg, rows) for wg, _ in configs]
    if any(g is None and wg is not None for g, (wg, _) in zip(grids, configs, strict=True)):
        return None
    part = w[rows]
    return [(part if g is None else quantize_unchecked(part, g))[inverse] - ref for g in grids]


def rows_grid(grid: UniformGrid, rows: torch.Tensor) -> UniformGrid | None:
    """The grid of ``rows`` (axis 0) of the tensor ``grid`` was fitted to: per tensor, per
    row, or blocks within rows; None for other layouts."""
    if not isinstance(grid, UniformGrid):
        return None
    if grid.axis is None and not grid.blocked:
        return grid
    if grid.axis == 0 and not grid.blocked or grid.blocked and grid.axis == 1:
        def pick(v):
            return v[rows] if isinstance(v, torch.Tensor) and v.numel() > 1 else v
        return grid.replace(scale=pick(grid.scale), offset=pick(grid.offset))
    return None


class Uses(TorchFunctionMode):
    """Counts the torch calls that receive each watched tensor (as itself, not a copy)."""

    def __init__(self, tensors):
        super().__init__()
        self.count = {id(t): 0 for t in tensors}

    def __torch_function__(self, func, types, args=(), kwargs=None):
        kwargs = kwargs or {}
        for a in (*args, *kwargs.values()):
            if id(a) in self.count:
                self.count[id(a)] += 1
        return func(*args, **kwargs)


def keeps_samples_apart(parts, leaves, n: int) -> bool:
    """A probe on output row i reaches only row i of every layer output (i = first and last)."""
    if n == 1:
        return True
    for i in {0, n - 1}:
        rs = []
        for p in parts:
            r = torch.zeros_like(p)
            r[i] = 1.0
            rs.append(r)
        grads = torch.autograd.grad(parts, leaves, grad_outputs=rs, retain_graph=True, allow_unused=True)
        for g in grads:
            if g is not None and (bool(g[:i].ne(0).any()) or bool(g[i + 1:].ne(0).any())):
                return False
    return True


def one_hot(parts, k: int, per_sample: bool) -> list[torch.Tensor]:
    """Direction ``k`` of the output values (all parts in order): of one sample's values, on
    every sample at once, when ``per_sample``; else of the whole batch's."""
    rs = []
    for p in parts:
        r = torch.zeros_like(p)
        size = p[0].numel() if per_sample else p.numel()
        if 0 <= k < size:
            r.reshape(p.shape[0] if per_sample else 1, -1)[:, k] = 1.0
        k -= size
        rs.append(r)
    return rs
