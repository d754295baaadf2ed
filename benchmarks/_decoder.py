"""A GPT-style decoder for the benchmarks: token and position embeddings, pre-norm blocks of
causal self-attention (separate query / key / value / output Linears, written with
``F.scaled_dot_product_attention``) and an MLP (4x the width unless ``mlp`` is given; with
``gated``, ``down(silu(gate(h)) * up(h))``), a final LayerNorm and an output layer tied to
the token embedding. Random weights at the usual initial scale (normal, std 0.02)."""

from __future__ import annotations

import torch
import torch.nn.functional as F
from torch import nn


class _Block(nn.Module):
    def __init__(self, width: int, heads: int, mlp: int, gated: bool = False):
        super().__init__()
        self.heads = heads
        self.ln1, self.ln2 = nn.LayerNorm(width), nn.LayerNorm(width)
        self.q, self.k, self.v, self.o = (nn.Linear(width, width) for _ in range(4))
        self.up, self.down = nn.Linear(width, mlp), nn.Linear(mlp, width)
        self.gate = nn.Linear(width, mlp) if gated else None

    def _split(self, t, b, n):
        return t.view(b, n, self.heads, -1).transpose(1, 2)

    def forward(self, x):
        b, n = x.size(0), x.size(1)
        h = self.ln1(x)
        q, k, v = self._split(self.q(h), b, n), self._split(self.k(h), b, n), self._split(self.v(h), b, n)
        a = F.scaled_dot_product_attention(q, k, v, is_causal=True)
        x = x + self.o(a.transpose(1, 2).reshape(b, n, -1))
        h = self.ln2(x)
        if self.gate is None:
            return x + self.down(F.gelu(self.up(h)))
        return x + self.down(F.silu(self.gate(h)) * self.up(h))


class Decoder(nn.Module):
    def __init__(self, vocab: int = 8000, width: int = 256, layers: int = 4, heads: int = 4, context: int = 64,
                 mlp: int | None = None, gated: bool = False):
        super().__init__()
        self.tok, self.pos = nn.Embedding(vocab, width), nn.Embedding(context, width)
        self.blocks = nn.Sequential(*(_Block(width, heads, mlp or 4 * width, gated) for _ in range(layers)))
        self.ln = nn.LayerNorm(width)
        self.head = nn.Linear(width, vocab, bias=False)
        self.head.weight = self.tok.weight  # tied
        self.register_buffer("positions", torch.arange(context), persistent=False)

    def forward(self, tokens):
        x = self.tok(tokens) + self.pos(self.positions)  # sequences of the full context length
        return self.head(self.ln(self.blocks(x)))


def make_decoder(seed: int = 0, **kw) -> nn.Module:
    torch.manual_seed(seed)
    model = Decoder(**kw)
    with torch.no_grad():
        for m in model.modules():
            if isinstance(m, (nn.Linear, nn.Embedding)):
                m.weight.normal_(0.0, 0.02)
                if getattr(m, "bias", None) is not None:
                    m.bias.zero_()
    return model.eval()


def tokens(n: int = 8, length: int = 64, vocab: int = 8000) -> torch.Tensor:
    return torch.randint(0, vocab, (n, length), generator=torch.Generator().manual_seed(1))
