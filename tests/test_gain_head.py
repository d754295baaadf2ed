"""The gain estimate past a wide final Linear (gain_head.py): probes drawn at its input.

Outside checks:
- unbiased: over 24 probe seeds the estimated / exact noise ratio averages 1 within 4 standard
  errors (Hutchinson's estimator: E[(r . v)^2] = ||v||^2 for r ~ N(0, I); the probes drawn at
  the output layer's input stand for r ~ N(0, P), P the projector onto the layer's columns, and
  the rest of the layer's own error is added exactly), for a tied embedding (errors at the
  embedding and at the output layer, so the cross term matters) and a layer before the head,
  where the rest of the model is linear (the exact scope is then the estimate's expectation,
  up to the tied weight's second-order term, about 2^-6 of the noise at 6 bits);
- the output layer alone: its error power ||dW x||^2 exactly, the naive loop written here
  (deep copy, quantized weight, full forward, SQNR by hand) to float32 rounding (1e-3 dB);
- the same as the probes on the output: both unbiased for the same figure, checked by the
  means of both over the seeds agreeing within 4 standard errors of their difference.
"""

from __future__ import annotations

import numpy as np
import torch
from naive_loops import naive_weight_sqnr_db
from torch import nn

from qwidgets.planning import gain_head, gain_probes
from qwidgets.planning.scanning import scan

VOCAB, WIDTH, LENGTH = 40, 6, 3  # 3 positions x 40 logits = 120 values a sample: random probes


class _LM(nn.Module):
    """Token and position embeddings, a Linear, an output layer (tied or not); all linear."""

    def __init__(self, tied: bool):
        super().__init__()
        self.tok, self.pos = nn.Embedding(VOCAB, WIDTH), nn.Embedding(LENGTH, WIDTH)
        self.mid = nn.Linear(WIDTH, WIDTH)
        self.head = nn.Linear(WIDTH, VOCAB, bias=not tied)
        if tied:
            self.head.weight = self.tok.weight
        self.register_buffer("positions", torch.arange(LENGTH), persistent=False)

    def forward(self, ids):
        return self.head(self.mid(self.tok(ids) + self.pos(self.positions)))


def _model(tied: bool) -> nn.Module:
    torch.manual_seed(4)
    return _LM(tied).eval()


def _ids(n=8):
    return torch.randint(0, VOCAB, (n, LENGTH), generator=torch.Generator().manual_seed(2))


def _ratios(monkeypatch, net, x, names, bits):
    exact = scan(net, x, bits=bits, progress=False)
    out = []
    for k in range(24):
        monkeypatch.setattr(gain_probes, "SEED", 700 + k)
        gain = scan(net, x, bits=bits, progress=False, estimate="gain")
        assert {gain.model_pass(n) for n in names} == {"probes"}
        out.append([10 ** ((exact.sqnr_db(n, b) - gain.sqnr_db(n, b)) / 10) for n in names for b in bits])
    return np.array(out)


def test_probes_at_the_output_layers_input_are_unbiased(monkeypatch):
    net, x = _model(tied=True), _ids()
    drawn = []
    original = gain_head.HeadShortcut.probe

    def counting(self, z):
        drawn.append(z.shape)
        return original(self, z)

    monkeypatch.setattr(gain_head.HeadShortcut, "probe", counting)
    r = _ratios(monkeypatch, net, x, ["tok", "mid"], (6,))
    assert drawn and all(s[-1] == WIDTH for s in drawn)  # drawn at the head's input, not its output
    se = r.std(axis=0, ddof=1) / np.sqrt(len(r))
    assert (np.abs(r.mean(axis=0) - 1) <= 4 * se).all(), (r.mean(axis=0), se)
    assert np.abs(r - 1).max() > 1e-3  # an estimate, not the exact figure by another road


def test_the_shortcut_and_probes_on_the_output_estimate_the_same_figure(monkeypatch):
    net, x = _model(tied=True), _ids()
    short = _ratios(monkeypatch, net, x, ["tok", "mid"], (6,))
    monkeypatch.setattr(gain_head, "WIDE", 10**9)  # no layer is wide enough: probes on the output
    full = _ratios(monkeypatch, net, x, ["tok", "mid"], (6,))
    assert not np.allclose(short, full)  # the other estimator ran
    se = np.sqrt(short.var(axis=0, ddof=1) / len(short) + full.var(axis=0, ddof=1) / len(full))
    assert (np.abs(short.mean(axis=0) - full.mean(axis=0)) <= 4 * se).all()


def test_the_output_layer_alone_is_measured_exactly():
    net, x = _model(tied=False), _ids()
    gain = scan(net, x, bits=(3, 5, 8), progress=False, estimate="gain")
    assert gain.model_pass("head") == "probes"
    for b in gain.bits:
        want = naive_weight_sqnr_db(net, x, "head", gain.weight_grid("head", b))
        assert abs(gain.sqnr_db("head", b) - want) <= 1e-3, (b, gain.sqnr_db("head", b), want)


def test_the_shortcut_gives_the_same_numbers_twice_and_in_pieces(monkeypatch):
    net, x = _model(tied=True), _ids()
    a = scan(net, x, bits=(3, 6), progress=False, estimate="gain")
    b = scan(net, x, bits=(3, 6), progress=False, estimate="gain")
    assert np.array_equal(a.sqnr_array("model"), b.sqnr_array("model"))
    monkeypatch.setattr(gain_probes, "ERROR_BYTES", 1)  # one sample a piece: seeded per sample
    parts = scan(net, x, bits=(3, 6), progress=False, estimate="gain")
    # (the position embedding has no sample axis: one dot product per piece, another estimate)
    rows = [a.layers.index(n) for n in ("tok", "mid")]
    np.testing.assert_allclose(parts.sqnr_array("model")[rows], a.sqnr_array("model")[rows], rtol=0, atol=1e-4)


def test_a_tied_embeddings_weight_scope_comes_from_the_shortcuts_copies(monkeypatch):
    # the same quantized copies and float64 sums as the layer-scope scan's: bit for bit; and
    # the embedding's table is not quantized again for it
    from qwidgets.planning import scanning

    net, x = _model(tied=True), _ids()
    layer = scan(net, x, bits=(3, 6), progress=False, scope="layer")
    weighed = []
    original = scanning.weight_scope_powers
    monkeypatch.setattr(scanning, "weight_scope_powers", lambda w, c: weighed.append(w.shape) or original(w, c))
    gain = scan(net, x, bits=(3, 6), progress=False, estimate="gain")
    assert (VOCAB, WIDTH) not in weighed  # the tied table: from the shortcut, not weighed again
    rows = [gain.layers.index("tok")]
    assert np.array_equal(gain.sqnr_array("layer")[rows], layer.sqnr_array("layer")[rows])
