"""refine_plan: every planned grid learned together on the model's output (relaxed quantization)."""

from __future__ import annotations

import copy
import math

import pytest
import torch
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from naive_loops import naive_sqnr_db
from torch import nn

from qwidgets import (
    LayerSetting,
    Plan,
    RefineResult,
    UniformGrid,
    evaluate_plan,
    quantize,
    refine_plan,
)
from qwidgets.learn.whole_plan import PlanGrids
from qwidgets.planning.plan import model_fingerprint
from tests.stored_bits import mean_bits_for

# Max (1960), optimum uniform quantizer for a unit Gaussian (GUIDE.md): N levels -> (step, MSE)
MAX_TABLE = {4: (0.9957, 0.1188), 8: (0.5860, 0.03744)}


def make_plan(model: nn.Module, settings: dict) -> Plan:
    modules = dict(model.named_modules())
    shapes = {n: tuple(modules[n].weight.shape) for n in settings}
    bits = {n: (s.weight or s.input).bits for n, s in settings.items()}
    return Plan(settings, bits, fingerprint=model_fingerprint(model), weight_shapes=shapes,
                macs={n: 1 for n in settings})


def snapshot(model: nn.Module):
    return ({k: v.detach().clone() for k, v in model.state_dict().items()},
            [m.training for m in model.modules()],
            [(dict(m._forward_hooks), dict(m._forward_pre_hooks)) for m in model.modules()],
            [p.requires_grad for p in model.parameters()])


def assert_untouched(model: nn.Module, snap) -> None:
    state, flags, hooks, req = snap
    for k, v in model.state_dict().items():
        assert torch.equal(v, state[k]), k
    assert [m.training for m in model.modules()] == flags
    assert [(dict(m._forward_hooks), dict(m._forward_pre_hooks)) for m in model.modules()] == hooks
    assert [p.requires_grad for p in model.parameters()] == req
    assert all(p.grad is None for p in model.parameters())


# ---------------------------------------------------------------------------- known optimum
def _gaussian_case(source: str, bits: int, start_step: float, n: int = 32):
    """One Linear layer whose output error has exactly the quantized tensor's squared error.

    input: x ~ N(0, 1), W orthogonal, so ||(Q(x) - x) W^T|| = ||Q(x) - x|| per sample;
    weight: W ~ N(0, 1), the inputs the rows of an orthogonal matrix, so the output error's
    squared norm is that of Q(W) - W. Either way the output-MSE-optimal step is the tensor's own,
    which for a unit Gaussian is Max's (1960) optimum uniform step.
    """
    gen = torch.Generator().manual_seed(0)
    q, _ = torch.linalg.qr(torch.randn(n, n, generator=gen))
    lin = nn.Linear(n, n, bias=False)
    start = UniformGrid(bits, start_step, offset=start_step / 2)  # mid-rise, no zero point
    with torch.no_grad():
        if source == "input":
            lin.weight.copy_(q)
            x = torch.randn(4096, n, generator=gen)
            setting = LayerSetting(input=start)
        else:
            lin.weight.copy_(torch.randn(n, n, generator=gen))
            x = q.T.contiguous()
            setting = LayerSetting(weight=start)
    return lin, x, make_plan(lin, {"": setting})


@pytest.mark.parametrize("source,bits,start_step,batch", [
    ("input", 2, 2.0, 64),   # twice Max's step
    ("input", 3, 0.2, 64),   # a third of it
    ("input", 3, 1.5, 64),
])
def test_reaches_max_optimum_step_from_a_poor_grid(source, bits, start_step, batch):
    """Max (1960): the optimum uniform step for a unit Gaussian, N = 4: 0.9957, N = 8: 0.5860."""
    lin, x, plan = _gaussian_case(source, bits, start_step)
    r = refine_plan(lin, x, plan, steps=200, progress=False, batch_size=batch)
    grid = getattr(r.plan.layers[""], source)
    step, mse = MAX_TABLE[2 ** bits]
    assert abs(float(grid.scale) / step - 1) < 0.03, grid
    # the returned grid's error on these 131,072 samples is within 3 % of Max's minimum
    assert float((quantize(x, grid) - x).square().mean()) < mse * 1.03
    assert r.sqnr_db > r.start_sqnr_db + 2.0


def test_reaches_max_optimum_for_gaussian_weights():
    """Max (1960), N = 4: step 0.9957 for unit-Gaussian weights (16,384 of them)."""
    lin, x, plan = _gaussian_case("weight", 2, 2.0, n=128)
    r = refine_plan(lin, x, plan, steps=200, progress=False, batch_size=64)
    grid = r.plan.layers[""].weight
    w = lin.weight.detach()
    assert abs(float(grid.scale) / 0.9957 - 1) < 0.03, grid
    assert float((quantize(w, grid) - w).square().mean()) < 0.1188 * 1.03


# ---------------------------------------------------------------------------- gradients
def test_relaxed_loss_gradient_matches_finite_differences():
    """torch.autograd.gradcheck (central differences, float64) of the relaxed loss with respect
    to every entry's log-scale a = log(scale / scale0) and offset shift b = (offset - offset0) /
    scale0, through a two-layer model with weight and input grids (fixed Gumbel samples)."""
    torch.manual_seed(1)
    net = nn.Sequential(nn.Linear(6, 5), nn.Tanh(), nn.Linear(5, 3)).double()
    x = torch.randn(8, 6, dtype=torch.float64)
    w0 = net[0].weight.detach()
    settings_ = {
        "0": LayerSetting(weight=UniformGrid(3, torch.full((5,), 0.11, dtype=torch.float64),
                                             offset=torch.full((5,), 0.03, dtype=torch.float64), axis=0)),
        "2": LayerSetting(weight=UniformGrid(2, 0.21, offset=0.1), input=UniformGrid(3, 0.23, offset=0.07)),
    }
    pg = PlanGrids(net, settings_)
    entries = pg.entries
    assert [e.a.dtype for e in entries] == [torch.float64] * 3
    with torch.no_grad():
        ref = net(x)

    def loss(*ab):
        for e, a, b in zip(entries, ab[0::2], ab[1::2], strict=True):
            e.a, e.b = a, b
        gen = torch.Generator().manual_seed(7)  # the same Gumbel samples at every evaluation
        out = pg.relaxed(x, temperature=0.7, noise_factor=1.0, generator=gen)
        return (out - ref).square().mean()

    inputs = []
    for e in entries:
        inputs += [(torch.randn_like(e.a) * 0.1).requires_grad_(True),
                   (torch.randn_like(e.b) * 0.1).requires_grad_(True)]
    assert torch.autograd.gradcheck(loss, tuple(inputs), eps=1e-6, atol=1e-6, rtol=1e-4)
    assert torch.equal(net[0].weight.detach(), w0)


# ---------------------------------------------------------------------------- families vs naive loop
class ConvNet(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv1 = nn.Conv2d(2, 6, 3, padding=1)
        self.bn1 = nn.BatchNorm2d(6)
        self.conv2 = nn.Conv1d(6, 4, 3, padding=1, bias=False)
        self.fc = nn.Linear(4 * 5, 3)

    def forward(self, x):
        h = torch.relu(self.bn1(self.conv1(x)))  # (B, 6, 5, 5)
        h = h.mean(dim=2)  # (B, 6, 5)
        h = torch.relu(self.conv2(h))
        return self.fc(h.flatten(1))


def _trained_bn(model):
    with torch.no_grad():
        for m in model.modules():
            if isinstance(m, nn.BatchNorm2d):
                m.running_mean.uniform_(-0.2, 0.2)
                m.running_var.uniform_(0.5, 1.5)
    return model


def _conv_case():
    torch.manual_seed(0)
    model = _trained_bn(ConvNet())
    x = torch.randn(96, 2, 5, 5)
    w = {n: m.weight.detach() for n, m in model.named_modules() if hasattr(m, "weight") and n != "bn1"}
    settings_ = {
        "conv1": LayerSetting(weight=UniformGrid(3, w["conv1"].abs().amax(dim=(1, 2, 3)) / 3, axis=0),
                              input=UniformGrid(4, 0.4)),
        "conv2": LayerSetting(weight=UniformGrid(2, float(w["conv2"].abs().max()) / 2),
                              input=UniformGrid(3, 0.3, signed=False)),
        "fc": LayerSetting(weight=UniformGrid(3, float(w["fc"].abs().max()) / 4, offset=0.01)),
    }
    return model, x, make_plan(model, settings_)


def _mlp_case():
    torch.manual_seed(2)
    model = nn.Sequential(nn.Linear(10, 24), nn.ReLU(), nn.Linear(24, 24), nn.ReLU(), nn.Linear(24, 4))
    x = torch.randn(128, 10)
    settings_ = {n: LayerSetting(weight=UniformGrid(2, float(m.weight.detach().abs().max()) / 2),
                                 input=UniformGrid(3, 0.5, signed=n == "0"))
                 for n, m in model.named_modules() if isinstance(m, nn.Linear)}
    return model, x, make_plan(model, settings_)


@pytest.mark.parametrize("case", [_conv_case, _mlp_case], ids=["conv-bn", "mlp"])
def test_refined_plan_measured_like_a_naive_loop(case):
    """Reference: a naive loop written in this test (deep copy, overwrite weights, input
    pre-hooks, full forward). The reported SQNRs are that loop's on the start and the result,
    the result is never worse, and evaluate_plan measures the same figure."""
    model, x, plan = case()
    model.train()  # a user's model left in training mode: refining must not touch BatchNorm
    snap = snapshot(model)
    r = refine_plan(model, x, plan, steps=30, progress=False, batch_size=32, seed=3)
    assert_untouched(model, snap)
    assert isinstance(r, RefineResult)
    assert r.start_sqnr_db == pytest.approx(naive_sqnr_db(model, x, plan), abs=1e-6)
    assert r.sqnr_db == pytest.approx(naive_sqnr_db(model, x, r.plan), abs=1e-6)
    assert r.sqnr_db >= r.start_sqnr_db and r.sqnr_db > r.start_sqnr_db + 0.5
    assert r.history[0] == {"step": 0, "loss": None, "hard_sqnr_db": r.start_sqnr_db}
    assert max(h["hard_sqnr_db"] for h in r.history) == r.sqnr_db
    assert next(h for h in r.history if h["step"] == r.best_step)["hard_sqnr_db"] == r.sqnr_db
    assert evaluate_plan(model, x, r.plan).measured_sqnr_db == pytest.approx(r.sqnr_db, abs=1e-6)
    assert_untouched(model, snap)


def test_grids_keep_widths_signs_axes_and_integer_zero_points():
    model, x, plan = _conv_case()
    r = refine_plan(model, x, plan, steps=20, progress=False)
    assert r.best_step > 0 and r.plan.bits == plan.bits
    assert r.plan.predicted_sqnr_db is None
    for name, s in plan.layers.items():
        new = r.plan.layers[name]
        for src in ("weight", "input"):
            a, b = getattr(s, src), getattr(new, src)
            assert (a is None) == (b is None)
            if a is None:
                continue
            assert (b.bits, b.signed, b.axis) == (a.bits, a.signed, a.axis)
            assert b.has_zero_point() or not a.has_zero_point(), (name, src, b)
            assert not b.scale_tensor().requires_grad
    # the start's fc grid had no zero point (offset 0.01): its learned offset stays free
    assert not r.plan.layers["fc"].weight.has_zero_point()
    Plan.from_json(r.plan.to_json())  # a valid plan, round trip


def test_learn_and_sources_limit_what_changes():
    model, x, plan = _conv_case()
    r = refine_plan(model, x, plan, steps=20, progress=False, learn=("scale",), sources=("weight",))
    assert r.best_step > 0
    for name, s in plan.layers.items():
        new = r.plan.layers[name]
        if s.input is not None:  # not learned: unchanged
            assert torch.equal(new.input.scale_tensor(), s.input.scale_tensor())
        # offsets not learned: zero points and free offsets kept
        if s.weight.has_zero_point():
            assert torch.equal(torch.as_tensor(new.weight.zero_point), torch.as_tensor(s.weight.zero_point))
        else:
            assert torch.allclose(new.weight.offset_tensor(), s.weight.offset_tensor())
    assert any(not torch.equal(r.plan.layers[n].weight.scale_tensor(), plan.layers[n].weight.scale_tensor())
               for n in plan.layers)


# ---------------------------------------------------------------------------- invariants
@settings(max_examples=8, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 10_000), bits=st.integers(1, 4), lr=st.sampled_from([0.01, 0.3, 3.0]),
       steps=st.integers(0, 12))
def test_never_worse_than_the_start(seed, bits, lr, steps):
    """Invariant: the returned plan's hard SQNR on the data is >= the start's (even with a
    learning rate far too large), and it is the naive loop's figure for the returned plan."""
    torch.manual_seed(seed)
    model = nn.Sequential(nn.Linear(5, 7), nn.ReLU(), nn.Linear(7, 2))
    x = torch.randn(40, 5)
    w = model[0].weight.detach()
    plan = make_plan(model, {"0": LayerSetting(weight=UniformGrid(bits, float(w.abs().max()) / 2 ** (bits - 1))),
                             "2": LayerSetting(input=UniformGrid(bits + 1, 0.2, signed=False))})
    r = refine_plan(model, x, plan, steps=steps, lr=lr, progress=False, batch_size=16, seed=seed)
    # both figures from the naive loop (reference); the two measurements agree within 1e-6 dB
    # (float32 forwards of the same values, summed in float64)
    start, result = naive_sqnr_db(model, x, plan), naive_sqnr_db(model, x, r.plan)
    assert r.start_sqnr_db == pytest.approx(start, abs=1e-6)
    assert r.sqnr_db == pytest.approx(result, abs=1e-6)
    assert result >= start - 1e-6
    assert r.steps_run == steps and r.history[-1]["step"] == steps


def test_repeatable_with_a_seed():
    model, x, plan = _mlp_case()
    a = refine_plan(model, x, plan, steps=10, progress=False, seed=5)
    b = refine_plan(model, x, plan, steps=10, progress=False, seed=5)
    assert a.history == b.history and a.best_step == b.best_step


# ---------------------------------------------------------------------------- callback, loss, data
def test_callback_sees_progress_and_stops_the_run():
    model, x, plan = _mlp_case()
    seen = []

    def cb(step, so_far):
        seen.append((step, so_far))
        return len(seen) == 2 or None  # stop at the second measurement

    r = refine_plan(model, x, plan, steps=100, progress=False, callback=cb)
    assert [s for s, _ in seen] == [5, 10]  # 100 steps: measured every 5
    assert r.stopped and r.steps_run == 10 and len(r.history) == 3
    assert all(isinstance(res, RefineResult) and isinstance(res.plan, Plan) for _, res in seen)
    assert seen[-1][1].sqnr_db == r.sqnr_db


def test_user_loss_with_targets():
    model, x, plan = _mlp_case()
    y = model(x).argmax(dim=1).detach()
    r = refine_plan(model, x, plan, steps=20, progress=False, loss=nn.functional.cross_entropy, target=y)
    assert naive_sqnr_db(model, x, r.plan) >= naive_sqnr_db(model, x, plan) - 1e-6  # reference loop
    assert len(r.history) == 21
    assert all(h["loss"] > 0 for h in r.history[1:])


def test_tuple_and_dict_data():
    class TwoInputs(nn.Module):
        def __init__(self):
            super().__init__()
            self.a, self.b = nn.Linear(4, 3), nn.Linear(2, 3)

        def forward(self, u, v, scale=1.0):
            return self.a(u) * scale + self.b(v)

    torch.manual_seed(0)
    model = TwoInputs()
    u, v = torch.randn(50, 4), torch.randn(50, 2)
    plan = make_plan(model, {"a": LayerSetting(weight=UniformGrid(2, 0.3)),
                             "b": LayerSetting(weight=UniformGrid(2, 0.3))})
    r1 = refine_plan(model, (u, v), plan, steps=10, progress=False)
    r2 = refine_plan(model, {"u": u, "v": v, "scale": torch.tensor(1.0)}, plan, steps=10, progress=False)
    assert r1.history == r2.history
    assert naive_sqnr_db(model, (u, v), r1.plan) > naive_sqnr_db(model, (u, v), plan)  # reference loop


def test_bad_input_errors():
    model, x, plan = _mlp_case()
    with pytest.raises(TypeError, match="plan must be a Plan"):
        refine_plan(model, x, plan.to_dict())
    with pytest.raises(TypeError, match="model must be"):
        refine_plan("model", x, plan)
    with pytest.raises(ValueError, match="steps must be >= 0"):
        refine_plan(model, x, plan, steps=-1)
    with pytest.raises(TypeError, match="steps must be an int"):
        refine_plan(model, x, plan, steps=2.5)
    with pytest.raises(ValueError, match="lr must be > 0"):
        refine_plan(model, x, plan, lr=0.0)
    with pytest.raises(ValueError, match="batch_size must be >= 1"):
        refine_plan(model, x, plan, batch_size=0)
    with pytest.raises(ValueError, match="learn holds \\['bias'\\]"):
        refine_plan(model, x, plan, learn=("scale", "bias"))
    with pytest.raises(ValueError, match="sources holds"):
        refine_plan(model, x, plan, sources=("output",))
    with pytest.raises(TypeError, match="callback must be callable"):
        refine_plan(model, x, plan, callback=3)
    with pytest.raises(ValueError, match="target is given but loss is None"):
        refine_plan(model, x, plan, target=torch.zeros(128))
    with pytest.raises(ValueError, match="target must hold tensors with one row per sample"):
        refine_plan(model, x, plan, loss=nn.functional.cross_entropy, target=torch.zeros(3, dtype=torch.long))
    with pytest.raises(TypeError, match="loss\\(output, target\\) must return"):
        refine_plan(model, x, plan, steps=1, progress=False, loss=lambda o, t: 1.0)
    with pytest.raises(ValueError, match="output tensors must have one row per sample \\(128\\)"):
        flat = nn.Sequential(model, nn.Flatten(0))  # the output has no sample dimension
        refine_plan(flat, x, make_plan(flat, {f"0.{n}": s for n, s in plan.layers.items()}))
    other = nn.Sequential(nn.Linear(10, 24), nn.ReLU(), nn.Linear(24, 5))
    with pytest.raises(ValueError, match="made for another model"):
        refine_plan(other, x, plan)


# ---------------------------------------------------------------------------- other entry kinds
class TinyTagger(nn.Module):
    """Embedding -> LSTM -> attention -> Linear head tied to the embedding."""

    def __init__(self):
        super().__init__()
        self.emb = nn.Embedding(20, 8)
        self.rnn = nn.LSTM(8, 8, batch_first=True)
        self.attn = nn.MultiheadAttention(8, 2, batch_first=True)
        self.head = nn.Linear(8, 20, bias=False)
        self.head.weight = self.emb.weight  # tied

    def forward(self, tokens):
        h, _ = self.rnn(self.emb(tokens))
        a, _ = self.attn(h, h, h, need_weights=False)
        return self.head(a + h)


def test_embedding_recurrent_attention_and_tied_entries():
    """Reference: a naive loop written here (deep copy, overwrite each planned parameter by name
    with its quantized values, full forward); tied weights are quantized everywhere they are used."""
    from qwidgets import plan_budget, scan
    from qwidgets.model.entries import find_entries

    torch.manual_seed(0)
    model = TinyTagger().eval()
    tokens = torch.randint(0, 20, (48, 6))
    table = scan(model, tokens, bits=(2, 3), progress=False)
    plan = plan_budget(table, mean_bits=mean_bits_for(table, 2.5))
    params = {e.name: e.param for e in find_entries(model)}
    assert {"emb", "rnn.weight_ih_l0", "attn.in_proj", "attn.out_proj"} <= set(plan.layers)
    snap = snapshot(model)
    r = refine_plan(model, tokens, plan, steps=80, progress=False, batch_size=16)
    assert_untouched(model, snap)

    def naive(p: Plan) -> float:
        q = copy.deepcopy(model)
        with torch.no_grad():
            for name, s in p.layers.items():
                w = q.get_parameter(params[name])
                w.copy_(quantize(w, s.weight))
            assert q.head.weight is q.emb.weight
            ref, out = model(tokens).double(), q(tokens).double()
        return 10 * math.log10(float(ref.square().sum()) / float((out - ref).square().sum()))

    assert r.start_sqnr_db == pytest.approx(naive(plan), abs=1e-6)
    assert r.sqnr_db == pytest.approx(naive(r.plan), abs=1e-6)
    assert r.sqnr_db > r.start_sqnr_db
