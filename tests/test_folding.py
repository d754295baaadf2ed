"""fold_batchnorm and foldable_batchnorm.

Outside checks: the folded model's outputs against the original model's own eval-mode outputs
(torch's BatchNorm), and the folded weights against the folding formula written here (GUIDE.md:
w' = w * gamma / sqrt(var + eps), b' = (b - mean) * gamma / sqrt(var + eps) + beta, common
practice), in float64.
"""

from __future__ import annotations

import warnings

import pytest
import torch
from torch import nn

from qwidgets import fold_batchnorm, foldable_batchnorm


def _randomise_bn(model, seed=0):
    g = torch.Generator().manual_seed(seed)
    for m in model.modules():
        if isinstance(m, nn.modules.batchnorm._BatchNorm):
            n = m.num_features
            with torch.no_grad():
                m.running_mean.copy_(torch.randn(n, generator=g))
                m.running_var.copy_(torch.rand(n, generator=g) * 3 + 0.05)
                if m.weight is not None:
                    m.weight.copy_(torch.randn(n, generator=g))
                    m.bias.copy_(torch.randn(n, generator=g))
    return model


def _snapshot(model):
    return ([(k, v.clone()) for k, v in model.state_dict().items()],
            [(m.training, len(m._forward_hooks), len(m._forward_pre_hooks)) for m in model.modules()])


def _same(model, snap):
    state, flags = snap
    now = model.state_dict()
    return (all(torch.equal(now[k], v) for k, v in state) and list(now) == [k for k, _ in state]
            and flags == [(m.training, len(m._forward_hooks), len(m._forward_pre_hooks)) for m in model.modules()])


def _formula(layer, bn):
    """The folding formula, float64, written here."""
    w = layer.weight.detach().double()
    b = layer.bias.detach().double() if layer.bias is not None else torch.zeros(w.shape[0], dtype=torch.float64)
    gamma = bn.weight.detach().double() if bn.weight is not None else torch.ones(w.shape[0], dtype=torch.float64)
    beta = bn.bias.detach().double() if bn.bias is not None else torch.zeros(w.shape[0], dtype=torch.float64)
    f = gamma / torch.sqrt(bn.running_var.double() + bn.eps)
    return w * f.reshape((-1,) + (1,) * (w.dim() - 1)), (b - bn.running_mean.double()) * f + beta


@pytest.mark.parametrize("make, shape", [
    (lambda: nn.Sequential(nn.Conv1d(3, 5, 3), nn.BatchNorm1d(5), nn.ReLU()), (4, 3, 11)),
    (lambda: nn.Sequential(nn.Conv2d(3, 6, 3, bias=False, groups=3), nn.BatchNorm2d(6)), (4, 3, 8, 8)),
    (lambda: nn.Sequential(nn.Conv2d(2, 4, 3), nn.BatchNorm2d(4, affine=False)), (3, 2, 6, 6)),
    (lambda: nn.Sequential(nn.Linear(7, 5), nn.BatchNorm1d(5), nn.Linear(5, 2)), (6, 7)),
    (lambda: nn.Sequential(nn.Conv3d(2, 3, 2), nn.BatchNorm3d(3)), (2, 2, 4, 4, 4)),
])
def test_folding_matches_the_original_and_the_formula(make, shape):
    torch.manual_seed(0)
    net = _randomise_bn(make()).train()  # the user's model is in training mode
    hook = net[0].register_forward_hook(lambda m, a, o: None)
    snap = _snapshot(net)
    x = torch.randn(shape)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        folded = fold_batchnorm(net)
    assert _same(net, snap) and net.training  # user's model untouched
    assert not folded.training and isinstance(folded[1], nn.Identity)
    w, b = _formula(net[0], net[1])
    assert torch.allclose(folded[0].weight.double(), w, rtol=1e-6, atol=1e-7)
    assert torch.allclose(folded[0].bias.double(), b, rtol=1e-6, atol=1e-6)
    net.eval()
    with torch.no_grad():
        assert torch.allclose(folded(x), net(x), rtol=1e-5, atol=1e-5)
    hook.remove()
    assert foldable_batchnorm(net) == {"1": "0"} and foldable_batchnorm(folded) == {}


class _Residual(nn.Module):
    def __init__(self, c=4):
        super().__init__()
        self.conv1, self.bn1 = nn.Conv2d(c, c, 3, padding=1), nn.BatchNorm2d(c)
        self.conv2, self.bn2 = nn.Conv2d(c, c, 3, padding=1, bias=False), nn.BatchNorm2d(c)
        self.head = nn.Sequential(nn.Flatten(), nn.Linear(c * 25, 3))

    def forward(self, x):
        y = torch.relu(self.bn1(self.conv1(x)))
        return self.head(torch.relu(x + self.bn2(self.conv2(y))))


def test_residual_block_is_folded_from_the_traced_graph():
    torch.manual_seed(1)
    net = _randomise_bn(_Residual(), seed=3).eval()
    snap = _snapshot(net)
    x = torch.randn(5, 4, 5, 5)
    assert foldable_batchnorm(net) == {"bn1": "conv1", "bn2": "conv2"}
    folded = fold_batchnorm(net)
    assert isinstance(folded.bn1, nn.Identity) and isinstance(folded.bn2, nn.Identity)
    assert folded.qwidgets_folded == ("bn1", "bn2")
    with torch.no_grad():
        assert torch.allclose(folded(x), net(x), rtol=1e-5, atol=1e-5)
    assert _same(net, snap)


class _Untraceable(nn.Module):
    """Data-dependent control flow: torch.fx cannot trace it."""

    def __init__(self):
        super().__init__()
        self.body = nn.Sequential(nn.Conv2d(3, 4, 3), nn.BatchNorm2d(4), nn.ReLU())
        self.conv, self.bn = nn.Conv2d(4, 4, 1), nn.BatchNorm2d(4)

    def forward(self, x):
        y = self.body(x)
        if float(y.sum()) > 0:
            y = y * 2
        return self.bn(self.conv(y))


def test_untraceable_model_folds_sequential_pairs_and_names_the_rest():
    torch.manual_seed(2)
    net = _randomise_bn(_Untraceable(), seed=4).eval()
    x = torch.randn(3, 3, 6, 6)
    with pytest.warns(UserWarning, match=r"left 1 BatchNorm.*'bn' \(the model does not trace"):
        folded = fold_batchnorm(net)
    assert isinstance(folded.body[1], nn.Identity) and isinstance(folded.bn, nn.BatchNorm2d)
    w, b = _formula(net.body[0], net.body[1])
    assert torch.allclose(folded.body[0].weight.double(), w, rtol=1e-6, atol=1e-7)
    with torch.no_grad():
        assert torch.allclose(folded(x), net(x), rtol=1e-5, atol=1e-5)
    assert foldable_batchnorm(net) == {"body.1": "body.0"}


def test_batchnorm_that_cannot_be_folded_stays_with_a_reason():
    class Branch(nn.Module):
        def __init__(self):
            super().__init__()
            self.conv, self.bn = nn.Conv2d(2, 2, 1), nn.BatchNorm2d(2)
            self.act, self.bn2 = nn.ReLU(), nn.BatchNorm2d(2)

        def forward(self, x):
            y = self.conv(x)
            return self.bn(y) + y + self.bn2(self.act(x))

    net = _randomise_bn(Branch()).eval()
    with pytest.warns(UserWarning) as rec:
        folded = fold_batchnorm(net)
    msg = str(rec[0].message)
    assert "also used elsewhere" in msg and "'bn2' (it follows 'act', a ReLU" in msg
    x = torch.randn(2, 2, 3, 3)
    with torch.no_grad():
        assert torch.equal(folded(x), net(x))
    nostats = nn.Sequential(nn.Linear(3, 3), nn.BatchNorm1d(3, track_running_stats=False))
    with pytest.warns(UserWarning, match="no running statistics"):
        fold_batchnorm(nostats)
    with pytest.raises(TypeError, match="model must be a torch.nn.Module"):
        fold_batchnorm("net")


def _transposed_formula(layer, bn):
    """The folding formula for a transposed convolution, one output channel at a time (a naive
    loop written here): weight (in, out / groups, *k), output channel o = g * out_g + j is
    column j of group g's rows."""
    w = layer.weight.detach().double().clone()
    out_c, groups = layer.out_channels, layer.groups
    in_g, out_g = w.shape[0] // groups, out_c // groups
    b = layer.bias.detach().double() if layer.bias is not None else torch.zeros(out_c, dtype=torch.float64)
    bn = {k: v.detach().double() for k, v in bn.state_dict().items()} | {"eps": bn.eps}
    new_b = torch.empty(out_c, dtype=torch.float64)
    for o in range(out_c):
        g, j = divmod(o, out_g)
        f = float(bn["weight"][o]) / (float(bn["running_var"][o]) + bn["eps"]) ** 0.5
        w[g * in_g:(g + 1) * in_g, j] *= f
        new_b[o] = (float(b[o]) - float(bn["running_mean"][o])) * f + float(bn["bias"][o])
    return w, new_b


@pytest.mark.parametrize("make, shape", [
    (lambda: nn.Sequential(nn.ConvTranspose1d(3, 4, 3), nn.BatchNorm1d(4), nn.ReLU()), (2, 3, 7)),
    (lambda: nn.Sequential(nn.ConvTranspose2d(4, 6, 3, stride=2, groups=2, bias=False),
                           nn.BatchNorm2d(6)), (2, 4, 5, 5)),
    (lambda: nn.Sequential(nn.ConvTranspose3d(2, 3, 2), nn.BatchNorm3d(3)), (2, 2, 3, 3, 3)),
])
def test_batchnorm_after_a_transposed_convolution_is_folded(make, shape):
    torch.manual_seed(5)
    net = _randomise_bn(make()).train()
    snap = _snapshot(net)
    assert foldable_batchnorm(net) == {"1": "0"}
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        folded = fold_batchnorm(net)
    assert _same(net, snap) and isinstance(folded[1], nn.Identity)
    w, b = _transposed_formula(net[0], net[1])
    # float64 folding rounded once to float32: a few float32 ulps of the values
    assert torch.allclose(folded[0].weight.double(), w, rtol=1e-6, atol=1e-7)
    assert torch.allclose(folded[0].bias.double(), b, rtol=1e-6, atol=1e-6)
    net.eval()
    x = torch.randn(shape)
    with torch.no_grad():  # against torch's own BatchNorm in eval mode
        assert torch.allclose(folded(x), net(x), rtol=1e-5, atol=1e-5)
    assert foldable_batchnorm(folded) == {}


def test_foldable_lists_exactly_what_fold_leaves_and_the_reasons_are_true():
    class Mixed(nn.Module):
        def __init__(self):
            super().__init__()
            self.up, self.bn_up = nn.ConvTranspose2d(2, 2, 2, stride=2), nn.BatchNorm2d(2)
            self.act, self.bn_act = nn.ReLU(), nn.BatchNorm2d(2)
            self.bn_op = nn.BatchNorm2d(2)
            self.conv, self.bn_nostats = nn.Conv2d(2, 2, 1), nn.BatchNorm2d(2)

        def forward(self, x):
            y = self.bn_up(self.up(x))
            y = self.bn_act(self.act(y))
            y = self.bn_op(torch.tanh(y))
            return self.bn_nostats(self.conv(y))

    net = _randomise_bn(Mixed()).eval()
    net.bn_nostats = nn.BatchNorm2d(2, track_running_stats=False)
    bns = {n for n, m in net.named_modules() if isinstance(m, nn.BatchNorm2d)}
    assert foldable_batchnorm(net) == {"bn_up": "up"}  # not bn_nostats: fold_batchnorm leaves it
    with pytest.warns(UserWarning) as rec:
        folded = fold_batchnorm(net)
    msg = str(rec[0].message)
    assert "'bn_act' (it follows 'act', a ReLU" in msg
    assert "'bn_op' (it follows the operation 'tanh'" in msg
    assert "'bn_nostats' (it has no running statistics" in msg
    assert "does not directly follow" not in msg
    left = {n for n, m in folded.named_modules() if isinstance(m, nn.BatchNorm2d)}
    assert left == bns - set(foldable_batchnorm(net)) == {"bn_act", "bn_op", "bn_nostats"}
    assert foldable_batchnorm(folded) == {}
