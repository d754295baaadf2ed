"""Small attention models of the kinds the attention tests cover (random weights, seeded)."""

from __future__ import annotations

import torch
import torch.nn.functional as F
from torch import nn


class MHAClassifier(nn.Module):
    """nn.MultiheadAttention (batch_first) on an embedded sequence, mean-pooled, a Linear head."""

    def __init__(self, d=16, heads=2, classes=3):
        super().__init__()
        self.inp = nn.Linear(6, d)
        self.attn = nn.MultiheadAttention(d, heads, batch_first=True)
        self.head = nn.Linear(d, classes)

    def forward(self, x):
        h = self.inp(x)
        a, _ = self.attn(h, h, h)
        return self.head((h + a).mean(dim=1))


class EncoderClassifier(nn.Module):
    """nn.TransformerEncoder (two layers, batch_first) and a Linear head."""

    def __init__(self, d=16, heads=2, classes=3):
        super().__init__()
        self.inp = nn.Linear(6, d)
        layer = nn.TransformerEncoderLayer(d, heads, dim_feedforward=32, dropout=0.0, batch_first=True)
        self.encoder = nn.TransformerEncoder(layer, 2, enable_nested_tensor=False)
        self.head = nn.Linear(d, classes)

    def forward(self, x):
        return self.head(self.encoder(self.inp(x)).mean(dim=1))


class SdpaBlock(nn.Module):
    """A decoder block: causal self-attention by F.scaled_dot_product_attention, an MLP."""

    def __init__(self, d, heads, mlp=2):
        super().__init__()
        self.heads = heads
        self.ln1, self.ln2 = nn.LayerNorm(d), nn.LayerNorm(d)
        self.qkv = nn.Linear(d, 3 * d)
        self.proj = nn.Linear(d, d)
        self.fc, self.out = nn.Linear(d, mlp * d), nn.Linear(mlp * d, d)

    def forward(self, x):
        b, t, d = x.shape
        q, k, v = self.qkv(self.ln1(x)).split(d, dim=2)
        q, k, v = (z.view(b, t, self.heads, d // self.heads).transpose(1, 2) for z in (q, k, v))
        y = F.scaled_dot_product_attention(q, k, v, is_causal=True)
        x = x + self.proj(y.transpose(1, 2).reshape(b, t, d))
        return x + self.out(F.gelu(self.fc(self.ln2(x))))


class TinyDecoder(nn.Module):
    """A GPT-style decoder: token and position embeddings, SDPA blocks, a tied output layer."""

    def __init__(self, vocab=20, d=16, heads=2, layers=2, length=8):
        super().__init__()
        self.tok, self.pos = nn.Embedding(vocab, d), nn.Embedding(length, d)
        self.blocks = nn.ModuleList(SdpaBlock(d, heads) for _ in range(layers))
        self.ln = nn.LayerNorm(d)
        self.lm = nn.Linear(d, vocab, bias=False)
        self.lm.weight = self.tok.weight

    def forward(self, ids):
        x = self.tok(ids) + self.pos(torch.arange(ids.shape[1]))
        for blk in self.blocks:
            x = blk(x)
        return self.lm(self.ln(x))


class InOut(nn.Module):
    """A projection written as ``torch.addmm(bias, x, self.weight)`` with the weight stored [in, out]."""

    def __init__(self, n_in, n_out):
        super().__init__()
        self.weight = nn.Parameter(torch.randn(n_in, n_out) / n_in ** 0.5)
        self.bias = nn.Parameter(torch.randn(n_out) * 0.1)

    def forward(self, x):
        shape = x.shape[:-1] + (self.weight.shape[1],)
        return torch.addmm(self.bias, x.reshape(-1, x.shape[-1]), self.weight).view(shape)


class AddmmMLP(nn.Module):
    """Two [in, out] addmm projections, and a matrix used as ``x @ self.mix.t()`` (a view)."""

    def __init__(self):
        super().__init__()
        self.up = InOut(6, 12)
        self.down = InOut(12, 5)
        self.mix = nn.Parameter(torch.randn(4, 5) / 5 ** 0.5)  # [out, in], used through .t()

    def forward(self, x):
        return torch.tanh(self.down(torch.relu(self.up(x)))) @ self.mix.t()


class TinyViT(nn.Module):
    """A vision transformer: 4x4 patches of 8x8 images by a strided Conv2d, a class token,
    learned positions, a pre-norm nn.TransformerEncoder with GELU, a Linear head."""

    def __init__(self, d=16, heads=2, classes=3):
        super().__init__()
        self.patch = nn.Conv2d(1, d, 4, stride=4)
        self.cls = nn.Parameter(torch.randn(1, 1, d) * 0.1)
        self.pos = nn.Parameter(torch.randn(1, 5, d) * 0.1)
        layer = nn.TransformerEncoderLayer(d, heads, 32, dropout=0.0, activation="gelu", batch_first=True,
                                           norm_first=True)
        self.encoder = nn.TransformerEncoder(layer, 2, enable_nested_tensor=False)
        self.norm, self.head = nn.LayerNorm(d), nn.Linear(d, classes)

    def forward(self, img):
        p = self.patch(img).flatten(2).transpose(1, 2)
        x = torch.cat([self.cls.expand(img.shape[0], -1, -1), p], dim=1) + self.pos
        return self.head(self.norm(self.encoder(x))[:, 0])


def sequences(n=8, t=5, features=6, seed=0):
    g = torch.Generator().manual_seed(seed)
    return torch.randn(n, t, features, generator=g)


def token_ids(n=6, t=8, vocab=20, seed=0):
    g = torch.Generator().manual_seed(seed)
    return torch.randint(0, vocab, (n, t), generator=g)


class TokenMLP(nn.Module):
    """Token features through a residual MLP and a head: rows of very different ranges."""

    def __init__(self, d=16):
        super().__init__()
        self.ln = nn.LayerNorm(d)
        self.fc1, self.fc2, self.head = nn.Linear(d, 2 * d), nn.Linear(2 * d, d), nn.Linear(d, 5)

    def forward(self, x):
        h = x + self.fc2(F.gelu(self.fc1(self.ln(x))))
        return self.head(h)
