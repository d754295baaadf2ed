"""The whole workflow on three transformer kinds, as a user writes it: (inputs, targets)
loaders with ``inputs=0``, scan with both estimates, plan_budget, refine_plan, export_onnx,
check_onnx, with no workaround.

Outside checks: the ONNX reference evaluator and ONNX Runtime (inside check_onnx, whose own
checks are tested in test_onnx_levels.py); the exact scan (a naive loop's figures, tested in
test_attention_activations.py / test_usage.py) for the entries the gain estimate does not
cover, which it measures the same way. Float32 passes on other batch splits round differently:
scanned figures agree to 0.01 dB.
"""

from __future__ import annotations

import math

import pytest
import torch
from attention_models import EncoderClassifier, TinyDecoder, TinyViT
from stored_bits import mean_bits_for
from torch.utils.data import DataLoader, TensorDataset

from qwidgets import check_onnx, export_onnx, plan_budget, refine_plan, scan


def _data(kind: str):
    g = torch.Generator().manual_seed(0)
    if kind == "encoder":
        return EncoderClassifier(), torch.randn(96, 5, 6, generator=g), torch.randint(0, 3, (96,), generator=g)
    if kind == "vit":
        return TinyViT(), torch.randn(96, 1, 8, 8, generator=g), torch.randint(0, 3, (96,), generator=g)
    ids = torch.randint(0, 20, (96, 8), generator=g)
    return TinyDecoder(), ids, torch.roll(ids, -1, dims=1)


def _accuracy(out, target) -> float:
    return float((out.argmax(-1) == target).float().mean())


@pytest.mark.parametrize("kind", ["encoder", "vit", "decoder"])
def test_scan_plan_refine_export_check_from_a_loader(kind, tmp_path):
    torch.manual_seed(0)
    net, x, y = _data(kind)
    net.eval()
    loader = DataLoader(TensorDataset(x, y), batch_size=32)
    tables = {est: scan(net, loader, inputs=0, bits=(4, 8), quantize="separate", input_bits=(8,),
                        estimate=est, progress=False) for est in ("exact", "gain")}
    gain = tables["gain"]
    assert gain.layers == tables["exact"].layers
    exact_rows = [n for n in gain.layers if gain.model_pass(n) != "probes"]
    assert any(gain.kind(n) == "activation" for n in exact_rows)  # attention's activations
    for n in exact_rows:  # not estimated: the exact scan's figures
        rows = [("input", 8)] if gain.has_input_rows(n) else []
        rows += [] if gain.kind(n) == "activation" else [("weight", 4), ("weight", 8)]
        for src, b in rows:
            a, e = gain.sqnr_db(n, b, "model", source=src), tables["exact"].sqnr_db(n, b, "model", source=src)
            assert abs(a - e) < 0.01, (n, b, src)
    plan = plan_budget(gain, mean_bits=mean_bits_for(gain, 6))
    refined = refine_plan(net, loader, plan, inputs=0, steps=6, progress=False)
    assert refined.plan.bits == plan.bits and refined.sqnr_db >= refined.start_sqnr_db
    path = tmp_path / f"{kind}.onnx"
    export_onnx(net, refined.plan, path, x[:1])
    check = check_onnx(path, net, refined.plan, loader, inputs=0, target=1, metric=_accuracy)
    assert check.matches, str(check)
    assert check.optimized_error is None and check.n_samples == len(x)
    assert math.isfinite(check.metric_optimized)


def test_refine_plan_joins_a_loaders_batches():
    """refine_plan on a loader with inputs=0 is refine_plan on the joined tensor."""
    torch.manual_seed(0)
    net, x, y = _data("encoder")
    net.eval()
    table = scan(net, x, bits=(4, 8), quantize="separate", input_bits=(8,), progress=False)
    plan = plan_budget(table, mean_bits=mean_bits_for(table, 6))
    loader = DataLoader(TensorDataset(x, y), batch_size=40)  # the last batch is shorter
    a = refine_plan(net, loader, plan, inputs=0, steps=3, progress=False, seed=1)
    b = refine_plan(net, x, plan, steps=3, progress=False, seed=1)
    assert a.sqnr_db == pytest.approx(b.sqnr_db, abs=1e-9) and a.start_sqnr_db == pytest.approx(b.start_sqnr_db, abs=1e-9)
    ragged = [torch.randn(4, 5, 6), torch.randn(4, 3, 6)]  # sequences of other lengths
    with pytest.raises(ValueError, match="cannot be joined along axis 0"):
        refine_plan(net, iter(ragged), plan, steps=1, progress=False)
