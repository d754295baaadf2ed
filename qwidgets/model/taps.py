"""Taps on values that hooks cannot reach: attention's operands and weights used through
functional products.

A pass with taps runs the model under a ``torch.overrides.TorchFunctionMode`` and with a
forward pre-hook and an (always called) forward hook on every module, which keep the stack of
modules whose forward is running. The mode sees, and can replace the operands of:

- ``F.multi_head_attention_forward`` called by an ``nn.MultiheadAttention`` at path ``<mha>``:
  written out by :func:`~qwidgets.model.attention.attention_forward` (when the handler asks for
  it) with the projected query / key / value, the probabilities and the context tapped as
  ``<mha>.query``, ``<mha>.key``, ``<mha>.value``, ``<mha>.probs`` and ``<mha>.out_proj``;
- ``F.scaled_dot_product_attention`` called in the forward of ``<module>``: its query / key /
  value tapped as ``<module>.sdpa.query`` ... (``sdpa_2``, ``sdpa_3`` ... for the later calls of
  one run of that forward, by call order);
- products whose weight operand is a parameter, or a view of the whole parameter (``W.t()``):
  ``F.linear``, ``torch.matmul`` / ``@``, ``torch.mm``, ``torch.bmm``, ``torch.addmm`` and the
  convolutions; the other operand is tapped under the entry name the handler gives the
  parameter.

PyTorch's attention fast path (a fused kernel in eval mode that bypasses all of the above) is
switched off for the pass and the user's setting restored after. Nothing of the model is
changed; the hooks are removed when the pass ends, also when it raises.
"""

from __future__ import annotations

import contextlib
import math

import torch
import torch.nn.functional as F
from torch import nn
from torch.overrides import TorchFunctionMode

from .attention import ROLES, attention_forward, product_macs
from .fastpath import attention_fastpath_off, restore_fastpath, switch_fastpath_off

T = torch.Tensor

# func -> candidate (operand index, weight index, weight's output axis: "rows", "last" or an int)
_MATMUL = ((0, 1, "last"), (1, 0, "rows"))
_PRODUCTS = {
    F.linear: ((0, 1, 0),),
    torch.matmul: _MATMUL, T.matmul: _MATMUL, T.__matmul__: _MATMUL,
    T.__rmatmul__: ((1, 0, "last"), (0, 1, "rows")),
    torch.mm: _MATMUL, T.mm: _MATMUL, torch.bmm: _MATMUL, T.bmm: _MATMUL,
    torch.addmm: ((1, 2, "last"), (2, 1, "rows")), T.addmm: ((1, 2, "last"), (2, 1, "rows")),
    F.conv1d: ((0, 1, 0),), F.conv2d: ((0, 1, 0),), F.conv3d: ((0, 1, 0),),
    F.conv_transpose1d: ((0, 1, 1),), F.conv_transpose2d: ((0, 1, 1),),
    F.conv_transpose3d: ((0, 1, 1),),
}
_CONVS = {F.conv1d, F.conv2d, F.conv3d, F.conv_transpose1d, F.conv_transpose2d, F.conv_transpose3d}


_ADDS = {torch.add, T.add, T.__add__, T.__iadd__, T.__radd__}


def _residual(args) -> bool:
    return (len(args) >= 2 and all(isinstance(a, torch.Tensor) and not isinstance(a, nn.Parameter)
                                   and a.is_floating_point() and a.dim() >= 2 for a in args[:2])
            and args[0].shape == args[1].shape)


def _meta(v):
    return v.to("meta") if isinstance(v, torch.Tensor) else v


def _op_name(func) -> str:
    names = {F.linear: "linear", T.__matmul__: "matmul", T.__rmatmul__: "matmul"}
    return names.get(func, getattr(func, "__name__", "product"))


class Tap:
    """What a pass does at the tapped places; the defaults observe nothing and change nothing.

    ``attention(path)``: whether to write out the attention of the ``nn.MultiheadAttention`` at
    ``path``; ``keep_output``: return the module's own result anyway (taps only observe);
    ``activation(name, t)``: a tapped activation, returns what the computation goes on with;
    ``operand(name, x, w, param, recompute, axis)``: the other operand ``x`` of a product whose
    weight operand ``w`` is (a view of) the parameter ``param`` of entry ``name``;
    ``recompute(x, w)`` is the product on other operands (``recompute.macs(x, w)`` its
    multiply-accumulates); ``axis``: the parameter's axis holding the product's output channels
    (None for a view that is not a permutation of its axes); returns the operand to use; ``product(a, b, macs)``: the
    two tapped operands of one of attention's products (``b`` or ``a`` None where that operand
    is not tapped, like sdpa's probabilities) and its multiply-accumulates.
    """

    keep_output = False

    def attention(self, path: str) -> bool:
        return False

    def activation(self, name: str, t: torch.Tensor) -> torch.Tensor:
        return t

    def operand(self, name: str, x, w, param, recompute, axis):
        return x

    def product(self, a: str | None, b: str | None, macs: int) -> None:
        return None

    def parameters(self, named: dict) -> dict:
        """``{id(tensor): entry name}`` of the parameters whose products are tapped, from the
        model's parameters as the pass sees them (``named``: qualified name -> tensor)."""
        return {}


def sdpa_name(path: str, k: int, role: str) -> str:
    """``<path>.sdpa.<role>`` for the first call in a forward, ``<path>.sdpa_<k>.<role>`` after."""
    level = "sdpa" if k == 1 else f"sdpa_{k}"
    return f"{path}.{level}.{role}" if path else f"{level}.{role}"


class _Mode(TorchFunctionMode):
    def __init__(self, model: nn.Module, tap: Tap):
        super().__init__()
        self.model, self.tap = model, tap
        self.names: dict[int, str] = {}
        self.stack: list[list] = []  # [module, path, sdpa calls so far] of each running forward
        self.weights: dict[int, str] = {}
        self.on_add = None  # called on each addition of two activations of one shape

    # ------------------------------------------------------------------ module stack
    def push(self, module, args, kwargs):
        if module is self.model:  # the parameters as this pass sees them (functional_call)
            self.names = {id(m): n for n, m in reversed(list(self.model.named_modules()))}
            self.weights = self.tap.parameters(dict(self.model.named_parameters(remove_duplicate=False)))
            self.stack.clear()
        self.stack.append([module, self.names.get(id(module), ""), 0])

    def pop(self, module, args, kwargs, output):
        if self.stack and self.stack[-1][0] is module:
            self.stack.pop()

    # ------------------------------------------------------------------ dispatch
    def __torch_function__(self, func, types, args=(), kwargs=None):
        kwargs = kwargs or {}
        if func is F.multi_head_attention_forward and self.stack \
                and isinstance(self.stack[-1][0], nn.MultiheadAttention):
            return self._attention(func, args, kwargs)
        if func is F.scaled_dot_product_attention:
            return self._sdpa(func, args, kwargs)
        roles = _PRODUCTS.get(func)
        if roles is not None and self.weights:
            return self._product(func, roles, args, kwargs)
        if self.on_add is not None and func in _ADDS and _residual(args):
            self.on_add()
        return func(*args, **kwargs)

    def _attention(self, func, args, kwargs):
        path = self.stack[-1][1]
        if not self.tap.attention(path):
            return func(*args, **kwargs)
        shapes = {}
        prefix = f"{path}." if path else ""

        def tap(role, t):
            shapes[role] = tuple(t.shape)
            return self.tap.activation(prefix + ("out_proj" if role == "context" else role), t)

        out = attention_forward(args, kwargs, tap)
        macs = product_macs(shapes["query"], shapes["key"])
        self.tap.product(prefix + "query", prefix + "key", macs)
        self.tap.product(prefix + "probs", prefix + "value", macs)
        return func(*args, **kwargs) if self.tap.keep_output else out

    def _sdpa(self, func, args, kwargs):
        frame = self.stack[-1] if self.stack else [None, "", 0]
        frame[2] += 1
        args = list(args)
        for i, role in enumerate(ROLES[:3]):
            if i < len(args):
                args[i] = self.tap.activation(sdpa_name(frame[1], frame[2], role), args[i])
            elif role in kwargs:
                kwargs[role] = self.tap.activation(sdpa_name(frame[1], frame[2], role), kwargs[role])
        q = args[0] if args else kwargs["query"]
        k = args[1] if len(args) > 1 else kwargs["key"]
        v = args[2] if len(args) > 2 else kwargs["value"]
        lead = math.prod(q.shape[:-2])
        qk = lead * q.shape[-2] * k.shape[-2] * q.shape[-1]
        self.tap.product(sdpa_name(frame[1], frame[2], "query"), sdpa_name(frame[1], frame[2], "key"), qk)
        self.tap.product(None, sdpa_name(frame[1], frame[2], "value"), lead * q.shape[-2] * k.shape[-2]
                         * v.shape[-1])
        return func(*args, **kwargs)

    def _product(self, func, roles, args, kwargs):
        for xi, wi, axis in roles:
            if max(xi, wi) >= len(args):
                continue
            w = args[wi]
            name = self.weights.get(id(w))
            base = getattr(w, "_base", None) if isinstance(w, torch.Tensor) else None
            if name is None and base is not None and base.numel() == w.numel():
                name = self.weights.get(id(base))
            if name is None:
                continue
            param = w if id(w) in self.weights else base

            def recompute(x2, w2, xi=xi, wi=wi):
                a = list(args)
                a[xi], a[wi] = x2, w2
                return func(*a, **kwargs)

            recompute.op_name = _op_name(func)
            def macs(x2, w2, xi=xi, wi=wi, rule=axis):  # from shapes alone ("meta" tensors)
                a = [_meta(v) for v in args]
                a[xi], a[wi] = _meta(x2), _meta(w2)
                out = func(*a, **{k: _meta(v) for k, v in kwargs.items()})
                return product_macs_of(func, x2, w2, out, rule)

            recompute.macs = macs
            x = self.tap.operand(name, args[xi], w, param, recompute,
                                 param_axis(param, w, product_axis(axis, w)))
            a = list(args)
            a[xi] = x
            return func(*a, **kwargs)
        return func(*args, **kwargs)


def product_axis(func_roles_axis, w: torch.Tensor) -> int:
    """The output-channel axis of weight operand ``w`` for a role's axis rule."""
    if func_roles_axis == "last":
        return w.dim() - 1
    if func_roles_axis == "rows":
        return w.dim() - 2
    return int(func_roles_axis)


def param_axis(param: torch.Tensor, w: torch.Tensor, axis: int) -> int | None:
    """The axis of ``param`` that is axis ``axis`` of its view ``w`` (None when the view is not a
    permutation of the parameter's axes)."""
    if w is param:
        return axis
    if w.dim() != param.dim() or sorted(zip(w.shape, w.stride(), strict=True)) != sorted(
            zip(param.shape, param.stride(), strict=True)):
        return None
    hits = [j for j in range(param.dim())
            if param.stride(j) == w.stride(axis) and param.shape[j] == w.shape[axis]]
    return hits[0] if len(hits) == 1 else None


def same_view(w: torch.Tensor, param: torch.Tensor, t: torch.Tensor) -> torch.Tensor:
    """``t`` (a tensor shaped like ``param``) viewed the way ``w`` views ``param``."""
    if w is param:
        return t
    t = t.contiguous()
    if not param.is_contiguous():
        raise ValueError("a weight used through a view must be a contiguous parameter")
    return t.as_strided(w.size(), w.stride(), t.storage_offset() + w.storage_offset()
                        - param.storage_offset())


def product_macs_of(func, x: torch.Tensor, w: torch.Tensor, out: torch.Tensor, axis_rule) -> int:
    """Multiply-accumulates of one product call (its output values times the contracted size)."""
    if func in _CONVS:
        if func in (F.conv_transpose1d, F.conv_transpose2d, F.conv_transpose3d):
            return x.numel() * w[0].numel()
        return out.numel() * w[0].numel()
    if func is F.linear:
        return out.numel() * w.shape[-1]
    inner = w.shape[-2] if axis_rule == "last" else w.shape[-1]
    return out.numel() * int(inner)


def roles_of(func):
    return _PRODUCTS.get(func)


@contextlib.contextmanager
def tapping(model: nn.Module, tap: Tap):
    """Run the block's forwards of ``model`` with ``tap`` (hooks removed and the fast-path
    setting restored after, also on an error)."""
    mode = _Mode(model, tap)
    handles = []
    try:
        for m in model.modules():
            handles.append(m.register_forward_pre_hook(mode.push, with_kwargs=True, prepend=True))
            handles.append(m.register_forward_hook(mode.pop, with_kwargs=True, always_call=True))
        with attention_fastpath_off(), mode:
            yield mode
    finally:
        for h in handles:
            h.remove()


def attach(model: nn.Module, tap: Tap) -> None:
    """Keep ``tap`` on ``model`` for good (a planned copy of the tool's own): every forward of
    the model runs with it, the fast path off during the forward. The hooks are bound methods,
    so a deep copy of the model carries taps of its own."""
    keeper = _Attached(_Mode(model, tap))
    for m in model.modules():
        if m is model:
            continue
        m.register_forward_pre_hook(keeper.mode.push, with_kwargs=True, prepend=True)
        m.register_forward_hook(keeper.mode.pop, with_kwargs=True, always_call=True)
    model.register_forward_pre_hook(keeper.enter, with_kwargs=True, prepend=True)
    model.register_forward_hook(keeper.leave, with_kwargs=True, always_call=True)


class _Attached:
    def __init__(self, mode: _Mode):
        self.mode, self.saved = mode, []

    def enter(self, module, args, kwargs):
        self.saved.append(switch_fastpath_off())
        self.mode.__enter__()
        self.mode.push(module, args, kwargs)

    def leave(self, module, args, kwargs, output):
        self.mode.pop(module, args, kwargs, output)
        self.mode.__exit__(None, None, None)
        restore_fastpath(self.saved.pop())
