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

Why each draw keeps the base's law. ``c_s, a_s`` are uniform signs
independent of the base, and ``D * (c a^T)`` is ``D`` with row i and column j
re-signed: for every base below, re-signing rows and columns leaves its joint
law unchanged (the re-signs are absorbed into the base's own uniform signs,
or into symmetric independent entries). So each draw's weights follow the
base's law exactly, and over calls (every base here is fresh per call) each
weight's values are independent draws from its marginal:

* gaussian posterior: ``D = sigma * eps`` with each ``eps_ij ~ N(0, 1)``, so
  every weight is N(mu, sigma^2);
* radial posterior (Farquhar et al., AISTATS 2020, eq. 2):
  ``w = mu + sigma * (eps / ||eps||) * r``; sign flips keep ``||eps||``, so
  ``||(w_s - mu) / sigma|| = |r_s|``, the half-normal law the radial posterior
  prescribes. The radius ``r ~ N(0, 1)`` is one scalar per tensor per draw,
  fresh per draw, for the weight and the bias separately.

Draws within one call are pairwise uncorrelated (E[c_s c_t] = 0 for s != t)
but share the magnitudes ``|D|``: they are not independent, which Flipout
accepts.

Where the base comes from, the measured trade-off (64-256-256-10 radial MLP,
85k parameters, S = 32, B = 1, one onnxruntime thread; ``demur bench``):

``rank = M > 0`` (default M = 16): the rank-M sign base, fresh per call,
    from noise the engine feeds (graph inputs, below). Per layer, with uniform
    signs ``U`` [M, out] and ``V`` [M, in], a direction ``g`` uniform on the
    unit sphere of R^M (M normals, normalised) and independent radii
    ``chi_k ~ chi(M)`` along the longer side (rows k of ``U^T`` when
    out >= in, else of ``V^T``)::

        eps_ij = chi_i * sum_m U_mi V_mj g_m / sqrt(M)      (chi on rows here)

    Exact marginal: ``chi_i * g`` is N(0, I_M) (an isotropic Gaussian is an
    independent chi radius times a uniform direction), and given the signs
    ``sum_m U_mi V_mj z_m / sqrt(M)`` of z ~ N(0, I_M) is N(0, 1). So every
    weight is exactly N(0, 1) before sigma; two weights are uncorrelated (they
    differ in a row or a column, whose independent signs average the product
    to 0). Why the radii rather than plain normals ``g ~ N(0, I_M)`` shared
    by the layer (also exact): those scale the whole layer's perturbation by
    ``||g|| / sqrt(M)`` each call, and the mutual information of one request
    (gaussian network below) then varied by 36% of its mean from call to
    call, against 4% for independent draws; with the radii spread over 256
    rows, 8%. ``chi(M)`` is ``sqrt(-2 sum of M/2 log u)`` (a sum of
    independent chi-square(2) = -2 ln u terms), so M must be even.
    What is approximate: the JOINT law. Each call's ``eps`` is a rank-M matrix
    (the posterior's is full rank), weights of one layer are dependent beyond
    second moments, and the radial direction ``eps / ||eps||`` is not uniform
    on the sphere: its coordinates are (``||eps|| / sqrt(in * out)`` is 1 with
    sd 1.2% for a 64 x 256 layer; per-coordinate KS distance to the exact law
    <= 0.01 over 20000 simulated calls, kurtosis 2.97-3.03 against 3.00), its
    singular values are not. Measured effect on predictions (untrained
    64-256-256-10 MLPs with wide sigmas, 200 bundled digits, 192 calls of 32
    draws against 6144 independent draws): mean mutual information of
    32-draw sets gaussian -0.8 +- 0.6%, radial -3.8 +- 1.5% (the full-rank
    fresh base: -0.4% and -9%); per-call spread as above (radial: 20% for
    both, its radius dominates). Why M = 16: M = 8 biased the gaussian MI by
    -2.5 +- 0.6%; M = 32 gave the same gaussian agreement as 16 (-0.3%, 7%
    spread) at about 0.04 ms more per call; radial moved between -4% and -8%
    over M = 8..32 with no trend beyond run-to-run noise. Cost (medians of
    three ``demur bench --quick`` runs): 1.26x stacked at S = 32, B = 1
    (flip_bank2 1.17x), 1.62x at B = 64. The base costs about 0.2 ms a call
    whatever S (materialising D, and the engine's ~43 us of noise), so the
    ratio is 3.3x at S = 8 and 0.22x at S = 128 (where stacked reads 128
    weight copies). Stored: mu and sigma, 2x the parameters. Biases use
    fresh iid normals (``out`` per layer).
``rank = 0``: a full-rank base ``eps ~ N(0, I)`` drawn in the graph by
    Box-Muller from one RandomUniform block (exact and independent across
    weights; the sign vectors come from one more block). Kept for comparison:
    4.5x stacked, the parameter-sized normals dominate. Stored: 2x.
``bank = M > 0``: M base perturbations (sigma folded in, radial ones already
    normalised) are drawn once at export; each call picks one at random and
    re-signs it per draw. No parameter-size random numbers per call; but a
    given weight then takes only 2M values over calls (+-the M stored ones):
    its law is the posterior only averaged over the export-time draw, not per
    weight. Stored: (1 + M)x the parameter count.

Noise inputs of the default graph (filled by ``serve/adapters/engine.py`` per call
from numpy's generator; the law is the name's part before the first dot)::

    signs.flip  float32[S, 1, sum(in + out)]   uniform +-1: a_s, c_s per layer
    signs.base  float32[sum(in + out), M]      uniform +-1: V^T, U^T per layer
    normals     float32[L*M + sum(out) (+ 2*L*S radial)]  N(0, 1): g per layer,
                bias eps per layer, then radial radii (weights, then biases)
    uniforms    float32[sum(max(in, out)), M/2]  uniform on (0, 1]: chi radii

The ``rank = 0`` and bank graphs draw in the graph instead: every random node
carries a ``seed`` (``demur.export.graphs.node_seed``), which the engine rewrites at
load time like the sampler's. Only networks of ``VariationalLinear`` / ReLU /
Flatten are supported (conv layers would need per-channel signs inside
grouped convolutions: use the sampler graph).

Example::

    plan = plan_from_model(model, [64])
    proto = flip_graph(plan, draws=32, seed=7)     # rank-16 sign base, noise fed by the engine
    onnx.save_model(proto, "flip.onnx")
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

from demur.export.errors import GraphBuildError
from demur.export.graphs import LayerParams, NetworkPlan, checked_model, node_seed

__all__ = ["DEFAULT_BANK", "DEFAULT_RANK", "flip_graph"]

DEFAULT_RANK = 16
"""M of the default rank-M sign base; see the module docstring for the measurement behind it."""

DEFAULT_BANK = 0
"""No stored bank: the base is fresh per call (``rank`` says how); see the module docstring."""

SIGNS_FLIP = "signs.flip"
SIGNS_BASE = "signs.base"
NORMALS = "normals"
UNIFORMS = "uniforms"
# Graph inputs the engine fills per call; serve/adapters/engine.py reads the law from the name's part before
# the first dot ("signs": uniform +-1, "normals": N(0, 1), "uniforms": uniform on (0, 1]).


class _Builder:
    """Nodes, initializers, graph inputs, unique names, seeded random nodes."""

    def __init__(self, seed: int) -> None:
        self.nodes: list[onnx.NodeProto] = []
        self.inits: list[onnx.TensorProto] = []
        self.inputs: list[onnx.ValueInfoProto] = []
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

    def noise(self, name: str, shape: Sequence[int]) -> str:
        """A float32 graph input of fixed ``shape`` that the engine fills per call (law from the name)."""
        self.inputs.append(helper.make_tensor_value_info(name, TensorProto.FLOAT, [int(d) for d in shape]))
        return name

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
        uniforms. float32 uniforms (steps of 2^-24) truncate the tails at
        |z| = sqrt(2 ln 2^24) = 5.8, a mass of 7e-9."""
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

    def reshape(self, value: str, shape: Sequence[int]) -> str:
        return self.op("Reshape", [value, self.const("shape", list(shape), np.int64)], "reshaped")

    def expose(self, value: str, name: str, shape: Sequence[int]) -> None:
        self.op("Identity", [value], out=name)
        self.extra.append(helper.make_tensor_value_info(name, TensorProto.FLOAT, list(shape)))


class _Base:
    """One layer's base perturbation as the layer ops use it.

    ``d_w`` float32[in, out] or [1, in, out] (transposed, sigma folded in), ``d_b`` float32[1, out];
    ``r_w``/``r_b`` float32[S, 1, 1] radial radii (None for gaussian), already divided by the
    weight base's norm when the norm was not applied to ``d_w``.
    """

    def __init__(self, d_w: str, d_b: str, r_w: str | None = None, r_b: str | None = None) -> None:
        self.d_w, self.d_b, self.r_w, self.r_b = d_w, d_b, r_w, r_b


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


def _shape(layer: LayerParams) -> tuple[int, int]:
    out_f, in_f = (int(d) for d in layer.weight_mu.shape)
    return out_f, in_f


def _sigma(g: _Builder, i: int, layer: LayerParams) -> tuple[str, str]:
    return g.const(f"sigma{i}_w", layer.weight_sigma.T), g.const(f"sigma{i}_b", layer.bias_sigma[None])


def _rank_bases(g: _Builder, layers: list[LayerParams], S: int, M: int, radial: bool, offsets: list[int]
                ) -> list[_Base]:
    """Rank-M sign bases from the engine's inputs (module docstring, "the rank-M sign base").

    Per layer, transposed layout: eps^T = (V^T * g_dir) @ (U^T * chi)^T / sqrt(M), with the
    chi radii on the longer side (on V^T's rows instead when in > out).
    """
    L = len(layers)
    base_signs = g.noise(SIGNS_BASE, [offsets[-1], M])       # per layer: V^T rows [in], then U^T rows [out]
    outs = [_shape(layer)[0] for layer in layers]
    sides = [max(_shape(layer)) for layer in layers]
    n_normals = L * M + sum(outs) + (2 * L * S if radial else 0)
    normals = g.noise(NORMALS, [n_normals])                   # gains [L, M] | bias eps | radial radii [2L, S]
    uniforms = g.noise(UNIFORMS, [sum(sides), M // 2])
    gains = g.reshape(g.slice(normals, 0, L * M, axis=0), [L, M])
    gains = g.op("Div", [gains, g.op("ReduceL2", [gains], "norm", axes=[1], keepdims=1)], "gain_dir")
    # chi_M = sqrt(-2 sum of M/2 log-uniforms): -2 ln u ~ chi-square(2), sums of independent ones add dof
    log_u = g.op("ReduceSum", [g.op("Log", [uniforms], "log_u"), g.const("axes", [1], np.int64)], "sum_log_u",
                 keepdims=1)
    chis = g.op("Sqrt", [g.op("Mul", [log_u, g.const("minus2", -2.0)], "chi2")], "chi")    # [sum(sides), 1]
    radii = None
    if radial:
        radii = g.reshape(g.slice(normals, n_normals - 2 * L * S, n_normals, axis=0), [2 * L, S, 1, 1])
    bases, start, side = [], L * M, 0
    for i, layer in enumerate(layers):
        out_f, in_f = _shape(layer)
        sigma_w, sigma_b = _sigma(g, i, layer)
        v_t = g.slice(base_signs, offsets[i], offsets[i] + in_f, axis=0)                 # [in, M]
        u_t = g.slice(base_signs, offsets[i] + in_f, offsets[i + 1], axis=0)           # [out, M]
        v_t = g.op("Mul", [v_t, g.op("Gather", [gains, g.const("row", i, np.int64)], "gain", axis=0)], "v_gain")
        chi = g.slice(chis, side, side + sides[i], axis=0)                             # [max(in, out), 1]
        side += sides[i]
        if out_f >= in_f:
            u_t = g.op("Mul", [u_t, chi], "u_chi")
        else:
            v_t = g.op("Mul", [v_t, chi], "v_chi")
        eps_t = g.op("Gemm", [v_t, u_t], "eps_t", alpha=1.0 / math.sqrt(M), transB=1)    # [in, out]
        d_w = g.op("Mul", [eps_t, sigma_w], "base_w")
        eps_b = g.reshape(g.slice(normals, start, start + out_f, axis=0), [1, out_f])
        start += out_f
        if not radial:
            bases.append(_Base(d_w, g.op("Mul", [eps_b, sigma_b], "base_b")))
            continue
        assert radii is not None
        dir_b = g.op("Div", [eps_b, g.op("ReduceL2", [eps_b], "norm", axes=[1], keepdims=1)], "dir_b")
        r_w = g.op("Gather", [radii, g.const("row", i, np.int64)], "r_w", axis=0)        # [S, 1, 1]
        r_b = g.op("Gather", [radii, g.const("row", L + i, np.int64)], "r_b", axis=0)
        # dividing the S radii by ||eps|| equals dividing the in * out base entries, for fewer multiplies
        r_w = g.op("Div", [r_w, g.op("ReduceL2", [eps_t], "norm", axes=[0, 1], keepdims=1)], "r_w_unit")
        bases.append(_Base(d_w, g.op("Mul", [dir_b, sigma_b], "base_b"), r_w, r_b))
    return bases


def _gaussian_bases(g: _Builder, plan: NetworkPlan, S: int, radial: bool) -> list[_Base]:
    """Full-rank base, fresh per call from in-graph Box-Muller normals (``rank=0``)."""
    z, start, bases = g.normals(plan.parameter_count), 0, []
    for i, layer in enumerate(plan.layers):
        out_f, in_f = _shape(layer)
        sigma_w, sigma_b = _sigma(g, i, layer)
        eps_w = g.reshape(g.slice(z, start, start + in_f * out_f, axis=0), [1, in_f, out_f])
        start += in_f * out_f
        eps_b = g.reshape(g.slice(z, start, start + out_f, axis=0), [1, out_f])
        start += out_f
        if radial:
            eps_w = g.op("Div", [eps_w, g.op("ReduceL2", [eps_w], "norm", axes=[1, 2], keepdims=1)], "dir_w")
            eps_b = g.op("Div", [eps_b, g.op("ReduceL2", [eps_b], "norm", axes=[1], keepdims=1)], "dir_b")
        base = _Base(g.op("Mul", [eps_w, sigma_w], "base_w"), g.op("Mul", [eps_b, sigma_b], "base_b"))
        if radial:
            base.r_w = g.random("RandomNormal", [S, 1, 1], mean=0.0, scale=1.0)
            base.r_b = g.random("RandomNormal", [S, 1, 1], mean=0.0, scale=1.0)
        bases.append(base)
    return bases


def _bank_bases(g: _Builder, plan: NetworkPlan, S: int, radial: bool, bank: int, rng: np.random.Generator
                ) -> list[_Base]:
    """``bank`` stored bases, one picked per call for the whole network."""
    u = g.random("RandomUniform", [1], low=0.0, high=1.0)
    k = g.op("Floor", [g.op("Mul", [u, g.const("bank_size", float(bank))])], "k")
    k = g.op("Min", [k, g.const("bank_last", float(bank - 1))], "k")  # u * M may round up to M in float32
    pick = g.op("Cast", [k], "pick", to=TensorProto.INT64)
    bases = []
    for i, layer in enumerate(plan.layers):
        w_bank, b_bank = _bank(layer, bank, radial, rng)
        base = _Base(g.op("Gather", [g.const(f"bank{i}_w", w_bank), pick], "base_w", axis=0),   # [1, in, out]
                     g.op("Gather", [g.const(f"bank{i}_b", b_bank), pick], "base_b", axis=0))   # [1, out]
        if radial:
            base.r_w = g.random("RandomNormal", [S, 1, 1], mean=0.0, scale=1.0)
            base.r_b = g.random("RandomNormal", [S, 1, 1], mean=0.0, scale=1.0)
        bases.append(base)
    return bases


def flip_graph(
    plan: NetworkPlan,
    draws: int,
    seed: int,
    *,
    rank: int = DEFAULT_RANK,
    bank: int = DEFAULT_BANK,
    bank_seed: int | None = None,
    debug: bool = False,
) -> onnx.ModelProto:
    """Build the flip graph: input ``x`` float32[B, *shape], output ``draws`` float32[S, B, K].

    ``draws``: S per call; ``seed``: base of every random node's seed (``rank=0``
    and bank graphs; the default graph has none, the engine feeds its noise);
    ``rank``: M > 0 for the rank-M sign base fed by the engine (default), 0 for
    a full-rank base drawn in the graph; ``bank``: M > 0 for M stored bases
    instead (``rank`` is then unused); ``bank_seed`` seeds the stored bases
    (default ``seed``). See the module docstring for what each costs and how
    exact it is. ``debug=True`` adds outputs ``sample{i}.weight``
    float32[S, out, in] and ``sample{i}.bias`` float32[S, out]: the weights each
    draw used (tests only; they cost S weight tensors).
    """
    S = int(draws)
    if S < 1:
        raise GraphBuildError(f"draws must be >= 1; got {draws}", field="draws")
    for name, value in (("rank", rank), ("bank", bank)):
        if not isinstance(value, int) or isinstance(value, bool) or value < 0:
            raise GraphBuildError(f"{name} must be an integer >= 0; got {value!r}", field=name)
    if rank % 2:
        raise GraphBuildError(f"rank must be even (its chi radii are sums of rank/2 chi-square(2) terms); got {rank}",
                              field="rank")
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
    offsets = [0]
    for layer in layers:
        offsets.append(offsets[-1] + sum(_shape(layer)))
    fed = not bank and rank > 0
    # Flipout signs of all layers in one block: [S, 1, sum(in + out)]
    sign_block = g.noise(SIGNS_FLIP, [S, 1, offsets[-1]]) if fed else g.signs([S, 1, offsets[-1]])
    signs = [(g.slice(sign_block, offsets[i], offsets[i] + _shape(layer)[1], axis=2),
              g.slice(sign_block, offsets[i] + _shape(layer)[1], offsets[i + 1], axis=2))
             for i, layer in enumerate(layers)]
    if bank:
        rng = np.random.default_rng(int(seed if bank_seed is None else bank_seed))
        bases = _bank_bases(g, plan, S, radial, bank, rng)
        what = f"bank of {bank} stored bases"
    elif rank:
        bases = _rank_bases(g, layers, S, rank, radial, offsets)
        what = f"fresh rank-{rank} sign base per call, noise fed by the engine"
    else:
        bases = _gaussian_bases(g, plan, S, radial)
        what = "fresh full-rank base per call, drawn in the graph"

    x, shared, i = "x", True, 0
    for step in plan.steps:
        if step == "relu":
            x = g.op("Relu", [x], "relu")
        elif step == "flatten":
            if shared:
                x = g.op("Flatten", [x], "flat", axis=1)
        else:
            assert isinstance(step, LayerParams)
            x = _layer(g, x, step, i, S, debug, signs[i], bases[i])
            shared, i = False, i + 1
    g.op("Identity", [x], out="draws")

    x_info = helper.make_tensor_value_info("x", TensorProto.FLOAT, ["B", *plan.input_shape])
    y_info = helper.make_tensor_value_info("draws", TensorProto.FLOAT, [S, "B", plan.outputs])
    doc = (f"demur flip graph ({plan.posterior} posterior, {what}): {S} sign-flipped draws per call, "
           "output draws[S, B, K]")
    graph = helper.make_graph(g.nodes, "flip", [x_info, *g.inputs], [y_info, *g.extra], initializer=g.inits,
                              doc_string=doc)
    return checked_model(graph, "flip", doc)


def _layer(g: _Builder, x: str, layer: LayerParams, i: int, S: int, debug: bool, signs: tuple[str, str],
           base: _Base) -> str:
    """One linear layer: x [B, in] (first) or [S, B, in] -> [S, B, out]."""
    out_f, in_f = _shape(layer)
    a, c = signs  # [S, 1, in], [S, 1, out]
    mean = g.op("MatMul", [x, g.const(f"mu{i}_w", layer.weight_mu.T)], "mean")
    pert = g.op("MatMul", [g.op("Mul", [x, a], "x_signed"), base.d_w], "pert")          # [S, B, out]
    d_b3 = g.op("Unsqueeze", [base.d_b, g.const("axis0", [0], np.int64)], "base_b3")   # [1, 1, out]
    if base.r_w is not None and base.r_b is not None:
        pert = g.op("Add", [g.op("Mul", [pert, base.r_w]), g.op("Mul", [d_b3, base.r_b])], "pert_b")
    else:
        pert = g.op("Add", [pert, d_b3], "pert_b")
    y = g.op("Add", [g.op("Mul", [pert, c], "pert_signed"), mean], "pre")
    y = g.op("Add", [y, g.const(f"mu{i}_b", layer.bias_mu)], "linear")

    if debug:  # the weights each draw used, torch layout
        w = g.op("Mul", [g.op("Transpose", [a], perm=[0, 2, 1]), c])                   # [S, in, out]
        w = g.op("Mul", [w, base.d_w])
        b = g.op("Mul", [c, d_b3])                                                      # [S, 1, out]
        if base.r_w is not None and base.r_b is not None:
            w = g.op("Mul", [w, base.r_w])
            b = g.op("Mul", [b, base.r_b])
        w = g.op("Add", [g.op("Transpose", [w], perm=[0, 2, 1]), g.const("mu_dbg", layer.weight_mu)])
        b = g.op("Add", [g.reshape(b, [S, out_f]), g.const("mu_dbg", layer.bias_mu)])
        g.expose(w, f"sample{i}.weight", [S, out_f, in_f])
        g.expose(b, f"sample{i}.bias", [S, out_f])
    return y
