"""A large MSE search runs in chunks of rows with the grids of one search over all rows.

Outside check: the grids of the same search with the chunking switched off (one sorted copy
of every row), compared with ``torch.equal``: each row's search reads its own row only, so
the chunks cannot change a grid (not a tolerance: the same float operations per row).
"""

from __future__ import annotations

import pytest
import torch

from qwidgets.core import clip_search
from qwidgets.core.ranges import fit_ranges


@pytest.mark.parametrize("symmetric", [True, False])
def test_row_chunks_give_the_grids_of_one_search(monkeypatch, symmetric):
    g = torch.Generator().manual_seed(3)
    # rows of different spreads and one heavy tail, so rows prune different sweep candidates
    w = torch.randn(300, 96, generator=g) * torch.logspace(-2, 0, 300)[:, None]
    w[7, 5] = 40.0
    if not symmetric:
        w = w.abs() + 0.1 * torch.randn(300, 96, generator=g)
    whole = fit_ranges(w, (2, 4, 8), "mse", axis=0, symmetric=symmetric)
    monkeypatch.setattr(clip_search, "ROW_CHUNK_VALUES", 96 * 37)  # 37 rows a chunk, 9 chunks
    assert len(clip_search.row_chunks(w)) == 9
    chunked = fit_ranges(w, (2, 4, 8), "mse", axis=0, symmetric=symmetric)
    for a, b in zip(whole, chunked, strict=True):
        assert torch.equal(a.scale, b.scale) and torch.equal(a.offset_tensor(), b.offset_tensor())
