"""The demo scenario: spotting worn bearings on a conveyor motor from vibration snippets.

An invented, fully synthetic scenario used by ``notebooks/demo.ipynb``, the tests and
``python -m qwidgets.demo``. A conveyor's drive motor carries an accelerometer sampled at
8 kHz. A small 1-D convolutional network reads 64 ms snippets and says whether the bearing is
healthy, has a worn outer race or a worn inner race. The network is to be flashed onto the
sensor board, whose firmware leaves :data:`BOARD_WEIGHT_BUDGET_KIB` KiB for weights: far less
than the 32-bit float model needs, so every layer must lose bits, and the question is which.

The physics is simplified but keeps what makes the task non-trivial:

* every snippet carries the shaft's running tone (23-25 Hz and its 2nd harmonic), the
  motor's 100 Hz magnetic hum, a belt-mesh tone (300-700 Hz) and broadband noise;
* a worn race makes the rolling elements strike the defect at a fixed rate, each strike
  ringing the housing's resonance (2.2-3.2 kHz) for about a millisecond; the outer-race rate
  is 3.6 x shaft speed, the inner-race rate 5.4 x shaft speed, and inner-race strikes are
  amplitude-modulated by the shaft turning the defect in and out of the load zone;
* healthy snippets sometimes carry one stray knock (a parcel landing on the belt), so a
  single impulse is not evidence of wear; some worn snippets are faint.

The same ``seed`` gives bit-identical data. Training rounds by the CPU's vector instructions
(AVX-512, AVX2 and plain kernels gave 96.1%, 96.3% and 96.7% held-out accuracy), so the model
trained from seed 0 ships with the package (:data:`WEIGHTS_FILE`) and :func:`load_demo` loads
it (``retrain=True`` trains it again). The README's figures come from :func:`demo_figures`
(``python -m qwidgets.demo --readme``); a test checks them, also under other kernels.

>>> x, y = make_snippets(6, seed=1)
>>> tuple(x.shape), x.dtype, y.tolist()
((6, 1, 512), torch.float32, [0, 1, 2, 0, 1, 2])
"""

from __future__ import annotations

import math
import sys
from collections import OrderedDict
from contextlib import contextmanager
from functools import lru_cache
from pathlib import Path
from typing import NamedTuple

import numpy as np
import torch
from torch import nn

from .core.checks import check_bool, check_int
from .data import read_arrays, write_arrays

__all__ = [
    "SAMPLE_RATE_HZ",
    "SNIPPET_SAMPLES",
    "CLASSES",
    "BOARD_WEIGHT_BUDGET_KIB",
    "BearingDemo",
    "make_snippets",
    "build_model",
    "train_model",
    "accuracy",
    "load_demo",
    "save_weights",
    "main",
]

SAMPLE_RATE_HZ = 8000
"""Accelerometer sample rate of the sensor board (Hz)."""

SNIPPET_SAMPLES = 512
"""Samples per snippet: 64 ms at 8 kHz, about 1.5 shaft turns."""

CLASSES = ("healthy", "outer race worn", "inner race worn")
"""Class names, indexed by the integer labels."""

BOARD_WEIGHT_BUDGET_KIB = 7.0
"""Weight memory (KiB) the sensor board's firmware leaves for the network: every parameter,
quantized codes with their scales and zero points, and the biases in float32 (the board runs
each convolution with its BatchNorm folded in)."""

_N_TRAIN = 4000
_N_TEST = 1500
_TRAIN_EPOCHS = 5

WEIGHTS_FILE = "bearing_classifier.npz"
"""The shipped classifier, trained by :func:`train_model` from seed :data:`SHIPPED_SEED`
(``qwidgets/data/``; every ``state_dict`` entry as a NumPy array, plus ``meta.*`` fields)."""

SHIPPED_SEED = 0
"""The seed the shipped weights were trained from (data and initial weights)."""


# ----------------------------------------------------------------------------- data
def make_snippets(n: int, seed: int = 0) -> tuple[torch.Tensor, torch.Tensor]:
    """``n`` synthetic vibration snippets and their labels, classes in turn (0, 1, 2, 0, ...).

    Returns ``x`` of shape ``(n, 1, SNIPPET_SAMPLES)`` (float32, acceleration in g) and ``y``
    of shape ``(n,)`` (int64 indices into :data:`CLASSES`). Same ``seed``, same data.

    >>> x1, _ = make_snippets(3, seed=7)
    >>> x2, _ = make_snippets(3, seed=7)
    >>> bool(torch.equal(x1, x2)), round(float(x1.std()), 1) > 0
    (True, True)
    """
    check_int(n, "n", minimum=1)
    if isinstance(seed, bool) or not isinstance(seed, int):
        raise TypeError(f"seed must be an int, got {seed!r}")
    rng = np.random.default_rng(seed)
    fs, m = SAMPLE_RATE_HZ, SNIPPET_SAMPLES
    t = np.arange(m) / fs
    y = np.arange(n) % len(CLASSES)

    def col(a):  # one value per snippet, broadcast over time
        return np.asarray(a, dtype=np.float64)[:, None]

    shaft = rng.uniform(23.5, 25.0, n)  # Hz: 1410-1500 rpm under load
    x = (
        col(rng.uniform(0.3, 0.6, n)) * np.sin(2 * np.pi * col(shaft) * t + col(rng.uniform(0, 2 * np.pi, n)))
        + col(rng.uniform(0.05, 0.2, n)) * np.sin(4 * np.pi * col(shaft) * t + col(rng.uniform(0, 2 * np.pi, n)))
        + col(rng.uniform(0.05, 0.15, n)) * np.sin(2 * np.pi * 100.0 * t + col(rng.uniform(0, 2 * np.pi, n)))
        + col(rng.uniform(0.05, 0.2, n))
        * np.sin(2 * np.pi * col(rng.uniform(300, 700, n)) * t + col(rng.uniform(0, 2 * np.pi, n)))
        + col(rng.uniform(0.1, 0.3, n)) * rng.standard_normal((n, m))
    )

    # Strike trains: unit impulses at the defect rate (with slip jitter), then each snippet's
    # own ringing resonance applied by FFT convolution (zero-padded, so nothing wraps around).
    strikes = np.zeros((n, m))
    rate = np.where(y == 1, 3.6, 5.4) * shaft  # strikes per second
    period = fs / rate  # samples between strikes
    start = rng.uniform(0, 1, n)
    amp = rng.uniform(0.6, 1.6, n)
    k = np.arange(int(m / period.min()) + 2)
    times = (col(start) + k) * col(period)
    times = times + rng.normal(0.0, 0.01, times.shape) * col(period)  # slip jitter
    # inner race: the defect turns with the shaft through the load zone
    turn = np.cos(2 * np.pi * col(shaft) * times / fs + col(start) * 2 * np.pi)
    gain = col(amp) * np.where(col(y) == 2, 1.0 + 0.8 * turn, 1.0)
    idx = np.round(times).astype(np.int64)
    hit = (y > 0)[:, None] & (idx >= 0) & (idx < m)
    rows = np.broadcast_to(np.arange(n)[:, None], idx.shape)
    np.add.at(strikes, (rows[hit], idx[hit]), gain[hit])
    knock = (y == 0) & (rng.uniform(0, 1, n) < 0.3)  # a parcel landing on the belt
    strikes[np.flatnonzero(knock), rng.integers(0, m, int(knock.sum()))] = rng.uniform(0.5, 1.8, int(knock.sum()))

    ring_t = np.arange(64) / fs
    f_res = rng.uniform(2200, 3200, n)
    tau = rng.uniform(0.6e-3, 1.2e-3, n)
    ring = np.exp(-ring_t / col(tau)) * np.sin(2 * np.pi * col(f_res) * ring_t)
    size = 2 * m
    rung = np.fft.irfft(np.fft.rfft(strikes, size) * np.fft.rfft(ring, size), size)[:, :m]
    x = x + rung
    return torch.from_numpy(x.astype(np.float32)).unsqueeze(1), torch.from_numpy(y.astype(np.int64))


# ----------------------------------------------------------------------------- model
def build_model(seed: int = 0) -> nn.Sequential:
    """The untrained bearing classifier: five Conv1d + BatchNorm + ReLU stages, then two Linear.

    Seven quantizable layers ("conv1" ... "conv5", "fc1", "fc2"), 12,072 weights: 47 KiB in
    float32, about ten times what the board can hold.

    >>> m = build_model()
    >>> [n for n, mod in m.named_modules() if isinstance(mod, (nn.Conv1d, nn.Linear))]
    ['conv1', 'conv2', 'conv3', 'conv4', 'conv5', 'fc1', 'fc2']
    >>> sum(p.numel() for n, p in m.named_parameters() if p.dim() > 1)
    12072
    >>> tuple(m(torch.zeros(2, 1, SNIPPET_SAMPLES)).shape)
    (2, 3)
    """
    torch.manual_seed(seed)
    layers: list[tuple[str, nn.Module]] = []
    widths = [(1, 8, 9), (8, 16, 7), (16, 16, 5), (16, 32, 5), (32, 32, 3)]
    for i, (c_in, c_out, k) in enumerate(widths, start=1):
        # stride 2 halves the time axis at each stage: 512 -> 16 samples, while the
        # receptive field grows to about 100 samples, one strike period of a worn outer race
        layers += [
            (f"conv{i}", nn.Conv1d(c_in, c_out, k, stride=2, padding=k // 2, bias=False)),
            (f"bn{i}", nn.BatchNorm1d(c_out)),
            (f"relu{i}", nn.ReLU()),
        ]
    layers += [
        ("pool", nn.AdaptiveAvgPool1d(4)),
        ("flatten", nn.Flatten()),
        ("fc1", nn.Linear(128, 32)),
        ("relu6", nn.ReLU()),
        ("fc2", nn.Linear(32, len(CLASSES))),
    ]
    return nn.Sequential(OrderedDict(layers))


@contextmanager
def deterministic():
    """One torch thread and torch's deterministic algorithms inside the block (restored after).

    Float sums split across threads round differently, so a thread count is part of the
    result; one thread is also faster for convolutions this small on a busy machine.
    """
    threads = torch.get_num_threads()
    strict = torch.are_deterministic_algorithms_enabled()
    torch.set_num_threads(1)
    torch.use_deterministic_algorithms(True)
    try:
        yield
    finally:
        torch.use_deterministic_algorithms(strict)
        torch.set_num_threads(threads)


def train_model(
    model: nn.Module,
    x: torch.Tensor,
    y: torch.Tensor,
    *,
    epochs: int = _TRAIN_EPOCHS,
    batch_size: int = 64,
    lr: float = 3e-3,
    seed: int = 0,
) -> nn.Module:
    """Train ``model`` in place with Adam and cross-entropy; return it in eval mode.

    >>> x, y = make_snippets(60, seed=3)
    >>> m = train_model(build_model(), x, y, epochs=1)
    >>> m.training
    False
    """
    if x.dim() != 3 or x.shape[0] != y.shape[0]:
        raise ValueError(f"x must be (n, 1, samples) with one label per row, got x {tuple(x.shape)}, y {tuple(y.shape)}")
    gen = torch.Generator().manual_seed(seed)
    opt = torch.optim.Adam(model.parameters(), lr=lr)
    sched = torch.optim.lr_scheduler.OneCycleLR(
        opt, max_lr=lr, total_steps=epochs * math.ceil(x.shape[0] / batch_size)
    )
    loss_fn = nn.CrossEntropyLoss()
    with deterministic():
        model.train()
        for _ in range(epochs):
            order = torch.randperm(x.shape[0], generator=gen)
            for i in range(0, x.shape[0], batch_size):
                idx = order[i : i + batch_size]
                opt.zero_grad(set_to_none=True)
                loss_fn(model(x[idx]), y[idx]).backward()
                opt.step()
                sched.step()
    return model.eval()


def accuracy(output: torch.Tensor, target: torch.Tensor) -> float:
    """Share of rows whose largest logit is the target class (the demo's metric).

    >>> accuracy(torch.tensor([[2.0, 0.0], [0.0, 1.0]]), torch.tensor([0, 0]))
    0.5
    """
    return float((output.argmax(dim=-1) == target).float().mean())


# ----------------------------------------------------------------------------- bundle
class BearingDemo(NamedTuple):
    """The trained model with its training and held-out data (unpacks as a tuple)."""

    model: nn.Module
    x_train: torch.Tensor
    y_train: torch.Tensor
    x_test: torch.Tensor
    y_test: torch.Tensor


@lru_cache(maxsize=4)
def _data(seed: int) -> tuple[torch.Tensor, ...]:
    x_tr, y_tr = make_snippets(_N_TRAIN, seed=seed)
    x_te, y_te = make_snippets(_N_TEST, seed=seed + 10_000)
    return x_tr, y_tr, x_te, y_te


@lru_cache(maxsize=4)
def _trained_state(seed: int) -> dict[str, torch.Tensor]:
    x_tr, y_tr, _, _ = _data(seed)
    model = train_model(build_model(seed), x_tr, y_tr, seed=seed)
    return {k: v.detach().clone() for k, v in model.state_dict().items()}


@lru_cache(maxsize=1)
def _shipped_state() -> dict[str, torch.Tensor]:
    state, meta = read_arrays(WEIGHTS_FILE)
    if int(meta["seed"]) != SHIPPED_SEED:
        raise RuntimeError(f"{WEIGHTS_FILE} was trained from seed {int(meta['seed'])}, expected {SHIPPED_SEED}")
    return {k: torch.from_numpy(v) for k, v in state.items()}


def save_weights(path: str | Path, seed: int = SHIPPED_SEED) -> dict[str, torch.Tensor]:
    """Train the classifier from ``seed`` on this machine and write its weights to ``path``
    (the format of :data:`WEIGHTS_FILE`); how the shipped file was made."""
    state = _trained_state(int(seed))
    write_arrays(path, {k: v.numpy() for k, v in state.items()},
                 seed=seed, epochs=_TRAIN_EPOCHS, torch=torch.__version__)
    return state


def load_demo(seed: int = SHIPPED_SEED, *, retrain: bool = False) -> BearingDemo:
    """The classifier with its training and held-out data.

    4,000 training and 1,500 held-out snippets, generated from different seeds. For seed 0 the
    weights come from the package (the same on every machine); ``retrain=True``, or another
    ``seed``, trains here (a few seconds; cached per ``seed``). Every call returns a fresh
    model and fresh tensors.

    >>> demo = load_demo()
    >>> accuracy(demo.model(demo.x_test), demo.y_test) > 0.9
    True
    """
    if isinstance(seed, bool) or not isinstance(seed, int):
        raise TypeError(f"seed must be an int, got {seed!r}")
    state = _shipped_state() if seed == SHIPPED_SEED and not check_bool(retrain, "retrain") else _trained_state(seed)
    model = build_model(seed)
    model.load_state_dict(state)
    model.eval()
    x_tr, y_tr, x_te, y_te = (t.clone() for t in _data(seed))
    return BearingDemo(model, x_tr, y_tr, x_te, y_te)


# ----------------------------------------------------------------------------- summary
def demo_figures(seed: int = 0) -> dict:
    """The demo's headline numbers (the README's): fold BatchNorm, scan on 256 training snippets,
    plan for the board's budget, check on the held-out snippets; computed deterministically."""
    from .model.folding import fold_batchnorm
    from .planning.evaluate import evaluate_plan
    from .planning.scanning import scan
    from .planning.solver import plan_budget

    demo = load_demo(seed)
    # the board runs each convolution with its BatchNorm folded in: scan and plan that model
    model = fold_batchnorm(demo.model)
    with deterministic(), torch.no_grad():
        table = scan(model, demo.x_train[:256], progress=False)
        plan = plan_budget(table, model_kib=BOARD_WEIGHT_BUDGET_KIB)
        report = evaluate_plan(model, demo.x_test, plan, metric=accuracy, target=demo.y_test)
    n_weights = sum(p.numel() for n, p in model.named_parameters() if p.dim() > 1)
    return {
        "model": model, "table": table, "plan": plan, "report": report, "n_weights": n_weights,
        "n_test": len(demo.y_test), "float_accuracy": report.metric_float,
        "planned_accuracy": report.metric_planned, "bits": dict(plan.bits),
        "mean_bits": report.mean_bits, "planned_kib": report.planned_kib,
        "smaller": report.float_planned_kib / report.planned_kib,
    }


def readme_paragraph(figures: dict | None = None) -> str:
    """The README's sentence on the plan, from :func:`demo_figures` (so it cannot drift)."""
    f = demo_figures() if figures is None else figures
    bits = f["bits"]
    spread = ", ".join(f"{name} {b}" for name, b in bits.items())
    return (f"With BatchNorm folded into the convolutions, at {BOARD_WEIGHT_BUDGET_KIB:g} KiB for the "
            f"whole model (codes, scales and zero points, and the biases that stay in float32) "
            f"the planner gives the layers {min(bits.values())} to "
            f"{max(bits.values())} bits ({spread}; {f['mean_bits']:.2f} stored bits per weight, scales included), "
            f"{f['smaller']:.1f} times smaller than the planned weights in float32, and held-out "
            f"accuracy goes from "
            f"{f['float_accuracy']:.1%} in float to {f['planned_accuracy']:.1%} "
            f"(`python -m qwidgets.demo --readme` prints this sentence).")


def main(argv: list[str] | None = None) -> None:
    """``python -m qwidgets.demo``: the headless quantization summary; ``--readme``: the
    README's sentence on the plan."""
    args = [] if argv is None else list(argv)
    if args == ["--readme"]:
        print(readme_paragraph())
    elif args in ([], ["--summary"]):
        print(_summary())
    else:
        raise SystemExit("usage: python -m qwidgets.demo [--summary | --readme]")


def _summary() -> str:
    f = demo_figures()
    table, plan, report = f["table"], f["plan"], f["report"]
    n_weights = f["n_weights"]
    lines = [
        "qwidgets demo: bearing-wear classifier for a conveyor motor's sensor board",
        f"  {n_weights} weights ({n_weights * 4 / 1024:.1f} KiB in float32); "
        f"held-out accuracy in float: {f['float_accuracy']:.2%} on {f['n_test']} snippets",
        "",
        "Model-output SQNR (dB) with one layer's weights quantized (BatchNorm folded; per-channel, MSE range):",
    ]
    head = "  layer " + "".join(f"{b:>7d}b" for b in table.bits)
    lines.append(head)
    for name in table.layers:
        row = "".join(f"{table.sqnr_db(name, b):8.1f}" for b in table.bits)
        lines.append(f"  {name:>5s} {row}")
    bits = ", ".join(f"{k}:{v}" for k, v in plan.bits.items())
    lines += [
        "",
        f"Plan for the board's {BOARD_WEIGHT_BUDGET_KIB:g} KiB weight budget "
        f"(bits per layer: {bits}), checked on the held-out snippets:",
    ]
    lines += ["  " + line for line in str(report).splitlines()]
    lines.insert(-1, f"  held-out accuracy: float {report.metric_float:.2%}, planned {report.metric_planned:.2%}")
    return "\n".join(lines)


if __name__ == "__main__":
    main(sys.argv[1:])
