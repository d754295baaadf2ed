"""Re-running only the part of a model that follows one layer, from values captured once.

The model is traced once with ``torch.fx`` (quantizable layers and the standard ``torch.nn``
modules stay single calls). ``GraphReplay.record`` runs the graph on one batch and keeps the
value of every node; ``GraphReplay.rerun`` then replaces a layer's output and recomputes only
the nodes that depend on it, taking every other value (the skip connections from before the
layer among them) from the record. That is the same arithmetic as a full forward with the
layer's output replaced, at the cost of the part after the layer only.

A model that does not trace (data-dependent control flow, unsupported calls), or whose traced
graph does not reproduce its own output on the first batch, is not replayed: ``trace`` returns
None and callers use full forward passes instead. The user's model is not changed: tracing
reads its code and modules, the replay calls the same module objects under ``no_grad`` with
every training flag set to eval and restored after.
"""

from __future__ import annotations

import contextlib
import operator
import threading
from collections.abc import Callable, Mapping

import torch
from torch import fx, nn

from .layers import is_quantizable

# symbolic tracing patches torch.nn.Module.__call__ for the whole process while it runs: two
# traces at once in one process break each other (and a forward in another thread meanwhile)
_TRACE_LOCK = threading.Lock()


class _Tracer(fx.Tracer):
    """Keeps quantizable layers (also subclasses with their own forward) as single calls."""

    def is_leaf_module(self, m: nn.Module, qualname: str) -> bool:
        return is_quantizable(m) or super().is_leaf_module(m, qualname)


@contextlib.contextmanager
def evaluating(model: nn.Module):
    """``no_grad`` and ``eval()`` for the block; every module's training flag restored after."""
    flags = [(m, m.training) for m in model.modules()]
    try:
        model.eval()
        with torch.no_grad():
            yield
    finally:
        for m, flag in flags:
            m.training = flag


class GraphReplay:
    """A traced model: record every value on a batch, then rerun what follows one layer."""

    def __init__(self, model: nn.Module, graph: fx.Graph):
        self.model = model
        self.nodes = list(graph.nodes)
        self._modules = dict(model.named_modules())
        self.layer_nodes: dict[str, list[fx.Node]] = {}
        for node in self.nodes:
            if node.op == "call_module" and is_quantizable(self._modules[node.target]):
                self.layer_nodes.setdefault(node.target, []).append(node)
        self._after: dict = {}
        self.values: dict[fx.Node, object] = {}
        self._batched: set = set()  # recorded values that carry the batch along axis 0

    # ------------------------------------------------------------------ one batch
    def record(self, data) -> object:
        """Run the graph on ``data`` (tensor, tuple of args or dict of kwargs), keep every value.

        Returns the output. Call inside :func:`evaluating`.
        """
        env: dict[fx.Node, object] = {}
        placeholders = [n for n in self.nodes if n.op == "placeholder"]
        args, kwargs = _as_call(data)
        for i, node in enumerate(placeholders):
            if i < len(args):
                env[node] = args[i]
            elif node.target in kwargs:
                env[node] = kwargs[node.target]
            elif node.args:
                env[node] = node.args[0]
            else:
                raise ValueError(f"the data gives no value for the model's argument {node.target!r}")
        out = None
        for node in self.nodes:
            if node.op == "placeholder":
                continue
            if node.op == "output":
                out = fx.node.map_arg(node.args[0], env.__getitem__)
                break
            env[node] = self._run(node, env)
        self.values = env
        self._batched = _batch_values(self.nodes, env, placeholders)
        return out

    def rerun(self, name: str, replace: Callable[[torch.Tensor], torch.Tensor],
              until: fx.Node | None = None, copies: int = 1) -> object:
        """The output with each call of layer ``name`` computing ``replace(its input)`` instead.

        Only the nodes that depend on the layer's outputs are recomputed; the rest come from
        the last :meth:`record`. ``until``: stop there and return that node's value instead.
        ``copies`` > 1: ``replace`` returns that many versions stacked along axis 0, and every
        recorded value those nodes read that carries the batch (a tensor computed from the data
        whose axis 0 is the batch's) is read repeated as many times, so the rest of the model
        runs once for all versions (valid when it keeps samples apart: the caller checks).
        Each value is dropped after its last use. Call inside :func:`evaluating` (eval mode,
        no gradient).
        """
        env = self.values
        local: dict[fx.Node, object] = {}
        tiled: dict[fx.Node, object] = {}
        order, last = self._suffix(name), self._last_use(name)

        def get(n: fx.Node):
            if n in local:
                return local[n]
            v = env[n]
            if copies == 1 or n not in self._batched:
                return v
            if n not in tiled:
                tiled[n] = v.repeat((copies,) + (1,) * (v.dim() - 1))
            return tiled[n]

        for i, node in enumerate(order):
            if until is not None and node.op == "output":
                return get(until)
            if node.op == "output":
                return fx.node.map_arg(node.args[0], get)
            if node.op == "call_module" and node.target == name:  # its own input, not repeated
                local[node] = replace(fx.node.map_arg(node.args[0], lambda n: local.get(n, env.get(n))))
            else:
                local[node] = self._run(node, get)
            if node is until:
                return local[node]
            for a in node.all_input_nodes:
                if last.get(a) == i:
                    local.pop(a, None)
                    tiled.pop(a, None)
        raise RuntimeError("the traced graph has no output node")

    def largest_after(self, name: str) -> int:
        """Bytes of the largest tensor the last :meth:`record` computed at or after layer
        ``name`` (what a :meth:`rerun` with ``copies`` holds that many times over)."""
        sizes = [v.numel() * v.element_size() for n in self._suffix(name)
                 if isinstance(v := self.values.get(n), torch.Tensor)]
        return max(sizes, default=0)

    def carries_batch(self, node: fx.Node) -> bool:
        """Whether the recorded value of ``node`` is computed from the data and has the batch
        along axis 0 (what :meth:`rerun` repeats for ``copies``)."""
        return node in self._batched

    def final_linear(self) -> tuple[str, fx.Node] | None:
        """(name, input node) of the ``nn.Linear`` whose output is the model's whole output, if any.

        Then the output error of a change ``d`` of that layer's input is ``d W^T`` exactly, and
        its power ``sum d (W^T W) d^T`` needs no output-wide product (see ``passes``).
        """
        out = next((n for n in self.nodes if n.op == "output"), None)
        head = out.args[0] if out is not None and out.args else None
        if not isinstance(head, fx.Node) or head.op != "call_module" or len(head.users) != 1:
            return None
        module = self._modules.get(head.target)
        if type(module) is not nn.Linear or head.kwargs or len(head.args) != 1:
            return None
        if not isinstance(head.args[0], fx.Node) or len(self.layer_nodes.get(head.target, ())) != 1:
            return None
        return head.target, head.args[0]

    # ------------------------------------------------------------------ internals
    def _suffix(self, name: str) -> list[fx.Node]:
        """The layer's call nodes and every node downstream of them, in graph order."""
        if name not in self._after:
            start = set(self.layer_nodes[name])
            dirty: set[fx.Node] = set()
            order = []
            for node in self.nodes:
                if node in start or any(a in dirty for a in node.all_input_nodes):
                    dirty.add(node)
                    order.append(node)
                elif node.op == "output":
                    order.append(node)
            self._after[name] = order
        return self._after[name]

    def _last_use(self, name: str) -> dict:
        """node -> the position in ``_suffix(name)`` of its last reader there (the output node's
        inputs, and ``until`` nodes, are never dropped: the output is read at its own step)."""
        key = ("last", name)
        if key not in self._after:
            order = self._suffix(name)
            last: dict = {}
            for i, node in enumerate(order):
                for a in node.all_input_nodes:
                    last[a] = i if node.op != "output" else len(order)
            self._after[key] = last
        return self._after[key]

    def _run(self, node: fx.Node, env):
        get = env.__getitem__ if isinstance(env, Mapping) else env
        args = fx.node.map_arg(node.args, get)
        kwargs = fx.node.map_arg(node.kwargs, get)
        if node.op == "call_module":
            return self._modules[node.target](*args, **kwargs)
        if node.op == "call_function":
            return node.target(*args, **kwargs)
        if node.op == "call_method":
            obj, *rest = args
            return getattr(obj, node.target)(*rest, **kwargs)
        if node.op == "get_attr":
            return operator.attrgetter(node.target)(self.model)
        raise RuntimeError(f"unexpected graph node {node.op!r}")


# what symbolic tracing raises on code it cannot follow (data-dependent control flow, calls
# that reject a Proxy, attributes a Proxy lacks); anything else propagates
TRACE_ERRORS = (fx.proxy.TraceError, TypeError, AttributeError, NotImplementedError, RuntimeError,
                ValueError)


def trace(model: nn.Module) -> GraphReplay | None:
    """A :class:`GraphReplay` of ``model``, or None when it does not trace.

    Tracing patches module calls process-wide while it runs: do not run a forward of any
    model in another thread of this process meanwhile (the scan traces before it starts a
    thread pool's tasks).

    >>> from torch import nn
    >>> r = trace(nn.Sequential(nn.Linear(4, 3), nn.ReLU(), nn.Linear(3, 2)))
    >>> sorted(r.layer_nodes)
    ['0', '2']
    """
    return trace_or_reason(model)[0]


def trace_or_reason(model: nn.Module) -> tuple[GraphReplay | None, str | None]:
    """(:class:`GraphReplay`, None), or (None, why it does not trace: the error, shortened)."""
    try:
        with _TRACE_LOCK:
            graph = _Tracer().trace(model)
    except TRACE_ERRORS as e:
        text = str(e).strip().splitlines()[0][:160] if str(e).strip() else ""
        return None, f"{type(e).__name__}: {text}" if text else type(e).__name__
    return GraphReplay(model, graph), None


def _batch_values(nodes, env, placeholders) -> set:
    """The nodes computed from the data whose value is a tensor with the batch along axis 0
    (the batch: axis 0 of the first tensor argument)."""
    first = next((env[p] for p in placeholders if isinstance(env.get(p), torch.Tensor) and env[p].dim()), None)
    if first is None:
        return set()
    n = first.shape[0]
    from_data, out = set(placeholders), set()
    for node in nodes:
        if node in from_data or any(a in from_data for a in node.all_input_nodes):
            from_data.add(node)
            v = env.get(node)
            if isinstance(v, torch.Tensor) and v.dim() and v.shape[0] == n:
                out.add(node)
    return out


def _as_call(data) -> tuple[tuple, dict]:
    if isinstance(data, Mapping):
        return (), dict(data)
    if isinstance(data, (tuple, list)):
        return tuple(data), {}
    return (data,), {}
