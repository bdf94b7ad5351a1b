"""The "flip" graph: fresh weight draws on every call at close to stacked-draws cost.

Why: the stacked graph is fast but replays the same S weight sets forever
and stores S copies of the weights; the sampler graph draws S fresh weight
tensors per call, and onnxruntime's RandomNormal costs about 17 ns per number
(measured here: 1.4 ms for one 84k-parameter network, 45 ms for S = 32).
This graph draws fresh perturbations per call but never materialises a
weight tensor per draw.

How (Flipout, Wen, Vicol, Ba, Tran & Grosse, ICLR 2018, eq. 4). For a linear
layer with posterior mean ``mu`` [out, in] and a base perturbation ``D``
[out, in], draw s gets random sign vectors ``a_s`` [in] and ``c_s`` [out] and
uses the weight ``W_s = mu + D * (c_s a_s^T)``. Its output is computed as::

    y_s = x_s @ mu^T + ((x_s * a_s) @ D^T) * c_s + b_s

two matmuls over all S draws at once, with one weight matrix each, so the
cost grows like a batch of S * B rows through one network, not like S
networks. The bias draw ``b_s = b_mu + d * c_s`` reuses the output signs.

Why each draw is exact. Let ``E`` have independent entries, each symmetric
about zero, and let ``c, a`` be independent uniform signs. Then
``E * (c a^T)`` has the same joint law as ``E``: conditional on the signs,
flipping the sign of independent symmetric entries leaves their law unchanged
(the same holds for the bias entries that share ``c``). So:

* gaussian posterior: ``D = sigma * eps``, eps ~ N(0, I): every draw's weights
  are exactly N(mu, sigma^2), independently per weight;
* radial posterior (Farquhar et al., AISTATS 2020, eq. 2):
  ``w = mu + sigma * (eps / ||eps||) * r``. The direction ``u = eps / ||eps||``
  is uniform on the unit sphere, and a sign flip is an orthogonal map, so
  ``u * (c a^T)`` is again uniform on the sphere, with unit norm (signs do not
  change ``||eps||``). The radius ``r ~ N(0, 1)`` is one scalar per tensor per
  draw and is drawn fresh per draw here, for the weight and for the bias
  separately, so ``||(w_s - mu) / sigma|| = |r_s|`` has the half-normal law
  the radial posterior prescribes.

Where the base comes from (the ``bank`` argument), the measured trade-off:

``bank = 0`` (default): the base ``eps`` is drawn fresh on every call
    (parameter-size normals once per call instead of S times, by Box-Muller
    from one RandomUniform block, measured ~1.2-1.8x cheaper than RandomNormal;
    the sign vectors of all layers come from one more block). Each
    weight's marginal over calls is then exactly the posterior. Draws within
    one call are pairwise uncorrelated (E[c_s c_t] = 0 for s != t) but share
    the magnitudes |eps|: they are not independent, which Flipout accepts.
    Stored: mu and sigma, 2x the parameter count.
``bank = M > 0``: M base perturbations (sigma folded in, radial ones already
    normalised) are drawn once at export; each call picks one at random and
    re-signs it per draw. No parameter-size random numbers per call, so it is
    the fastest; but a given weight then takes only 2M values over calls
    (+-the M stored ones): its law is the posterior only averaged over the
    export-time draw, not per weight. Stored: (1 + M)x the parameter count.

Every random node carries a ``seed`` (``export.graphs.node_seed``); the
engine rewrites them at load time like the sampler's. Only networks of
``VariationalLinear`` / ReLU / Flatten are supported (conv layers would need
per-channel signs inside grouped convolutions: use the sampler graph).

Example::

    plan = plan_from_model(model, [64])
    proto = flip_graph(plan, draws=32, seed=7)
    onnx.save_model(proto, "flip.onnx")
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

from .errors import GraphBuildError
from .graphs import LayerParams, NetworkPlan, checked_model, node_seed

__all__ = ["DEFAULT_BANK", "flip_graph"]

DEFAULT_BANK = 0
"""Fresh base perturbation per call (exact per-weight marginals); see the module docstring."""


class _Builder:
    """Nodes, initializers, unique names, seeded random nodes."""

    def __init__(self, seed: int) -> None:
        self.nodes: list[onnx.NodeProto] = []
        self.inits: list[onnx.TensorProto] = []
        self.extra: list[onnx.ValueInfoProto] = []
        self.seed = int(seed)
        self._n = 0
        self._random = 0

    def name(self, stem: str) -> str:
        self._n += 1
        return f"{stem}_{self._n}"

    def const(self, stem: str, value: Any, dtype: Any = np.float32) -> str:
        name = self.name(stem)
        self.inits.append(numpy_helper.from_array(np.array(value, dtype=dtype, order="C"), name))  # keeps 0-d as 0-d
        return name

    def op(self, op_type: str, inputs: Sequence[str], stem: str = "", out: str | None = None, **attrs: Any) -> str:
        result = out or self.name(stem or op_type.lower())
        self.nodes.append(helper.make_node(op_type, list(inputs), [result], name=self.name(op_type), **attrs))
        return result

    def random(self, op_type: str, shape: Sequence[int], **attrs: Any) -> str:
        seed = node_seed(self.seed, self._random)
        self._random += 1
        return self.op(op_type, [], op_type.lower(), shape=[int(d) for d in shape], dtype=TensorProto.FLOAT,
                       seed=seed, **attrs)

    def signs(self, shape: Sequence[int]) -> str:
        """Uniform +-1 of ``shape`` (Where(u < 1/2), so never 0, unlike Sign(u - 1/2))."""
        u = self.random("RandomUniform", shape, low=0.0, high=1.0)
        low = self.op("Less", [u, self.const("half", 0.5)], "low")
        return self.op("Where", [low, self.const("minus", -1.0), self.const("plus", 1.0)], "sign")

    def normals(self, n: int) -> str:
        """n standard normals float32[n] by the Box-Muller transform (Box & Muller 1958):
        z = sqrt(-2 ln u1) * (cos 2 pi u2, sin 2 pi u2) is exactly N(0, I_2) for independent
        uniforms. Measured here about 2x cheaper than RandomNormal (whose generator costs
        ~17 ns a number against ~6 for RandomUniform). float32 uniforms (steps of 2^-24)
        truncate the tails at |z| = sqrt(2 ln 2^24) = 5.8, a mass of 7e-9."""
        half = (n + 1) // 2
        u = self.random("RandomUniform", [2, half], low=0.0, high=1.0)
        u1, u2 = (self.op("Gather", [u, self.const("row", i, np.int64)], f"u{i + 1}", axis=0) for i in (0, 1))
        u1 = self.op("Sub", [self.const("one", 1.0), u1], "u1_open")  # (0, 1]: log stays finite
        radius = self.op("Sqrt", [self.op("Mul", [self.op("Log", [u1]), self.const("minus2", -2.0)])], "radius")
        angle = self.op("Mul", [u2, self.const("two_pi", 2.0 * np.pi)], "angle")
        z = self.op("Concat", [self.op("Mul", [radius, self.op("Cos", [angle])]),
                               self.op("Mul", [radius, self.op("Sin", [angle])])], "z", axis=0)
        return z if 2 * half == n else self.slice(z, 0, n, axis=0)

    def slice(self, value: str, start: int, end: int, axis: int) -> str:
        return self.op("Slice", [value, self.const("start", [start], np.int64), self.const("end", [end], np.int64),
                                 self.const("axis", [axis], np.int64)], "part")

    def expose(self, value: str, name: str, shape: Sequence[int]) -> None:
        self.op("Identity", [value], out=name)
        self.extra.append(helper.make_tensor_value_info(name, TensorProto.FLOAT, list(shape)))


def _bank(layer: LayerParams, M: int, radial: bool, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """M stored base perturbations: weight [M, in, out] (transposed), bias [M, out]; sigma folded in."""
    out_f, in_f = layer.weight_mu.shape
    eps_w = rng.standard_normal((M, out_f, in_f))
    eps_b = rng.standard_normal((M, out_f))
    if radial:
        eps_w /= np.linalg.norm(eps_w.reshape(M, -1), axis=1)[:, None, None]
        eps_b /= np.linalg.norm(eps_b, axis=1, keepdims=True)
    w = np.swapaxes(eps_w * layer.weight_sigma[None], 1, 2)
    return w.astype(np.float32), (eps_b * layer.bias_sigma[None]).astype(np.float32)


def flip_graph(
    plan: NetworkPlan,
    draws: int,
    seed: int,
    *,
    bank: int = DEFAULT_BANK,
    bank_seed: int | None = None,
    debug: bool = False,
) -> onnx.ModelProto:
    """Build the flip graph: input ``x`` float32[B, *shape], output ``draws`` float32[S, B, K].

    ``draws``: S per call; ``seed``: base of every random node's seed;
    ``bank``: 0 for a fresh base per call, M > 0 for M stored bases (see the
    module docstring); ``bank_seed`` seeds the stored bases (default ``seed``).
    ``debug=True`` adds outputs ``sample{i}.weight`` float32[S, out, in] and
    ``sample{i}.bias`` float32[S, out]: the weights each draw used (tests only;
    they cost S weight tensors).
    """
    S = int(draws)
    if S < 1:
        raise GraphBuildError(f"draws must be >= 1; got {draws}", field="draws")
    if not isinstance(bank, int) or bank < 0:
        raise GraphBuildError(f"bank must be an integer >= 0; got {bank!r}", field="bank")
    layers = plan.layers
    if not layers:
        raise GraphBuildError("the model has no variational layers", field="model")
    for step in plan.steps:
        if isinstance(step, LayerParams) and step.kind != "linear":
            raise GraphBuildError("the flip graph supports VariationalLinear layers only; this model has a "
                                  "VariationalConv2d: export it with --sampler or stacked draws", field="model")
    if not isinstance(plan.steps[-1], LayerParams):
        raise GraphBuildError("the model must end with a VariationalLinear (the K outputs)", field="model")
    radial = plan.posterior == "radial"
    g = _Builder(seed)
    rng = np.random.default_rng(int(seed if bank_seed is None else bank_seed))
    pick = None
    if bank:
        # one base per call for the whole network; Min guards u * M rounding up to M in float32
        u = g.random("RandomUniform", [1], low=0.0, high=1.0)
        k = g.op("Floor", [g.op("Mul", [u, g.const("bank_size", float(bank))])], "k")
        k = g.op("Min", [k, g.const("bank_last", float(bank - 1))], "k")
        pick = g.op("Cast", [k], "pick", to=TensorProto.INT64)

    # one random block for all layers (fewer nodes, fewer calls into the generator)
    widths = [int(sum(layer.weight_mu.shape)) for layer in layers]
    sign_block = g.signs([S, 1, sum(widths)])
    signs, start = [], 0
    for layer, width in zip(layers, widths):
        out_f, in_f = (int(d) for d in layer.weight_mu.shape)
        signs.append((g.slice(sign_block, start, start + in_f, axis=2),
                      g.slice(sign_block, start + in_f, start + width, axis=2)))
        start += width
    bases: list[tuple[str, str]] = []
    if not bank:
        z, start = g.normals(plan.parameter_count), 0
        for layer in layers:
            out_f, in_f = (int(d) for d in layer.weight_mu.shape)
            w = g.op("Reshape", [g.slice(z, start, start + in_f * out_f, axis=0),
                                 g.const("w_shape", [1, in_f, out_f], np.int64)], "eps_w")
            start += in_f * out_f
            b = g.op("Reshape", [g.slice(z, start, start + out_f, axis=0), g.const("b_shape", [1, out_f], np.int64)],
                     "eps_b")
            start += out_f
            bases.append((w, b))

    x, shared, i = "x", True, 0
    for step in plan.steps:
        if step == "relu":
            x = g.op("Relu", [x], "relu")
        elif step == "flatten":
            if shared:
                x = g.op("Flatten", [x], "flat", axis=1)
        else:
            assert isinstance(step, LayerParams)
            x = _layer(g, x, step, i, S, radial, bank, pick, rng, debug, signs[i], bases[i] if bases else None)
            shared, i = False, i + 1
    g.op("Identity", [x], out="draws")

    x_info = helper.make_tensor_value_info("x", TensorProto.FLOAT, ["B", *plan.input_shape])
    y_info = helper.make_tensor_value_info("draws", TensorProto.FLOAT, [S, "B", plan.outputs])
    doc = (f"demur flip graph ({plan.posterior} posterior, "
           f"{'fresh base per call' if not bank else f'bank of {bank} bases'}): {S} sign-flipped draws per call, "
           "output draws[S, B, K]")
    graph = helper.make_graph(g.nodes, "flip", [x_info], [y_info, *g.extra], initializer=g.inits, doc_string=doc)
    return checked_model(graph, "flip", doc)


def _layer(g: _Builder, x: str, layer: LayerParams, i: int, S: int, radial: bool, bank: int, pick: str | None,
           rng: np.random.Generator, debug: bool, signs: tuple[str, str], base: tuple[str, str] | None) -> str:
    """One linear layer: x [B, in] (first) or [S, B, in] -> [S, B, out]."""
    out_f, in_f = (int(d) for d in layer.weight_mu.shape)
    if bank:
        w_bank, b_bank = _bank(layer, bank, radial, rng)
        d_w = g.op("Gather", [g.const(f"bank{i}_w", w_bank), pick], "base_w", axis=0)   # [1, in, out]
        d_b = g.op("Gather", [g.const(f"bank{i}_b", b_bank), pick], "base_b", axis=0)   # [1, out]
    else:
        assert base is not None
        eps_w, eps_b = base
        if radial:
            eps_w = g.op("Div", [eps_w, g.op("ReduceL2", [eps_w], "norm", axes=[1, 2], keepdims=1)], "dir_w")
            eps_b = g.op("Div", [eps_b, g.op("ReduceL2", [eps_b], "norm", axes=[1], keepdims=1)], "dir_b")
        d_w = g.op("Mul", [eps_w, g.const(f"sigma{i}_w", layer.weight_sigma.T[None])], "base_w")
        d_b = g.op("Mul", [eps_b, g.const(f"sigma{i}_b", layer.bias_sigma[None])], "base_b")

    a, c = signs  # [S, 1, in], [S, 1, out]
    mean = g.op("MatMul", [x, g.const(f"mu{i}_w", layer.weight_mu.T)], "mean")
    pert = g.op("MatMul", [g.op("Mul", [x, a], "x_signed"), d_w], "pert")          # [S, B, out]
    d_b3 = g.op("Unsqueeze", [d_b, g.const("axis0", [0], np.int64)], "base_b3")   # [1, 1, out]
    if radial:
        r_w = g.random("RandomNormal", [S, 1, 1], mean=0.0, scale=1.0)
        r_b = g.random("RandomNormal", [S, 1, 1], mean=0.0, scale=1.0)
        pert = g.op("Add", [g.op("Mul", [pert, r_w]), g.op("Mul", [d_b3, r_b])], "pert_b")
    else:
        pert = g.op("Add", [pert, d_b3], "pert_b")
    y = g.op("Add", [g.op("Mul", [pert, c], "pert_signed"), mean], "pre")
    y = g.op("Add", [y, g.const(f"mu{i}_b", layer.bias_mu)], "linear")

    if debug:  # the weights each draw used, torch layout
        w = g.op("Mul", [g.op("Transpose", [a], perm=[0, 2, 1]), c])                # [S, in, out]
        w = g.op("Mul", [w, d_w])
        b = g.op("Mul", [c, d_b3])                                                   # [S, 1, out]
        if radial:
            w = g.op("Mul", [w, r_w])
            b = g.op("Mul", [b, r_b])
        w = g.op("Add", [g.op("Transpose", [w], perm=[0, 2, 1]), g.const("mu_dbg", layer.weight_mu)])
        b = g.op("Add", [g.op("Reshape", [b, g.const("b_shape", [S, out_f], np.int64)]),
                         g.const("mu_dbg", layer.bias_mu)])
        g.expose(w, f"sample{i}.weight", [S, out_f, in_f])
        g.expose(b, f"sample{i}.bias", [S, out_f])
    return y
