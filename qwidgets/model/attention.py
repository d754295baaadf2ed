"""``nn.MultiheadAttention``'s arithmetic written out, with a tap on each value an integer
attention quantizes.

``torch.nn.MultiheadAttention`` computes its attention inside one call
(``F.multi_head_attention_forward``, or a fused kernel on its fast path), so hooks cannot see
the query, key, value, attention probabilities or the context that enters the output
projection. :func:`attention_forward` takes the same arguments as
``F.multi_head_attention_forward`` and computes the same result step by step with the same
torch operations as its ``need_weights`` branch (projections, ``baddbmm`` of the scaled query
and the key, softmax, ``bmm`` with the value, output projection), calling
``tap(role, tensor)`` on each of :data:`ROLES` and going on with what it returns.
"""

from __future__ import annotations

import inspect
import math
from collections.abc import Callable

import torch
import torch.nn.functional as F

ROLES = ("query", "key", "value", "probs", "context")

_SIGNATURE = inspect.signature(F.multi_head_attention_forward)


def supported(mha) -> bool:
    """Whether :func:`attention_forward` computes ``mha``'s attention (no ``bias_k`` / ``bias_v``,
    no ``add_zero_attn``)."""
    return mha.bias_k is None and mha.bias_v is None and not mha.add_zero_attn


def attention_forward(args: tuple, kwargs: dict, tap: Callable[[str, torch.Tensor], torch.Tensor]):
    """``F.multi_head_attention_forward(*args, **kwargs)`` step by step, with ``tap`` applied to
    the projected query / key / value (``(L, N, E)``), the probabilities (``(N * heads, L, S)``)
    and the context (``(L * N, E)``, the output projection's input). Dropout is not applied
    (the tool's passes run in eval mode)."""
    a = _SIGNATURE.bind(*args, **kwargs)
    a.apply_defaults()
    p = a.arguments
    if p["bias_k"] is not None or p["add_zero_attn"] or p["static_k"] is not None \
            or p["static_v"] is not None:
        raise ValueError("attention with bias_k / bias_v, add_zero_attn or static keys is not "
                         "decomposed by qwidgets")
    query, key, value, heads = p["query"], p["key"], p["value"], p["num_heads"]
    batched = query.dim() == 3
    kpm = p["key_padding_mask"]
    if not batched:
        query, key, value = query.unsqueeze(1), key.unsqueeze(1), value.unsqueeze(1)
        kpm = None if kpm is None else kpm.unsqueeze(0)
    tgt, bsz, embed = query.shape
    src = key.shape[0]
    attn_mask = p["attn_mask"]
    kpm = _additive(kpm, query.dtype)
    attn_mask = _additive(attn_mask, query.dtype)
    q, k, v = _project(query, key, value, p)
    q, k, v = tap("query", q), tap("key", k), tap("value", v)
    hd = embed // heads
    q = q.reshape(tgt, bsz * heads, hd).transpose(0, 1)
    k = k.reshape(src, bsz * heads, hd).transpose(0, 1)
    v = v.reshape(src, bsz * heads, hd).transpose(0, 1)
    if attn_mask is not None and attn_mask.dim() == 2:
        attn_mask = attn_mask.unsqueeze(0)
    if kpm is not None:
        kpm = kpm.view(bsz, 1, 1, src).expand(-1, heads, -1, -1).reshape(bsz * heads, 1, src)
        attn_mask = kpm if attn_mask is None else attn_mask + kpm
    q_scaled = q * math.sqrt(1.0 / float(hd))
    if attn_mask is not None:
        scores = torch.baddbmm(attn_mask, q_scaled, k.transpose(-2, -1))
    else:
        scores = torch.bmm(q_scaled, k.transpose(-2, -1))
    probs = tap("probs", F.softmax(scores, dim=-1))
    ctx = torch.bmm(probs, v).transpose(0, 1).reshape(tgt * bsz, embed)
    ctx = tap("context", ctx)
    out = F.linear(ctx, p["out_proj_weight"], p["out_proj_bias"]).view(tgt, bsz, -1)
    weights = None
    if p["need_weights"]:
        weights = probs.view(bsz, heads, tgt, src)
        if p["average_attn_weights"]:
            weights = weights.mean(dim=1)
        if not batched:
            weights = weights.squeeze(0)
    if not batched:
        out = out.squeeze(1)
    return out, weights


def product_macs(query_shape: tuple, key_shape: tuple) -> int:
    """Multiply-accumulates of one of attention's two products (query x key, or probabilities x
    value) for query / key tensors of shapes ``(L, N, E)`` / ``(S, N, E)``: ``N * L * S * E``."""
    tgt, bsz, embed = query_shape
    return int(bsz) * int(tgt) * int(key_shape[0]) * int(embed)


def _project(query, key, value, p):
    bias = p["in_proj_bias"]
    if p["use_separate_proj_weight"]:
        ws = (p["q_proj_weight"], p["k_proj_weight"], p["v_proj_weight"])
    else:
        ws = p["in_proj_weight"].chunk(3)
    bs = (None, None, None) if bias is None else bias.chunk(3)
    return tuple(F.linear(x, w, b) for x, w, b in zip((query, key, value), ws, bs, strict=True))


def _additive(mask, dtype):
    """A boolean mask (True: not attended) as an additive float mask; a float mask as it is."""
    if mask is None:
        return None
    if mask.dtype == torch.bool:
        return torch.zeros_like(mask, dtype=dtype).masked_fill_(mask, float("-inf"))
    return mask.to(dtype)
