"""export/flip.py: fresh sign-flipped draws per call.

References named beside each check:
* torch's own ``F.linear`` through ``demur.export.layers.forward_draws`` (the graph's
  two-matmul form must equal the plain forward pass of the weights it used);
* Flipout (Wen et al., ICLR 2018, eq. 4) and the symmetry argument in the
  module docstring: each draw's weights follow the base's law exactly;
* scipy.stats.kstest against ``scipy.stats.norm`` (gaussian posterior, one
  weight at a time over calls), ``scipy.stats.halfnorm`` (radial radius |r|,
  Farquhar et al., AISTATS 2020, eq. 2) and ``scipy.stats.beta(1/2, (d-1)/2)``
  (the squared coordinate of a direction uniform on the unit sphere in d
  dimensions, a textbook fact); scipy.stats.binomtest for sign balance;
* scipy.stats.ks_2samp against samples of the radial definition itself
  (each weight's marginal u_k * r);
* ``numpy.linalg.matrix_rank`` for the documented approximation (each call's
  base is a rank-M matrix);
* predictive summaries compared with independent draws
  (``demur.serve.core.summary.summarise``) on bundled digits, tolerances stated there.

The graphs' noise inputs are filled here by ``_feed`` (numpy's ``integers``,
``standard_normal``, ``random``), an implementation independent of the
engine's (serve/adapters/engine.py, tested in tests/serve/test_engine.py).
KS tests use fixed seeds; the significance level 0.001 is common practice.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import onnxruntime as ort
import pytest
import torch
from scipy import stats

from demur.export import flip
from demur.export.errors import GraphBuildError
from demur.export.flip import DEFAULT_RANK, flip_graph
from demur.export.graphs import NetworkPlan, plan_from_model, stacked_graph
from demur.export.layers import build_model, forward_draws, sample_network

ALPHA = 1e-3
MODES = [{"rank": DEFAULT_RANK}, {"rank": 0}, {"bank": 3}]   # the default rank-M base, full-rank, stored bank
MODE_IDS = ["rank16", "full", "bank3"]


def test_all_is_exact() -> None:
    assert sorted(flip.__all__) == ["DEFAULT_BANK", "DEFAULT_RANK", "flip_graph"]


def _model(posterior: str, hidden: tuple[int, ...] = (12,), inputs: int = 6, outputs: int = 3) -> Any:
    torch.manual_seed(3)
    return build_model("mlp", [inputs], outputs, posterior, hidden=hidden, init_sigma=0.3)


def _session(proto: Any) -> ort.InferenceSession:
    opts = ort.SessionOptions()
    opts.intra_op_num_threads = 1
    opts.inter_op_num_threads = 1
    opts.log_severity_level = 3
    return ort.InferenceSession(proto.SerializeToString(), opts, providers=["CPUExecutionProvider"])


def _feed(session: ort.InferenceSession, x: np.ndarray, rng: np.random.Generator) -> dict[str, np.ndarray]:
    """x plus fresh values for the noise inputs, by the laws the module docstring names."""
    feed = {"x": x}
    for arg in session.get_inputs()[1:]:
        law, shape = arg.name.split(".")[0], arg.shape
        if law == "signs":
            feed[arg.name] = rng.choice(np.array([-1.0, 1.0], np.float32), size=shape)
        elif law == "normals":
            feed[arg.name] = rng.standard_normal(shape).astype(np.float32)
        else:
            assert law == "uniforms", arg.name
            feed[arg.name] = (1.0 - rng.random(shape)).astype(np.float32)
    return feed


def _run(session: ort.InferenceSession, names: list[str], x: np.ndarray, rng: np.random.Generator) -> list[Any]:
    return session.run(names, _feed(session, x, rng))


def _samples(session: ort.InferenceSession, x: np.ndarray, layers: int, rng: np.random.Generator
             ) -> tuple[np.ndarray, list[dict[str, Any]]]:
    names = ["draws"] + [f"sample{i}.{p}" for i in range(layers) for p in ("weight", "bias")]
    out = _run(session, names, x, rng)
    draws = [{"weight": torch.from_numpy(out[1 + 2 * i]), "bias": torch.from_numpy(out[2 + 2 * i])}
             for i in range(layers)]
    return out[0], draws


@pytest.mark.parametrize("posterior", ["gaussian", "radial"])
@pytest.mark.parametrize("mode", MODES, ids=MODE_IDS)
def test_output_equals_torch_forward_of_the_weights_each_draw_used(posterior: str, mode: dict[str, int]) -> None:
    # reference: torch F.linear via demur.export.layers.forward_draws, max abs diff <= 1e-4
    model = _model(posterior)
    plan = plan_from_model(model, [6])
    session = _session(flip_graph(plan, 5, seed=11, debug=True, **mode))
    x = np.random.default_rng(0).standard_normal((4, 6)).astype(np.float32)
    draws, weights = _samples(session, x, len(plan.layers), np.random.default_rng(1))
    assert draws.shape == (5, 4, 3)
    reference = forward_draws(model, torch.from_numpy(x), weights).numpy()
    assert np.abs(draws - reference).max() <= 1e-4


def test_default_graph_declares_the_documented_noise_inputs_and_no_random_nodes() -> None:
    # the contract with serve/adapters/engine.py (module docstring): names, laws, float32, fixed shapes
    from demur.serve.adapters.engine import _NOISE_LAWS

    S, M = 4, DEFAULT_RANK
    for posterior in ("gaussian", "radial"):
        proto = flip_graph(plan_from_model(_model(posterior), [6]), S, seed=0)
        shapes = {i.name: [d.dim_value for d in i.type.tensor_type.shape.dim] for i in proto.graph.input[1:]}
        width, L, outs, sides = (6 + 12) + (12 + 3), 2, 12 + 3, 12 + 12
        assert shapes == {"signs.flip": [S, 1, width], "signs.base": [width, M],
                          "normals": [L * M + outs + (2 * L * S if posterior == "radial" else 0)],
                          "uniforms": [sides, M // 2]}
        assert {name.split(".")[0] for name in shapes} <= set(_NOISE_LAWS)
        assert all(i.type.tensor_type.elem_type == 1 for i in proto.graph.input)  # FLOAT
        assert not [n for n in proto.graph.node if n.op_type.startswith("Random")]


@pytest.mark.parametrize("mode", MODES[:2], ids=MODE_IDS[:2])
def test_gaussian_weight_marginals_match_the_posterior_per_weight(mode: dict[str, int]) -> None:
    # reference: scipy.stats.kstest against N(0, 1) of (w - mu) / sigma, one weight at a time,
    # over independent calls (one draw per call: draws within a call share |eps|). Both layers:
    # 6 -> 12 carries the rank base's chi radii on its rows, 12 -> 3 on its columns.
    model = _model("gaussian")
    plan = plan_from_model(model, [6])
    session = _session(flip_graph(plan, 4, seed=5, debug=True, **mode))
    x, rng = np.zeros((1, 6), np.float32), np.random.default_rng(2)
    names = [f"sample{i}.{p}" for i in range(2) for p in ("weight", "bias")]
    z: list[list[np.ndarray]] = [[], []]
    for _ in range(600):
        out = _run(session, names, x, rng)
        for i, layer in enumerate(plan.layers):
            z[i].append(np.concatenate([((out[2 * i][0] - layer.weight_mu) / layer.weight_sigma).ravel(),
                                        (out[2 * i + 1][0] - layer.bias_mu) / layer.bias_sigma]))
    for i in range(2):
        zi = np.asarray(z[i])  # [calls, weights of layer i, then its biases]
        for j in (0, 7, 20, zi.shape[1] - 1):  # weights, and the last bias
            assert stats.kstest(zi[:, j], stats.norm.cdf).pvalue > ALPHA, (i, j)
        # pairs of weights sharing a row (0, 1) or a column (0, in): uncorrelated over calls, 4 standard errors
        in_f = plan.layers[i].weight_mu.shape[1]
        for k in (1, in_f):
            assert abs(np.corrcoef(zi[:, 0], zi[:, k])[0, 1]) < 4 / np.sqrt(len(zi))


def _first_layer_perturbation(draws: int, noise_seed: int) -> tuple[NetworkPlan, np.ndarray]:
    """(w - mu) / sigma of the first layer for each of ``draws`` draws of one call (float64
    [draws, 64, 32]) of a 32-64-10 gaussian network's default flip graph."""
    model = _model("gaussian", hidden=(64,), inputs=32)
    plan = plan_from_model(model, [32])
    layer = plan.layers[0]
    session = _session(flip_graph(plan, draws, seed=5, debug=True))
    w = _run(session, ["sample0.weight"], np.zeros((1, 32), np.float32), np.random.default_rng(noise_seed))[0]
    return plan, ((w - layer.weight_mu) / layer.weight_sigma).astype(np.float64)


def test_draws_within_one_call_are_pairwise_uncorrelated() -> None:
    # Flipout signs (Wen et al. 2018, section 3.1): E[c_s c_t] = 0 for s != t; pooled over one layer's weights
    _, pert = _first_layer_perturbation(draws=4, noise_seed=3)
    pert = pert.reshape(4, -1)
    assert abs(np.corrcoef(pert)[0, 1]) < 4 / np.sqrt(pert.shape[1])  # 4 standard errors of a correlation


def test_each_calls_rank_base_is_a_rank_m_matrix_as_documented() -> None:
    # the documented approximation, checked with numpy.linalg.matrix_rank: (w - mu) / sigma of one draw
    # has rank DEFAULT_RANK (the posterior's independent perturbation would have full rank 32)
    plan, pert = _first_layer_perturbation(draws=2, noise_seed=4)
    layer = plan.layers[0]
    assert np.linalg.matrix_rank(pert[0], tol=1e-3) == DEFAULT_RANK
    full = _session(flip_graph(plan, 2, seed=5, rank=0, debug=True)).run(["sample0.weight"], {"x": np.zeros((1, 32),
                                                                                                    np.float32)})[0]
    assert np.linalg.matrix_rank(((full[0] - layer.weight_mu) / layer.weight_sigma).astype(np.float64), tol=1e-3) == 32


@pytest.mark.parametrize("mode", MODES[:2], ids=MODE_IDS[:2])
def test_radial_radius_is_half_normal_and_direction_coordinates_follow_the_sphere_law(mode: dict[str, int]) -> None:
    # references: scipy.stats.halfnorm for ||(w - mu) / sigma|| = |r| (Farquhar et al. 2020, eq. 2), exact;
    # scipy.stats.beta(1/2, (d-1)/2) for the squared coordinate of a uniform unit direction: exact for the
    # full-rank base, per coordinate only for the rank base (module docstring: KS distance <= 0.01, far
    # below what 500 calls resolve; the rank-M direction is not uniform jointly, see the matrix-rank test)
    model = _model("radial")
    plan = plan_from_model(model, [6])
    layer = plan.layers[0]
    d = layer.weight_mu.size
    session = _session(flip_graph(plan, 4, seed=9, debug=True, **mode))
    x, rng = np.zeros((1, 6), np.float32), np.random.default_rng(5)
    radii, coords, weights = [], [], []
    for _ in range(500):
        w = _run(session, ["sample0.weight"], x, rng)[0]                 # [S, out, in]
        pert = ((w - layer.weight_mu) / layer.weight_sigma).reshape(len(w), -1)
        norms = np.linalg.norm(pert, axis=1)
        radii.extend(norms)                                            # r is fresh per draw
        direction = pert[0] / norms[0]
        np.testing.assert_allclose(np.linalg.norm(direction), 1.0, rtol=1e-5)
        coords.append(direction[[0, d // 2, d - 1]])
        weights.append(pert[0, [0, d // 2, d - 1]])
    assert stats.kstest(radii, stats.halfnorm.cdf).pvalue > ALPHA
    coords = np.asarray(coords)
    for j in range(coords.shape[1]):
        assert stats.kstest(coords[:, j] ** 2, stats.beta(0.5, (d - 1) / 2).cdf).pvalue > ALPHA
        assert stats.binomtest(int((coords[:, j] > 0).sum()), len(coords), 0.5).pvalue > ALPHA  # symmetric
    # each weight's own marginal, (w - mu) / sigma = u_k * r: two-sample KS (scipy.stats.ks_2samp) against
    # 20000 draws of the radial definition itself (numpy: a normalised N(0, I_d) vector times N(0, 1))
    ref_rng = np.random.default_rng(10)
    eps = ref_rng.standard_normal((20000, d))
    exact = eps[:, 0] / np.linalg.norm(eps, axis=1) * ref_rng.standard_normal(20000)
    for j in range(3):
        assert stats.ks_2samp(np.asarray(weights)[:, j], exact).pvalue > ALPHA


def test_bank_mode_is_exact_over_the_stored_bases_pooled_over_weights() -> None:
    # reference: scipy.stats.kstest against N(0, 1); with a bank the law holds over the export-time
    # draw, so the check pools the weights of one layer (per weight it takes only 2 * bank values)
    model = _model("gaussian", hidden=(64,), inputs=32)
    plan = plan_from_model(model, [32])
    layer = plan.layers[0]
    session = _session(flip_graph(plan, 2, seed=1, bank=3, debug=True))
    w = session.run(["sample0.weight"], {"x": np.zeros((1, 32), np.float32)})[0]
    z = ((w[0] - layer.weight_mu) / layer.weight_sigma).ravel()
    assert stats.kstest(z, stats.norm.cdf).pvalue > ALPHA


def test_default_graph_is_a_function_of_its_noise() -> None:
    # no hidden state: the same noise gives the same draws, new noise new ones (within a call too)
    plan = plan_from_model(_model("radial"), [6])
    session = _session(flip_graph(plan, 8, seed=21))
    x = np.random.default_rng(1).standard_normal((3, 6)).astype(np.float32)
    feed = _feed(session, x, np.random.default_rng(6))
    first = session.run(["draws"], feed)[0]
    np.testing.assert_array_equal(session.run(["draws"], feed)[0], first)
    other = session.run(["draws"], _feed(session, x, np.random.default_rng(7)))[0]
    assert not np.allclose(first, other)
    assert not np.allclose(first[0], first[1])


@pytest.mark.parametrize("mode", MODES[1:], ids=MODE_IDS[1:])
def test_in_graph_noise_differs_between_calls_and_repeats_under_a_fixed_seed(mode: dict[str, int]) -> None:
    plan = plan_from_model(_model("radial"), [6])
    proto = flip_graph(plan, 8, seed=21, **mode)
    x = np.random.default_rng(1).standard_normal((3, 6)).astype(np.float32)
    a, b = _session(proto), _session(proto)
    first, second = a.run(["draws"], {"x": x})[0], a.run(["draws"], {"x": x})[0]
    assert not np.allclose(first, second)
    assert not np.allclose(first[0], first[1])  # draws within a call differ too
    np.testing.assert_array_equal(b.run(["draws"], {"x": x})[0], first)  # seeded stream repeats


def test_bad_arguments_are_refused_with_a_named_error() -> None:
    plan = plan_from_model(_model("radial"), [6])
    with pytest.raises(GraphBuildError, match="rank must be even") as info:
        flip_graph(plan, 4, seed=0, rank=5)
    assert info.value.field == "rank"
    with pytest.raises(GraphBuildError, match="bank must be an integer >= 0; got -1"):
        flip_graph(plan, 4, seed=0, bank=-1)
    torch.manual_seed(0)
    model = build_model("conv", [1, 8, 8], 10, "radial", channels=(2,))
    with pytest.raises(GraphBuildError, match="VariationalLinear layers only"):
        flip_graph(plan_from_model(model, [1, 8, 8]), 4, seed=0)


def test_parameter_memory_is_a_small_multiple() -> None:
    # stored numbers: mu + sigma (rank base, full-rank base) or mu + bank bases, plus a few hundred
    # scalars and slice bounds; stacked S = 32 stores 32x
    plan = plan_from_model(_model("radial", hidden=(64, 64), inputs=64, outputs=10), [64])
    n = plan.parameter_count
    for mode, factor in (({}, 2), ({"rank": 0}, 2), ({"bank": 3}, 4)):
        stored = sum(int(np.prod(t.dims)) for t in flip_graph(plan, 32, seed=0, **mode).graph.initializer)
        assert stored <= factor * n + 256, (mode, stored / n)


@pytest.mark.slow
def test_predictive_summaries_agree_with_independent_draws_on_the_digits(demo_checkpoint) -> None:
    """Flip (default rank-16 base, S = 32 per call) against true independent draws (stacked graph,
    512 draws) on 300 test digits. Tolerances: mean probabilities within 0.02 on average per case
    and class entry (Monte Carlo error of a 256-draw mean of probabilities is about 0.01 at sigma
    0.15, so 0.02 allows two standard errors); the average per-case mutual information of 32-draw
    sets within 15% of the stacked 32-draw sets' (both estimators have the same S, so the same
    small-sample bias). Predicted labels agree on at least 97% of cases. The trained demo's
    posterior is narrow (test-set MI of a few 1e-6 nats), so this mostly checks the plumbing;
    the noisy-network test below checks the statistics."""
    from demur.serve.core.summary import summarise

    from demur.export.datasets import load_dataset
    from demur.export.training import load_checkpoint

    model, meta = load_checkpoint(demo_checkpoint)
    data = load_dataset("digits")
    inputs = meta["inputs"]
    center, scale = np.asarray(inputs["center"]), np.asarray(inputs["scale"])
    x = ((data.x_test[:300] - center) / scale).astype(np.float32).reshape(-1, *inputs["shape"])
    plan = plan_from_model(model, inputs["shape"])

    stacked = _session(stacked_graph(plan, sample_network(model, 512, torch.Generator().manual_seed(0))))
    ref = stacked.run(["draws"], {"x": x})[0]                              # [512, N, 10]
    flipped, rng = _session(flip_graph(plan, 32, seed=4)), np.random.default_rng(8)
    got = np.concatenate([_run(flipped, ["draws"], x, rng)[0] for _ in range(8)])  # [256, N, 10]

    def probs(d: np.ndarray) -> np.ndarray:
        return summarise("classification", d, 0.9, {}).mean_probs

    p_ref, p_got = probs(ref), probs(got)
    assert np.abs(p_ref - p_got).mean() < 0.02
    assert (p_ref.argmax(1) == p_got.argmax(1)).mean() >= 0.97
    mi_ref = np.mean([summarise("classification", ref[i:i + 32], 0.9, {}).mutual_information.mean()
                      for i in range(0, 512, 32)])
    mi_got = np.mean([summarise("classification", got[i:i + 32], 0.9, {}).mutual_information.mean()
                      for i in range(0, 256, 32)])
    assert abs(mi_got - mi_ref) <= 0.15 * mi_ref, (mi_got, mi_ref)


@pytest.mark.parametrize(("posterior", "sigma"), [("radial", 2.0), ("gaussian", 0.05)])
def test_summaries_agree_with_independent_draws_on_a_noisy_network(posterior: str, sigma: float) -> None:
    """An untrained 64-64-10 network with wide sigmas (MI ~0.02-0.2 nats) on 200 bundled digits
    (sklearn.datasets.load_digits), default rank-16 flip graph, 64 calls of 32 draws, against 2048
    independent draws (torch, demur.export.layers.sample_network + forward_draws). Tolerances:
    mean |delta p| < 0.01 (Monte Carlo error of 2048-draw means, a few 1e-3); mean MI of 32-draw
    sets within 15% (module docstring, measured on 64-256-256-10: gaussian -0.8 +- 0.6%, radial
    -3.8 +- 1.5%; here gaussian +0.4%, radial -7%; draws within one call share |eps|); the spread
    (sd) of one call's MI over calls at most 4x that of independent 32-draw sets (measured here:
    gaussian 2.7x, radial 0.9x; a layer-wide normal gain instead of the chi radii: gaussian 11x)."""
    from sklearn.datasets import load_digits

    from demur.serve.core.summary import summarise

    torch.manual_seed(0)
    model = build_model("mlp", [64], 10, posterior, hidden=(64,), init_sigma=sigma)
    raw = load_digits().data[-200:]
    x = ((raw - raw.mean(0)) / np.maximum(raw.std(0), 1.0)).astype(np.float32)
    plan = plan_from_model(model, [64])
    gen = torch.Generator().manual_seed(0)
    with torch.no_grad():
        ref = np.concatenate([forward_draws(model, torch.from_numpy(x), sample_network(model, 256, gen)).numpy()
                              for _ in range(8)])                                       # [2048, 200, 10]
    flipped, rng = _session(flip_graph(plan, 32, seed=4)), np.random.default_rng(9)
    got = np.concatenate([_run(flipped, ["draws"], x, rng)[0] for _ in range(64)])      # [2048, 200, 10]

    def summary(d: np.ndarray) -> Any:
        return summarise("classification", d, 0.9, {})

    assert np.abs(summary(ref).mean_probs - summary(got).mean_probs).mean() < 0.01
    mi_ref = np.array([summary(ref[i:i + 32]).mutual_information.mean() for i in range(0, 2048, 32)])
    mi_got = np.array([summary(got[i:i + 32]).mutual_information.mean() for i in range(0, 2048, 32)])
    assert abs(mi_got.mean() - mi_ref.mean()) <= 0.15 * mi_ref.mean(), (mi_got.mean(), mi_ref.mean())
    assert mi_got.std() <= 4 * mi_ref.std(), (mi_got.std(), mi_ref.std())
