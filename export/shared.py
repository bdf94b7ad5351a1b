"""Shared computation: the draw-free part of a network runs once, the draws fan out where they enter.

Why: the usual way to make a large network uncertainty-aware is a trained
deterministic backbone with a variational (or dropout) head. Running the
whole network on a batch of ``S * B`` rows (export/draws.py, "the batch
carries the draws") runs the backbone S times per case for nothing: measured
on a conv backbone with a variational head at S = 32, 26-32x the
deterministic network's latency.

How (torch.fx): the user's module is traced symbolically (``torch.fx``'s
``Tracer``, with demur's variational layers and dropout stand-ins as leaves),
and a dependency pass gives every node of the graph one of three states::

    const   depends on neither the input nor a draw (parameters, constants)
    plain   depends on the input, not on any draw: a batch [B, ...]
    carry   depends on a draw: a draw-carrying batch [S*B, ...], draw-major

A node is ``carry`` if it is a draw source (a variational layer with S > 1
weight sets, a dropout layer in MC mode) or if any of its inputs is. The
graph is then run node by node on real tensors (so ``torch.onnx.export``'s
tracer records the same operations): plain nodes on ``[B, ...]``, and where a
carry node takes a plain tensor (the input of the first variational layer on
a path, the draw-free skip of a residual add, one side of a concat) that
tensor is repeated S times at that node, once (memoised), not recomputed.
Non-tensor values read from a plain tensor and used by a carry node (the
``x.size(0)`` of a ``view``) are re-read from the repeated tensor, so they
mean what they meant when the whole batch carried the draws.

Deep ensembles: members whose modules are the same objects (one frozen
backbone shared by every member's head) compute the shared draw-free nodes
once: plain and const nodes are keyed by the module object (or function) and
their inputs' keys, and a key computed by an earlier member is reused.

Refusals become a fallback, never a wrong graph: ``plan_shared`` raises
``NotShareable`` with a reason when the tracer cannot follow the forward
(control flow on values, unsupported Python), and ``DrawNetwork`` checks the
shared forward against the per-draw forward in torch on random cases before
using it; the export then runs today's path and says why (a warning and the
manifest's ``graphs.<kind>.computation``).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import torch
from torch import fx, nn

from demur.export.pooling import FixedWindowPool

__all__ = ["CARRY", "CONST", "PLAIN", "NotShareable", "SharedComputationNotice", "SharedPlan", "plan_shared"]

CONST, PLAIN, CARRY = 0, 1, 2
"""Node states of the dependency pass (module docstring)."""


class NotShareable(Exception):
    """The forward cannot run with shared computation; ``str(exc)`` says why (the fallback's note)."""


class SharedComputationNotice(UserWarning):
    """Warned by the exporter when a graph fell back to running the whole network once per draw."""


class _Tracer(fx.Tracer):
    """torch.nn's own modules, demur's draw-making modules and its fixed-window pools (export/pooling.py:
    they read sizes as ints) are leaves (never traced into)."""

    def __init__(self, is_source: Callable[[nn.Module], bool]) -> None:
        super().__init__()
        self._is_source = is_source

    def is_leaf_module(self, m: nn.Module, module_qualified_name: str) -> bool:
        return (getattr(m, "_draw_mode", None) is not None or self._is_source(m) or isinstance(m, FixedWindowPool)
                or super().is_leaf_module(m, module_qualified_name))


@dataclass
class _Member:
    module: nn.Module
    graph: fx.Graph
    state: dict[fx.Node, int]
    keys: dict[fx.Node, Any]


@dataclass
class SharedPlan:
    """The traced members with each node's state; ``entries``: where draws first enter
    (qualified module names of the draw sources fed by a plain tensor)."""

    members: list[_Member]
    entries: list[str] = field(default_factory=list)
    entry_layers: list[nn.Module] = field(default_factory=list)
    """The draw sources fed by a plain tensor, as module objects (every member's)."""

    def run(self, x: torch.Tensor, fan: int) -> list[torch.Tensor]:
        """Each member's output on ``x`` [B, ...] with ``fan`` draws: a list of [fan * B, K]
        (draw-major), the plain members' outputs repeated ``fan`` times."""
        cache: dict[Any, Any] = {}
        return [_run_member(m, x, fan, cache) for m in self.members]

    def describe(self) -> str:
        what = "the draw-free part runs once per call"
        if len(self.members) > 1:
            what = "each draw-free module runs once per call (modules the members share run once)"
        where = f"; draws enter at {', '.join(self.entries)}" if self.entries else ""
        return f"shared: {what}{where}"


def plan_shared(members: Sequence[nn.Module], is_source: Callable[[nn.Module], bool]) -> SharedPlan:
    """Trace every member and run the dependency pass; ``NotShareable`` when the tracer cannot."""
    plan = SharedPlan(members=[])
    for index, module in enumerate(members):
        try:
            graph = _Tracer(is_source).trace(module)
        except Exception as exc:  # fx raises TraceError, TypeError, NotImplementedError ... on user code
            who = type(module).__name__ if len(members) == 1 else f"member {index} ({type(module).__name__})"
            first = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
            raise NotShareable(f"torch.fx cannot trace the forward of {who}: {type(exc).__name__}: {first}") from exc
        state, entries = _dependencies(module, graph, is_source)
        plan.members.append(_Member(module, graph, state, _keys(module, graph, state)))
        plan.entries.extend(e for e in entries if e not in plan.entries)
        plan.entry_layers.extend(module.get_submodule(e) for e in entries)
    return plan


def _dependencies(module: nn.Module, graph: fx.Graph, is_source: Callable[[nn.Module], bool]
                  ) -> tuple[dict[fx.Node, int], list[str]]:
    """Each node's state (const / plain / carry) and the draw sources fed by a plain tensor."""
    state: dict[fx.Node, int] = {}
    entries: list[str] = []
    placeholders = [n for n in graph.nodes if n.op == "placeholder"]
    for extra in placeholders[1:]:
        if not extra.args:
            raise NotShareable(f"the forward takes a second input '{extra.target}' without a default; demur "
                               "feeds one tensor")
    for node in graph.nodes:
        if node.op == "placeholder":
            state[node] = PLAIN if node is placeholders[0] else CONST
        elif node.op == "get_attr":
            state[node] = CONST
        elif node.op == "output":
            continue
        else:
            s = max((state[a] for a in node.all_input_nodes), default=CONST)
            if node.op == "call_module" and is_source(module.get_submodule(str(node.target))):
                if s == CONST:
                    raise NotShareable(f"draws enter at '{node.target}' on a value that does not depend on the "
                                       "input")
                if s == PLAIN:
                    entries.append(str(node.target))
                s = CARRY
            state[node] = s
    outputs = [n for n in graph.nodes if n.op == "output"]
    if len(outputs) != 1 or not isinstance(outputs[0].args[0], fx.Node):
        raise NotShareable("the forward must return one tensor")
    return state, entries


def _keys(module: nn.Module, graph: fx.Graph, state: dict[fx.Node, int]) -> dict[fx.Node, Any]:
    """Value keys of the draw-free nodes, equal across members exactly when the same module
    object (or function) is applied to equal inputs; None where a node cannot be keyed."""
    keys: dict[fx.Node, Any] = {}

    def key_of(value: Any) -> Any:
        if isinstance(value, fx.Node):
            k = keys.get(value)
            if k is None:
                raise KeyError
            return k
        if isinstance(value, (list, tuple)):
            return (type(value).__name__, *(key_of(v) for v in value))
        if isinstance(value, dict):
            return ("dict", *sorted((str(k), key_of(v)) for k, v in value.items()))
        hash(value)  # TypeError for unhashable constants
        return ("const", type(value).__name__, value)

    for node in graph.nodes:
        if node.op == "output" or state.get(node) == CARRY:
            continue
        try:
            if node.op == "placeholder":
                keys[node] = ("input",) if state[node] == PLAIN else key_of(node.args)
                continue
            if node.op == "get_attr":
                target: Any = ("attr", id(_fetch(module, str(node.target))))
            elif node.op == "call_module":
                target = ("module", id(module.get_submodule(str(node.target))))
            elif node.op == "call_function":
                target = ("function", node.target)
            else:
                target = ("method", str(node.target))
            keys[node] = (target, key_of(node.args), key_of(dict(node.kwargs)))
        except (KeyError, TypeError):
            keys[node] = None
    return {n: k for n, k in keys.items() if k is not None}


def _fetch(module: nn.Module, target: str) -> Any:
    obj: Any = module
    for part in target.split("."):
        obj = getattr(obj, part)
    return obj


def _fan_out(v: torch.Tensor, fan: int) -> torch.Tensor:
    """[B, ...] -> [fan * B, ...], draw-major (row s * B + b is case b)."""
    return v.repeat(fan, *[1] * (v.dim() - 1))


def _run_member(m: _Member, x: torch.Tensor, fan: int, cache: dict[Any, Any]) -> torch.Tensor:
    """One member's graph on real tensors; plain nodes once, carry nodes over [fan * B, ...]."""
    env: dict[fx.Node, Any] = {}
    carried: dict[fx.Node, Any] = {}   # plain values as a carry node must see them

    def as_carried(a: fx.Node) -> Any:
        if m.state[a] != PLAIN:
            return env[a]
        if a not in carried:
            v = env[a]
            if isinstance(v, torch.Tensor):
                carried[a] = _fan_out(v, fan)
            else:  # an int, size or tuple read from plain tensors: read it again from the carried ones
                carried[a] = _call(m.module, a, *_args(a, as_carried))
        return carried[a]

    def plain_value(a: fx.Node) -> Any:
        return env[a]

    out: fx.Node | None = None
    for node in m.graph.nodes:
        if node.op == "placeholder":
            env[node] = x if m.state[node] == PLAIN else node.args[0]
            continue
        if node.op == "output":
            out = node.args[0]
            break
        key = m.keys.get(node)
        if key is not None and key in cache:
            env[node] = cache[key]
            continue
        entry = _entry(m, node)
        if entry is not None:  # the first draw on a path, on a draw-free batch: the layer fans out itself
            env[node] = entry(env[node.args[0]])
            continue
        load = as_carried if m.state[node] == CARRY else plain_value
        env[node] = _call(m.module, node, *_args(node, load))
        if key is not None:
            cache[key] = env[node]
    assert out is not None
    y = env[out]
    if not isinstance(y, torch.Tensor):
        raise NotShareable(f"the forward returned {type(y).__name__}, not one tensor")
    return y if m.state[out] == CARRY else _fan_out(y, fan)


def _entry(m: _Member, node: fx.Node) -> Callable[[torch.Tensor], torch.Tensor] | None:
    """A draw source called with one draw-free tensor whose draw mode can take a [B, ...] batch
    directly (``run_plain``: stored weight sets side by side in one matmul or convolution)."""
    if node.op != "call_module" or m.state[node] != CARRY or len(node.args) != 1 or node.kwargs:
        return None
    arg = node.args[0]
    if not isinstance(arg, fx.Node) or m.state[arg] != PLAIN:
        return None
    layer = m.module.get_submodule(str(node.target))
    mode = getattr(layer, "_draw_mode", None)
    if getattr(mode, "run_plain", None) is None:
        return None

    def enter(x: torch.Tensor) -> torch.Tensor:
        mode.entering = True            # through the module's own call: hooks and export scopes see it
        try:
            return layer(x)
        finally:
            mode.entering = False
    return enter


def _args(node: fx.Node, load: Callable[[fx.Node], Any]) -> tuple[Any, Any]:
    return fx.node.map_arg(node.args, load), fx.node.map_arg(node.kwargs, load)


def _call(module: nn.Module, node: fx.Node, args: Any, kwargs: Any) -> Any:
    if node.op == "get_attr":
        return _fetch(module, str(node.target))
    if node.op == "call_module":
        return module.get_submodule(str(node.target))(*args, **kwargs)
    if node.op == "call_function":
        return node.target(*args, **kwargs)  # type: ignore[operator]
    if node.op == "call_method":
        self_obj, *rest = args
        return getattr(self_obj, str(node.target))(*rest, **kwargs)
    raise NotShareable(f"unexpected graph node {node.op}")

