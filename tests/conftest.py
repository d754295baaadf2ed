"""Shared fixtures and settings for the test suite.

- Every test starts from the same global random state (Python's ``random``, NumPy's legacy
  global generator and torch's default generator, all seeded with 0), so a test's outcome does
  not depend on which tests ran before it or in what order.
- ``digits_mlp``: a small MLP trained on scikit-learn's bundled optical digits data
  (``sklearn.datasets.load_digits``, offline), trained deterministically: one thread, torch's
  deterministic algorithms, a seeded generator for the initial weights.
- ``untouched``: records a model's parameters, buffers, training flags and hooks; calling
  ``.check()`` asserts they are bit-identical afterwards.

- Property tests (hypothesis) draw new examples on every local run; under CI (the ``CI``
  variable set, as ``.ci/run`` does) they draw the same examples every time (``derandomize``),
  so a landing run does not depend on luck. A failure found locally prints its example.

Markers (registered in pyproject.toml): ``slow`` (a fresh kernel, interpreter or long
training; deselect with ``-m "not slow"``) and ``browser`` (needs chromium; ``-m "not browser"``).
"""

from __future__ import annotations

import os
import random

import numpy as np
import pytest
import torch
from hypothesis import settings
from torch import nn

from qwidgets.core.grid_cache import GRID_CACHE

SEED = 0

settings.register_profile("ci", derandomize=True, print_blob=True)
if os.environ.get("CI"):
    settings.load_profile("ci")


@pytest.fixture(autouse=True)
def _seeded_random_state():
    random.seed(SEED)
    np.random.seed(SEED)
    torch.manual_seed(SEED)
    GRID_CACHE.clear()  # grids fitted by an earlier test are not served to this one
    yield


class deterministic_torch:
    """One thread and torch's deterministic algorithms inside the block (restored after)."""

    def __enter__(self):
        self._threads = torch.get_num_threads()
        self._strict = torch.are_deterministic_algorithms_enabled()
        torch.set_num_threads(1)  # float sums split across threads round differently
        torch.use_deterministic_algorithms(True)
        return self

    def __exit__(self, *exc):
        torch.use_deterministic_algorithms(self._strict)
        torch.set_num_threads(self._threads)
        return False


def train_digits_mlp(steps: int = 150):
    """A 64-96-48-10 MLP trained full-batch on the first 1400 digits (about a second)."""
    from sklearn.datasets import load_digits

    x, y = load_digits(return_X_y=True)
    x = torch.tensor(x / 16.0, dtype=torch.float32)
    y = torch.tensor(y, dtype=torch.int64)
    with deterministic_torch():
        torch.manual_seed(SEED)
        net = nn.Sequential(nn.Linear(64, 96), nn.ReLU(), nn.Linear(96, 48), nn.ReLU(),
                            nn.Linear(48, 10))
        opt = torch.optim.Adam(net.parameters(), lr=1e-2)
        for _ in range(steps):
            opt.zero_grad()
            nn.functional.cross_entropy(net(x[:1400]), y[:1400]).backward()
            opt.step()
    for p in net.parameters():
        p.grad = None
    return net.eval(), x[1400:], y[1400:]


@pytest.fixture(scope="session")
def digits_mlp():
    """(model, held-out inputs, held-out labels); the model is shared: tests must not change it."""
    net, x, y = train_digits_mlp()
    assert float((net(x).argmax(1) == y).float().mean()) > 0.85
    return net, x, y


class _Untouched:
    def __init__(self, model: nn.Module):
        self.model = model
        self.state = {k: v.clone() for k, v in model.state_dict(keep_vars=False).items()}
        self.flags = self._flags()

    def _flags(self):
        return [(m.training, list(m._forward_hooks), list(m._forward_pre_hooks),
                 list(m._backward_hooks)) for m in self.model.modules()]

    def check(self) -> None:
        now = self.model.state_dict()
        assert list(now) == list(self.state)
        for k, v in now.items():
            assert torch.equal(v, self.state[k]), f"{k} changed"
        assert self._flags() == self.flags, "training flags or hooks changed"


@pytest.fixture
def untouched():
    """``keep = untouched(model)`` ... ``keep.check()``: the model is bit-identical."""
    return _Untouched


F32_EPS = 2.0**-24
"""float32's unit roundoff (IEEE 754 binary32: 24-bit significand)."""


def f32_sqnr_tol_db(sqnr_db: float, ulps: int = 16, crest: float = 10.0) -> float:
    """How far an SQNR (dB) may move when the float32 outputs it compares are recomputed under
    another batch split, thread count or CPU kernel (other blockings round each output
    differently, by a few units in the last place; ``ulps`` bounds that, ``crest`` the ratio of
    the largest output to the outputs' RMS).

    An output error of d = ulps * eps * crest * rms(y) on the float and on the quantized output
    moves the noise power N by at most 2 * 2d / rms(noise) relative, and
    rms(y) / rms(noise) = 10 ** (sqnr_db / 20); 10 * log10(1 + r) <= 4.343 * r (derived here from
    float32's rounding, not measured)."""
    r = 4 * ulps * F32_EPS * crest * 10 ** (sqnr_db / 20)
    return 10 / 2.302585092994046 * r + 1e-12
