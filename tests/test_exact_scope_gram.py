"""The exact model scope through a final Linear from its Gram matrix, against the naive loop.

Reference: the naive loop written here (deep copy, the table's quantized weight written into
one layer, full forward, SQNR of the output over all its values). The Gram route is exact in
real arithmetic (|d W^T|^2 = d W^T W d^T); float32 rounding of the two routes differs by about
1e-6 relative in the error power, far below the 0.01 dB compared.
"""

from __future__ import annotations

import copy
import math

import torch
from torch import nn

from qwidgets.core.rounding import quantize
from qwidgets.model.replay import trace
from qwidgets.planning import passes
from qwidgets.planning.scanning import scan


class _Decoderish(nn.Module):
    """Token embedding, two residual MLP blocks, a wide final Linear (the logits)."""

    def __init__(self, vocab=300, width=32):
        super().__init__()
        self.emb = nn.Embedding(vocab, width)
        self.up1, self.down1 = nn.Linear(width, 64), nn.Linear(64, width)
        self.up2, self.down2 = nn.Linear(width, 64), nn.Linear(64, width)
        self.norm = nn.LayerNorm(width)
        self.out = nn.Linear(width, vocab)

    def forward(self, tokens):
        h = self.emb(tokens)
        h = h + self.down1(torch.relu(self.up1(h)))
        h = h + self.down2(torch.relu(self.up2(h)))
        return self.out(self.norm(h))


def _naive_sqnr(model, x, name, grid):
    with torch.no_grad():
        ref = model(x).double()
        c = copy.deepcopy(model)
        layer = c.get_submodule(name)
        layer.weight.copy_(quantize(layer.weight, grid))
        err = c(x).double() - ref
    return 10 * math.log10(float((ref ** 2).sum()) / float((err ** 2).sum()))


def test_final_linear_scope_from_the_gram_matrix_equals_the_naive_loop(monkeypatch):
    torch.manual_seed(0)
    net = _Decoderish().eval()
    x = torch.randint(0, 300, (4, 16), generator=torch.Generator().manual_seed(1))
    assert trace(net).final_linear()[0] == "out"
    grams = []
    original = passes.head_gram

    def counted(replay, head, cache):
        grams.append(head)
        return original(replay, head, cache)

    monkeypatch.setattr(passes, "head_gram", counted)
    t = scan(net, x, bits=(3, 6), progress=False, scope="model")
    assert grams and set(grams) == {"out"}  # used for the layers before the head
    for name in ("up1", "down1", "up2", "down2", "out"):
        assert t.model_pass(name) == "suffix"
        for b in t.bits:
            assert abs(t.sqnr_db(name, b) - _naive_sqnr(net, x, name, t.weight_grid(name, b))) < 0.01


def test_no_gram_route_when_the_output_is_not_one_linear():
    class TwoHeads(_Decoderish):
        def forward(self, tokens):
            y = super().forward(tokens)
            return y, y.mean(dim=-1)

    assert trace(TwoHeads().eval()).final_linear() is None
    seq = nn.Sequential(nn.Linear(4, 8), nn.ReLU(), nn.Linear(8, 3), nn.Tanh())
    assert trace(seq).final_linear() is None
    assert trace(nn.Sequential(nn.Linear(4, 8), nn.ReLU(), nn.Linear(8, 3))).final_linear()[0] == "2"
