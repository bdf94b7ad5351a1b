"""ONNX graphs of a variational network, built node by node with ``onnx.helper``.

Why not ``torch.onnx.export``: in torch 2.13 it defaults to the dynamo
exporter, which needs ``onnxscript`` and writes the weights to a separate
``.onnx.data`` file unless told otherwise, while the TorchScript exporter is
deprecated. More to the point, none of our graph kinds is a traced torch
forward: the stacked graph runs S weight sets in one pass, and the sampler
graph draws its own noise inside ONNX (RandomNormal) including the radial
normalisation. Writing the few ops we need directly is exact, small, and
leaves one self-contained ``.onnx`` file per graph.

Every graph follows the bundle contract (``serve/core/bundle.py``)::

    input  "x":     float32[B, *input_shape]   already standardised
    output "draws": float32[S, B, K]           logits, or (mean, log-variance)

Kinds built here:

``stacked``  S pre-drawn weight sets stored as initializers. Linear weights
             are kept as ``[S, in, out]`` so one MatMul runs all draws: the
             first layer broadcasts x ``[B, in]`` against ``[S, in, out]``,
             later ones are batched ``[S, B, in] x [S, in, out]``. Convolutions
             fold S into the channel axis: the first conv has ``S * out``
             filters over the shared input, later ones are grouped convs with
             ``group = S``; Flatten unfolds ``[B, S*C, H, W]`` to ``[S, B, C*H*W]``.
``sampler``  mu and sigma as initializers; every call draws fresh
             ``eps ~ N(0, I)`` per parameter tensor with RandomNormal (each
             node its own ``seed`` attribute, see ``node_seed``). gaussian:
             w = mu + sigma * eps; radial: w = mu + sigma * (eps / ||eps||) * r
             with ||.|| over the whole tensor per draw and r ~ N(0, 1) per draw,
             as ``demur.export.layers`` does. The drawn tensors then feed the same
             ops as the stacked graph.
``means``    the network of the posterior means: the stacked graph with
             S = 1, output ``[1, B, K]``.

The builders work from a ``NetworkPlan`` (numpy copies of the parameters), so
they never trace torch; ``plan_from_model`` makes one from an ``nn.Sequential``
of ``VariationalLinear``, ``VariationalConv2d``, ``nn.ReLU`` and ``nn.Flatten``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

from demur.export.errors import GraphBuildError

__all__ = [
    "IR_VERSION",
    "OPSET",
    "checked_model",
    "SEED_MODULUS",
    "LayerParams",
    "NetworkPlan",
    "means_graph",
    "node_seed",
    "plan_from_model",
    "sampler_graph",
    "stacked_graph",
]

OPSET = 17
"""ONNX opset of every graph: ReduceL2 still takes ``axes`` as an attribute here."""

IR_VERSION = 8
"""The IR version that goes with opset 17, so older runtimes can read our files."""

SEED_MODULUS = 1 << 24
"""RandomNormal's ``seed`` is a float32 attribute: integers below 2**24 are exact."""

Step = Literal["relu", "flatten"]


@dataclass(frozen=True)
class LayerParams:
    """One variational layer as numpy float32 arrays, torch layout.

    linear: weight ``[out, in]``; conv: weight ``[out_c, in_c, k, k]``; bias ``[out]``.
    ``*_sigma`` = softplus(rho), already positive.
    """

    kind: Literal["linear", "conv"]
    weight_mu: np.ndarray
    weight_sigma: np.ndarray
    bias_mu: np.ndarray
    bias_sigma: np.ndarray
    stride: int = 1
    padding: int = 0


@dataclass(frozen=True)
class NetworkPlan:
    """What the graph builders need: input shape, the ordered steps, the posterior family.

    ``steps`` holds ``LayerParams`` for variational layers and the strings
    ``"relu"`` / ``"flatten"`` for the parameter-free ones.
    """

    input_shape: tuple[int, ...]
    steps: tuple[LayerParams | Step, ...]
    posterior: Literal["radial", "gaussian"]

    @property
    def layers(self) -> list[LayerParams]:
        return [s for s in self.steps if isinstance(s, LayerParams)]

    @property
    def outputs(self) -> int:
        """K: the last layer's output width."""
        return int(self.layers[-1].bias_mu.shape[0])

    @property
    def parameter_count(self) -> int:
        """Number of variational parameters (weights + biases; each has a mu and a sigma)."""
        return int(sum(layer.weight_mu.size + layer.bias_mu.size for layer in self.layers))


def node_seed(base: int, index: int) -> float:
    """Seed attribute of the ``index``-th RandomNormal node for a graph seeded with ``base``.

    Distinct nodes need distinct seeds: two nodes with one seed would draw the
    same noise and correlate layers. Kept below 2**24 so float32 holds it exactly.
    """
    return float((int(base) + 7919 * int(index)) % SEED_MODULUS)


def plan_from_model(model: Any, input_shape: Sequence[int]) -> NetworkPlan:
    """Copy an ``nn.Sequential`` of variational layers, ReLU and Flatten into a plan."""
    import torch  # the torch side only; builders below need numpy alone
    from torch import nn

    from demur.export.layers import VariationalConv2d, VariationalLayer, VariationalLinear

    steps: list[LayerParams | Step] = []
    posteriors = set()
    modules = list(model) if isinstance(model, nn.Sequential) else [model]
    with torch.no_grad():
        for i, m in enumerate(modules):
            if isinstance(m, VariationalLayer):
                posteriors.add(m.posterior)

                def arr(t: torch.Tensor) -> np.ndarray:
                    return t.detach().cpu().to(torch.float32).numpy().copy()

                common = {
                    "weight_mu": arr(m.weight_mu), "weight_sigma": arr(m.weight_sigma),
                    "bias_mu": arr(m.bias_mu), "bias_sigma": arr(m.bias_sigma),
                }
                if isinstance(m, VariationalLinear):
                    steps.append(LayerParams("linear", **common))
                elif isinstance(m, VariationalConv2d):
                    steps.append(LayerParams("conv", stride=m.stride, padding=m.padding, **common))
                else:
                    raise GraphBuildError(f"module {i} is a {type(m).__name__}, which has no graph form",
                                          field=f"model[{i}]")
            elif isinstance(m, nn.ReLU):
                steps.append("relu")
            elif isinstance(m, nn.Flatten):
                if m.start_dim != 1 or m.end_dim != -1:
                    raise GraphBuildError(
                        f"only Flatten(start_dim=1, end_dim=-1) is supported; module {i} has "
                        f"start_dim={m.start_dim}, end_dim={m.end_dim}", field=f"model[{i}]")
                steps.append("flatten")
            else:
                raise GraphBuildError(
                    f"module {i} is a {type(m).__name__}; the graph builder supports VariationalLinear, "
                    "VariationalConv2d, ReLU and Flatten", field=f"model[{i}]")
    if len(posteriors) != 1:
        raise GraphBuildError(f"the model needs variational layers of one posterior family; got {sorted(posteriors)}",
                              field="model")
    plan = NetworkPlan(tuple(int(d) for d in input_shape), tuple(steps), posteriors.pop())  # type: ignore[arg-type]
    _check_plan(plan)
    return plan


def _check_plan(plan: NetworkPlan) -> None:
    if not plan.layers:
        raise GraphBuildError("the model has no variational layers", field="model")
    if not isinstance(plan.steps[-1], LayerParams) or plan.steps[-1].kind != "linear":
        raise GraphBuildError("the model must end with a VariationalLinear (the K outputs)", field="model")


# -- the graph under construction ------------------------------------------
class _Graph:
    """Accumulates nodes and initializers; hands out unique value names."""

    def __init__(self) -> None:
        self.nodes: list[onnx.NodeProto] = []
        self.inits: list[onnx.TensorProto] = []
        self.outputs: list[onnx.ValueInfoProto] = []
        self._n = 0

    def name(self, stem: str) -> str:
        self._n += 1
        return f"{stem}_{self._n}"

    def const(self, stem: str, value: np.ndarray) -> str:
        name = self.name(stem)
        self.inits.append(numpy_helper.from_array(np.ascontiguousarray(value), name))
        return name

    def op(self, op_type: str, inputs: Sequence[str], stem: str | None = None, out: str | None = None,
           **attrs: Any) -> str:
        result = out or self.name(stem or op_type.lower())
        self.nodes.append(helper.make_node(op_type, list(inputs), [result], name=self.name(op_type), **attrs))
        return result

    def expose(self, value: str, name: str, shape: Sequence[int]) -> None:
        """Add a float32 graph output ``name`` (for debugging/tests) that copies ``value``."""
        self.op("Identity", [value], out=name)
        self.outputs.append(helper.make_tensor_value_info(name, TensorProto.FLOAT, list(shape)))


# Layouts of the running value: "shared" [B, ...] before the first
# variational layer; "channels" [B, S*C, H, W] inside the conv stack;
# "stacked" [S, B, F] after.


def _ints(values: Sequence[int]) -> np.ndarray:
    return np.asarray(list(values), dtype=np.int64)


def _linear(g: _Graph, x: str, layout: str, w_sio: str, b_s1o: str) -> tuple[str, str]:
    """x [B, in] or [S, B, in]; w [S, in, out]; b [S, 1, out] -> [S, B, out]."""
    if layout == "channels":
        raise GraphBuildError("a VariationalLinear after a conv needs an nn.Flatten between them", field="model")
    y = g.op("MatMul", [x, w_sio], "matmul")
    return g.op("Add", [y, b_s1o], "linear"), "stacked"


def _conv(g: _Graph, x: str, layout: str, S: int, w_fold: str, b_fold: str, layer: LayerParams) -> tuple[str, str]:
    """x [B, C, H, W] (shared) or [B, S*C, H, W]; w [S*out, in, k, k]; b [S*out] -> [B, S*out, H', W']."""
    if layout == "stacked":
        raise GraphBuildError("a VariationalConv2d cannot follow a flattened layer", field="model")
    k = int(layer.weight_mu.shape[-1])
    p = int(layer.padding)
    y = g.op("Conv", [x, w_fold, b_fold], "conv", group=1 if layout == "shared" else S,
             kernel_shape=[k, k], strides=[layer.stride] * 2, pads=[p, p, p, p], dilations=[1, 1])
    return y, "channels"


def _flatten(g: _Graph, x: str, layout: str, S: int) -> tuple[str, str]:
    if layout == "shared":
        return g.op("Flatten", [x], "flat", axis=1), "shared"
    if layout == "channels":
        y = g.op("Reshape", [x, g.const("unfold_shape", _ints([0, S, -1]))], "unfold")
        return g.op("Transpose", [y], "flat", perm=[1, 0, 2]), "stacked"
    return x, layout  # already [S, B, F]


def _build(plan: NetworkPlan, S: int, weights: Any, g: _Graph) -> str:
    """Chain the plan's steps; ``weights(i, layer)`` gives (weight, bias) value names in graph layout."""
    x, layout, i = "x", "shared", 0
    for step in plan.steps:
        if step == "relu":
            x = g.op("Relu", [x], "relu")
        elif step == "flatten":
            x, layout = _flatten(g, x, layout, S)
        else:
            assert isinstance(step, LayerParams)
            w, b = weights(i, step)
            if step.kind == "linear":
                x, layout = _linear(g, x, layout, w, b)
            else:
                x, layout = _conv(g, x, layout, S, w, b, step)
            i += 1
    if layout != "stacked":
        raise GraphBuildError("the model must end with a VariationalLinear after any conv layers", field="model")
    return g.op("Identity", [x], out="draws")


def _model(plan: NetworkPlan, S: int, g: _Graph, graph_name: str, doc: str) -> onnx.ModelProto:
    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, ["B", *plan.input_shape])
    y = helper.make_tensor_value_info("draws", TensorProto.FLOAT, [S, "B", plan.outputs])
    graph = helper.make_graph(g.nodes, graph_name, [x], [y, *g.outputs], initializer=g.inits, doc_string=doc)
    return checked_model(graph, graph_name, doc)


def checked_model(graph: onnx.GraphProto, graph_name: str, doc: str) -> onnx.ModelProto:
    """Wrap ``graph`` as a model at demur's opset and IR version, validated by onnx's full check.

    Every graph kind ends here, so all bundles share one opset/IR pair and one
    validation; a failure raises ``GraphBuildError`` naming the graph kind."""
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)],
                              producer_name="demur", doc_string=doc)
    model.ir_version = IR_VERSION
    try:
        onnx.checker.check_model(model, full_check=True)
    except (onnx.checker.ValidationError, onnx.shape_inference.InferenceError) as exc:
        raise GraphBuildError(f"the {graph_name} graph failed ONNX validation: {exc}", field="graph") from exc
    return model


def _fold_stacked(layer: LayerParams, w: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Torch-layout draws -> graph layout. linear: [S,out,in] -> [S,in,out], bias [S,1,out];
    conv: [S,out,in,k,k] -> [S*out,in,k,k], bias [S*out]."""
    S = w.shape[0]
    if layer.kind == "linear":
        return np.swapaxes(w, 1, 2).astype(np.float32), b.reshape(S, 1, -1).astype(np.float32)
    return w.reshape(S * w.shape[1], *w.shape[2:]).astype(np.float32), b.reshape(-1).astype(np.float32)


def stacked_graph(plan: NetworkPlan, draws: Sequence[Mapping[str, Any]], *, name: str = "stacked") -> onnx.ModelProto:
    """Graph of S pre-drawn weight sets: ``draws[i]`` = {"weight": [S, *w], "bias": [S, out]} per layer.

    ``draws`` is what ``demur.export.layers.sample_network`` returns (tensors or arrays).
    """
    _check_plan(plan)
    layers = plan.layers
    if len(draws) != len(layers):
        raise GraphBuildError(f"need one draw per variational layer ({len(layers)}); got {len(draws)}", field="draws")
    arrays = [(np.asarray(_numpy(d["weight"]), np.float32), np.asarray(_numpy(d["bias"]), np.float32)) for d in draws]
    S = int(arrays[0][0].shape[0])
    for i, (layer, (w, b)) in enumerate(zip(layers, arrays)):
        if w.shape != (S, *layer.weight_mu.shape) or b.shape != (S, *layer.bias_mu.shape):
            raise GraphBuildError(
                f"draws[{i}] must be weight {[S, *layer.weight_mu.shape]} and bias {[S, *layer.bias_mu.shape]}; "
                f"got {list(w.shape)} and {list(b.shape)}", field=f"draws[{i}]")
    g = _Graph()

    def weights(i: int, layer: LayerParams) -> tuple[str, str]:
        w, b = _fold_stacked(layer, *arrays[i])
        return g.const(f"w{i}", w), g.const(f"b{i}", b)

    _build(plan, S, weights, g)
    return _model(plan, S, g, name, f"demur {name} graph: {S} pre-drawn weight sets, output draws[S, B, K]")


def means_graph(plan: NetworkPlan) -> onnx.ModelProto:
    """The deterministic network of the posterior means, output float32[1, B, K]."""
    draws = [{"weight": layer.weight_mu[None], "bias": layer.bias_mu[None]} for layer in plan.layers]
    return stacked_graph(plan, draws, name="means")


def sampler_graph(plan: NetworkPlan, draws: int, seed: int, *, debug: bool = False) -> onnx.ModelProto:
    """Graph that draws ``draws`` fresh weight sets on every call (RandomNormal in-graph).

    ``seed`` fills every RandomNormal node's seed attribute via ``node_seed``;
    the serving engine rewrites them at load time (see ``serve/adapters/engine.py``).
    ``debug=True`` adds outputs ``sample{i}.weight`` / ``sample{i}.bias`` (the
    drawn tensors, torch layout ``[S, *shape]``) and, for radial posteriors,
    ``direction{i}.weight`` / ``direction{i}.bias`` (eps / ||eps||), for tests.
    """
    _check_plan(plan)
    S = int(draws)
    if S < 1:
        raise GraphBuildError(f"draws must be >= 1; got {draws}", field="draws")
    g = _Graph()
    counter = [0]

    def normal(shape: Sequence[int]) -> str:
        s = node_seed(seed, counter[0])
        counter[0] += 1
        return g.op("RandomNormal", [], "eps", shape=list(shape), dtype=TensorProto.FLOAT,
                    mean=0.0, scale=1.0, seed=s)

    def draw(i: int, part: str, mu: np.ndarray, sigma: np.ndarray) -> str:
        shape = [S, *mu.shape]
        eps = normal(shape)
        if plan.posterior == "radial":
            axes = list(range(1, len(shape)))
            norm = g.op("ReduceL2", [eps], "norm", axes=axes, keepdims=1)
            direction = g.op("Div", [eps, norm], "direction")
            r = normal([S] + [1] * (len(shape) - 1))
            eps = g.op("Mul", [direction, r], "radial")
            if debug:
                g.expose(direction, f"direction{i}.{part}", shape)
        scaled = g.op("Mul", [eps, g.const(f"sigma{i}_{part}", sigma.astype(np.float32))], "scaled")
        w = g.op("Add", [scaled, g.const(f"mu{i}_{part}", mu.astype(np.float32))], "sample")
        if debug:
            g.expose(w, f"sample{i}.{part}", shape)
        return w

    def weights(i: int, layer: LayerParams) -> tuple[str, str]:
        w = draw(i, "weight", layer.weight_mu, layer.weight_sigma)
        b = draw(i, "bias", layer.bias_mu, layer.bias_sigma)
        if layer.kind == "linear":
            w = g.op("Transpose", [w], "w_sio", perm=[0, 2, 1])
            b = g.op("Reshape", [b, g.const("b_shape", _ints([S, 1, -1]))], "b_s1o")
        else:
            w = g.op("Reshape", [w, g.const("w_shape", _ints([-1, *layer.weight_mu.shape[1:]]))], "w_fold")
            b = g.op("Reshape", [b, g.const("b_shape", _ints([-1]))], "b_fold")
        return w, b

    _build(plan, S, weights, g)
    return _model(plan, S, g, "sampler",
                  f"demur sampler graph ({plan.posterior} posterior): {S} fresh draws per call, output draws[S, B, K]")


def _numpy(value: Any) -> np.ndarray:
    if hasattr(value, "detach"):
        return value.detach().cpu().numpy()
    return np.asarray(value)
