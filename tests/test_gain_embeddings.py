"""The gain estimate of embeddings and tied weights (a language model's embedding and output layer).

Outside checks: the naive loop written here (deep copy, overwrite the weight with its quantized
values on the table's grid, full forward, SQNR of the output). Where the rest of the model is
linear in the quantized weight the first-order estimate is exact (additive-noise model,
Widrow & Kollar 2008: the output error is J e), so it equals the naive loop to float32
rounding of the outputs (1e-3 dB); a tied weight enters twice (embedding and output layer), so
the output is quadratic in its error and the estimate departs by the second-order term, about
the relative weight error (2^-7 at 8 bits: well under 0.1 dB).
"""

from __future__ import annotations

import copy

import pytest
import torch
import torch.nn.functional as F
from torch import nn

from qwidgets.core.metrics import error_stats
from qwidgets.core.rounding import quantize
from qwidgets.planning.scanning import ScanNote, scan

VOCAB, WIDTH, LENGTH = 12, 6, 3  # 3 positions x 12 logits = 36 values a sample: one-hot probes


class _LinearLM(nn.Module):
    """Token and position embeddings, a Linear, an output layer; nothing nonlinear."""

    def __init__(self, tied: bool):
        super().__init__()
        self.tok, self.pos = nn.Embedding(VOCAB, WIDTH), nn.Embedding(LENGTH, WIDTH)
        self.mid = nn.Linear(WIDTH, WIDTH)
        self.head = nn.Linear(WIDTH, VOCAB, bias=False)
        if tied:
            self.head.weight = self.tok.weight
        self.register_buffer("positions", torch.arange(LENGTH), persistent=False)

    def forward(self, ids):
        return self.head(self.mid(self.tok(ids) + self.pos(self.positions)))


class _FunctionalHead(_LinearLM):
    """The output layer written as ``F.linear`` on the embedding's tensor (no module call)."""

    def forward(self, ids):
        return F.linear(self.mid(self.tok(ids) + self.pos(self.positions)), self.tok.weight)


def _naive(model, x, param, grid) -> float:
    with torch.no_grad():
        ref = model(x)
        c = copy.deepcopy(model)
        p = c.get_parameter(param)
        p.copy_(quantize(p, grid))
        return error_stats(ref, c(x)).sqnr_db


def _model(cls, tied=True):
    torch.manual_seed(4)
    return cls(tied).eval()


def _ids(n=9):
    return torch.randint(0, VOCAB, (n, LENGTH), generator=torch.Generator().manual_seed(2))


def test_untied_embeddings_are_probed_and_exact_where_the_rest_is_linear():
    net, x = _model(_LinearLM, tied=False), _ids()
    with pytest.warns(ScanNote, match=r"1 entry \('pos'\) measured exactly"):
        gain = scan(net, x, bits=(2, 4, 8), progress=False, estimate="gain")
    # the position embedding's output has no sample axis, and one-hot directions (few output
    # values) are the same in every sample: it is measured exactly
    assert gain.model_pass("pos") != "probes"
    for name in ("tok", "pos", "mid", "head"):
        assert gain.model_pass(name) == ("probes" if name != "pos" else gain.model_pass("pos"))
        for b in gain.bits:
            want = _naive(net, x, f"{name}.weight", gain.weight_grid(name, b))
            assert gain.sqnr_db(name, b) == pytest.approx(want, abs=1e-3), (name, b)


def test_a_tied_embedding_is_probed_at_both_of_its_places():
    net, x = _model(_LinearLM), _ids()
    gain = scan(net, x, bits=(4, 8), progress=False, estimate="gain")
    assert gain.shared_with("tok") == ["head"]
    assert gain.model_pass("tok") == "probes" and not any("'tok'" in n for n in gain.notes)
    for b, tol in ((8, 0.1), (4, 1.0)):  # the second-order term (see the module docstring)
        want = _naive(net, x, "tok.weight", gain.weight_grid("tok", b))
        assert gain.sqnr_db("tok", b) == pytest.approx(want, abs=tol)
    # the embedding's place alone would miss the output layer's error, by far more than that
    untied = scan(_model(_LinearLM, tied=False), x, bits=(8,), progress=False, estimate="gain")
    assert abs(untied.sqnr_db("tok", 8) - gain.sqnr_db("tok", 8)) > 1.0


def test_a_tensor_used_outside_its_modules_is_measured_exactly_and_noted():
    net, x = _model(_FunctionalHead), _ids()
    with pytest.warns(ScanNote, match="used outside the modules that hold it"):
        gain = scan(net, x, bits=(4, 8), progress=False, estimate="gain")
    assert gain.model_pass("tok") != "probes"
    for b in gain.bits:
        assert gain.sqnr_db("tok", b) == pytest.approx(_naive(net, x, "tok.weight", gain.weight_grid("tok", b)),
                                                       abs=1e-3)


def test_a_position_embedding_with_random_probes_is_unbiased(monkeypatch):
    # many output values a sample: random probes, independent per sample, so one dot product
    # over the batch for the position embedding (no sample axis) is still unbiased (Hutchinson's
    # estimator: E[(r.Je)^2] = ||Je||^2); over 16 probe seeds the estimated / exact noise ratio
    # averages 1 within 4 standard errors
    from qwidgets.planning import gain_probes

    net = _model(_LinearLM, tied=False)
    net.head = nn.Linear(WIDTH, 40, bias=False)  # 3 x 40 values a sample
    x = _ids(8)
    exact = scan(net, x, bits=(3, 6), progress=False)
    ratios = []
    for k in range(16):
        monkeypatch.setattr(gain_probes, "SEED", 500 + k)
        gain = scan(net, x, bits=(3, 6), progress=False, estimate="gain")
        assert gain.model_pass("pos") == "probes" and not gain.notes
        ratios.append(10 ** ((exact.sqnr_db("pos", 3) - gain.sqnr_db("pos", 3)) / 10))
    r = torch.tensor(ratios, dtype=torch.float64)
    assert abs(float(r.mean()) - 1) <= 4 * float(r.std()) / len(r) ** 0.5, ratios
    assert float((r - 1).abs().max()) > 1e-3  # an estimate, not the exact figure by another road


@pytest.mark.parametrize("kind", ["row", "row asymmetric", "tensor", "blocks in rows", "blocks across rows"])
def test_an_embeddings_errors_from_its_looked_up_rows_equal_the_whole_table_quantized(kind):
    # the probes quantize only the rows an embedding looked up; torch's own F.embedding on the
    # whole table quantized is the reference (bit for bit: the same values, rounded alike)
    from qwidgets.core.ranges import fit_range
    from qwidgets.planning.gain_dots import looked_up_errors

    torch.manual_seed(7)
    emb = nn.Embedding(50, 16)
    w = emb.weight.detach()
    kw = {"row": dict(axis=0), "row asymmetric": dict(axis=0, symmetric=False), "tensor": {},
          "blocks in rows": dict(axis=1, block_size=8), "blocks across rows": dict(axis=0, block_size=5)}[kind]
    grids = [fit_range(w, b, "minmax", **kw) for b in (3, 8)]
    ids = torch.randint(0, 50, (4, 7), generator=torch.Generator().manual_seed(3))
    ref = F.embedding(ids, w)
    got = looked_up_errors(emb, ids, w, ref, [(g, None) for g in grids] + [(None, None)])
    if kind == "blocks across rows":  # the block parameters do not follow the rows: not taken
        assert got is None
        return
    for g, e in zip(grids, got, strict=False):
        assert torch.equal(e, F.embedding(ids, quantize(w, g)) - ref)
    assert torch.equal(got[-1], torch.zeros_like(ref))  # the float weight: no error
