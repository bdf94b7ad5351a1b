"""export/graphs.py: the ONNX graphs against the torch reference and against the
sampling distributions they claim to draw from.

References:
* torch: ``demur.export.layers.forward_draws`` (torch.nn.functional.linear / conv2d)
  for the same weight draws; agreement within 1e-4 (max abs difference), the
  tolerance the foundation issue sets for float32 graphs.
* Radial posterior: Farquhar, Osborne & Gal, AISTATS 2020, eq. 2:
  w = mu + sigma * (eps / ||eps||) * r, so ||(w - mu) / sigma|| = |r| follows
  the half-normal (scipy.stats.halfnorm) and the direction has unit norm.
* Mean-field Gaussian: w ~ N(mu, sigma^2) elementwise; the sample mean has
  standard error sigma / sqrt(n) and the sample variance sigma^2 * sqrt(2 / (n - 1))
  (normal sampling theory, from memory; any statistics text).
"""

from __future__ import annotations

import numpy as np
import onnx
import onnxruntime as ort
import pytest
import torch
from scipy import stats
from torch import nn

import demur.export.graphs as graphs
from demur.export.errors import GraphBuildError
from demur.export.graphs import means_graph, node_seed, plan_from_model, sampler_graph, stacked_graph
from demur.export.layers import VariationalLinear, build_model, forward_draws, sample_network

TOL = 1e-4  # max abs difference, ONNX vs torch (foundation issue)
Z_MAX = 5.0  # statistical tolerance: |z| <= 5 for every element (false alarm < 1e-4 over ~1e2 elements)

CASES = [  # (arch, input shape, K): MLP and conv, classification (10 logits) and regression (mean, log-var)
    ("mlp", (64,), 10),
    ("conv", (1, 8, 8), 10),
    ("mlp", (10,), 2),
    ("conv", (1, 8, 8), 2),
]


def _session(model: onnx.ModelProto) -> ort.InferenceSession:
    return ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])


def _model(arch: str, shape: tuple[int, ...], k: int, posterior: str, seed: int = 0) -> nn.Sequential:
    torch.manual_seed(seed)
    return build_model(arch, shape, k, posterior, hidden=(32, 16), channels=(4, 8), init_sigma=0.2)


def _means_reference(model: nn.Sequential, x: torch.Tensor) -> np.ndarray:
    h = x
    with torch.no_grad():
        for m in model:
            h = m.forward_mean(h) if hasattr(m, "forward_mean") else m(h)
    return h.numpy()[None]


@pytest.mark.parametrize("posterior", ["radial", "gaussian"])
@pytest.mark.parametrize(("arch", "shape", "k"), CASES)
def test_stacked_graph_equals_torch_forward_draws(arch: str, shape: tuple[int, ...], k: int, posterior: str) -> None:
    """Reference: demur.export.layers.forward_draws on the same draws; max abs diff <= 1e-4."""
    model = _model(arch, shape, k, posterior)
    draws = sample_network(model, 16, torch.Generator().manual_seed(3))
    x = torch.randn(7, *shape, generator=torch.Generator().manual_seed(4))
    expected = forward_draws(model, x, draws).numpy()
    got = _session(stacked_graph(plan_from_model(model, shape), draws)).run(["draws"], {"x": x.numpy()})[0]
    assert got.shape == (16, 7, k) and got.dtype == np.float32
    assert np.abs(got - expected).max() <= TOL


@pytest.mark.parametrize(("arch", "shape", "k"), CASES)
def test_means_graph_equals_torch_forward_mean(arch: str, shape: tuple[int, ...], k: int) -> None:
    """Reference: the torch network of the posterior means (VariationalLayer.forward_mean); <= 1e-4."""
    model = _model(arch, shape, k, "radial")
    x = torch.randn(5, *shape, generator=torch.Generator().manual_seed(5))
    got = _session(means_graph(plan_from_model(model, shape))).run(["draws"], {"x": x.numpy()})[0]
    assert got.shape == (1, 5, k)
    assert np.abs(got - _means_reference(model, x)).max() <= TOL


@pytest.mark.parametrize("posterior", ["radial", "gaussian"])
@pytest.mark.parametrize(("arch", "shape", "k"), CASES)
def test_sampler_graph_output_equals_torch_on_its_own_draws(arch: str, shape: tuple[int, ...], k: int,
                                                            posterior: str) -> None:
    """The sampler's debug outputs are the weights it drew; torch forward_draws on them matches (<= 1e-4)."""
    model = _model(arch, shape, k, posterior)
    plan = plan_from_model(model, shape)
    sess = _session(sampler_graph(plan, 6, seed=11, debug=True))
    x = torch.randn(4, *shape, generator=torch.Generator().manual_seed(6))
    names = [o.name for o in sess.get_outputs()]
    out = dict(zip(names, sess.run(names, {"x": x.numpy()})))
    draws = [{"weight": torch.from_numpy(out[f"sample{i}.weight"]), "bias": torch.from_numpy(out[f"sample{i}.bias"])}
             for i in range(len(plan.layers))]
    assert out["draws"].shape == (6, 4, k)
    assert np.abs(out["draws"] - forward_draws(model, x, draws).numpy()).max() <= TOL


def _one_layer(posterior: str, n_in: int = 12, n_out: int = 6) -> tuple[VariationalLinear, graphs.NetworkPlan]:
    torch.manual_seed(21)
    layer = VariationalLinear(n_in, n_out, posterior=posterior)
    with torch.no_grad():
        layer.weight_mu.normal_(0.0, 1.0)
        layer.bias_mu.normal_(0.0, 1.0)
        # sigma spread over 0.1..1.0 so a swapped mu/sigma or a shared sigma would show
        layer.weight_rho.copy_(torch.log(torch.expm1(torch.rand(n_out, n_in) * 0.9 + 0.1)))
        layer.bias_rho.copy_(torch.log(torch.expm1(torch.rand(n_out) * 0.9 + 0.1)))
    return layer, plan_from_model(nn.Sequential(layer), (n_in,))


def _collect(sess: ort.InferenceSession, n_in: int, calls: int) -> dict[str, np.ndarray]:
    names = [o.name for o in sess.get_outputs() if o.name != "draws"]
    x = np.zeros((1, n_in), np.float32)
    runs = [dict(zip(names, sess.run(names, {"x": x}))) for _ in range(calls)]
    return {n: np.concatenate([r[n] for r in runs]) for n in names}


def test_gaussian_sampler_weights_match_mu_and_sigma() -> None:
    """Mean-field Gaussian: per element, z-tests of the sample mean (SE sigma/sqrt(n)) and of the
    sample variance (SE sigma^2 sqrt(2/(n-1))) stay within 5 (normal sampling theory, from memory)."""
    layer, plan = _one_layer("gaussian")
    got = _collect(_session(sampler_graph(plan, 250, seed=5, debug=True)), 12, calls=16)  # n = 4000
    for part, mu, sigma in (("weight", layer.weight_mu, layer.weight_sigma), ("bias", layer.bias_mu, layer.bias_sigma)):
        w = got[f"sample0.{part}"].astype(np.float64)
        mu, sigma = mu.detach().numpy().astype(np.float64), sigma.detach().numpy().astype(np.float64)
        n = w.shape[0]
        z_mean = (w.mean(axis=0) - mu) / (sigma / np.sqrt(n))
        z_var = (w.var(axis=0, ddof=1) - sigma**2) / (sigma**2 * np.sqrt(2.0 / (n - 1)))
        assert np.abs(z_mean).max() < Z_MAX, part
        assert np.abs(z_var).max() < Z_MAX, part


def test_radial_sampler_direction_has_unit_norm_and_radius_is_half_normal() -> None:
    """Radial (Farquhar et al. 2020, eq. 2): ||eps/||eps|| || = 1 per draw (to 1e-5, float32), and
    ||(w - mu)/sigma|| = |r| ~ scipy.stats.halfnorm (Kolmogorov-Smirnov p > 1e-3); the element
    mean is mu with variance sigma^2 / d (E[u_i^2] = 1/d for u uniform on the sphere), z <= 5."""
    layer, plan = _one_layer("radial")
    got = _collect(_session(sampler_graph(plan, 250, seed=8, debug=True)), 12, calls=8)  # n = 2000
    for part, mu, sigma in (("weight", layer.weight_mu, layer.weight_sigma), ("bias", layer.bias_mu, layer.bias_sigma)):
        direction = got[f"direction0.{part}"].reshape(2000, -1).astype(np.float64)
        assert np.allclose(np.linalg.norm(direction, axis=1), 1.0, atol=1e-5)
        mu, sigma = mu.detach().numpy().astype(np.float64), sigma.detach().numpy().astype(np.float64)
        w = got[f"sample0.{part}"].astype(np.float64)
        radius = np.linalg.norm(((w - mu) / sigma).reshape(len(w), -1), axis=1)
        assert stats.kstest(radius, stats.halfnorm.cdf).pvalue > 1e-3, part
        d = mu.size
        z_mean = (w.mean(axis=0) - mu) / (sigma / np.sqrt(d) / np.sqrt(len(w)))
        assert np.abs(z_mean).max() < Z_MAX, part


def test_sampler_draws_change_per_call_and_repeat_in_fresh_sessions() -> None:
    """onnxruntime RandomNormal with a seed attribute: a new draw per call within a session, the
    same sequence in a fresh session (behaviour observed on this onnxruntime; the contract we rely on)."""
    model = _model("mlp", (10,), 2, "radial")
    proto = sampler_graph(plan_from_model(model, (10,)), 4, seed=99)
    x = np.ones((3, 10), np.float32)
    first, second = _session(proto), _session(proto)
    a = [first.run(["draws"], {"x": x})[0] for _ in range(3)]
    b = [second.run(["draws"], {"x": x})[0] for _ in range(3)]
    assert not np.array_equal(a[0], a[1]) and not np.array_equal(a[1], a[2])
    for u, v in zip(a, b):
        np.testing.assert_array_equal(u, v)


def test_sampler_nodes_have_distinct_seeds() -> None:
    """Two RandomNormal nodes with one seed would draw identical noise (correlated layers)."""
    proto = sampler_graph(plan_from_model(_model("conv", (1, 8, 8), 10, "radial"), (1, 8, 8)), 3, seed=1)
    seeds = [a.f for n in proto.graph.node if n.op_type == "RandomNormal" for a in n.attribute if a.name == "seed"]
    assert len(seeds) == 3 * 2 * 2  # 3 layers x (weight, bias) x (eps, r)
    assert len(set(seeds)) == len(seeds)
    assert seeds[0] == node_seed(1, 0) and all(float(s).is_integer() and s < graphs.SEED_MODULUS for s in seeds)


def test_stacked_weights_are_stored_as_s_in_out_initializers() -> None:
    """The documented layout: linear weights [S, in, out] so one MatMul broadcasts over the draws."""
    model = _model("mlp", (64,), 10, "radial")
    proto = stacked_graph(plan_from_model(model, (64,)), sample_network(model, 5))
    shapes = sorted(tuple(t.dims) for t in proto.graph.initializer if len(t.dims) == 3)
    assert (5, 64, 32) in shapes and (5, 32, 16) in shapes and (5, 16, 10) in shapes
    assert proto.opset_import[0].version == graphs.OPSET


def test_plan_refuses_modules_without_a_graph_form() -> None:
    model = nn.Sequential(nn.Flatten(), VariationalLinear(4, 3), nn.Tanh(), VariationalLinear(3, 2))
    with pytest.raises(GraphBuildError, match="Tanh") as info:
        plan_from_model(model, (4,))
    assert info.value.field == "model[2]"


def test_stacked_graph_refuses_draws_of_the_wrong_shape() -> None:
    model = _model("mlp", (10,), 2, "radial")
    draws = sample_network(model, 4)
    draws[1] = {"weight": draws[1]["weight"][:, :3], "bias": draws[1]["bias"]}
    with pytest.raises(GraphBuildError, match=r"draws\[1\] must be weight"):
        stacked_graph(plan_from_model(model, (10,)), draws)


def test_all_is_exact() -> None:
    defined_here = {n for n, v in vars(graphs).items()
                    if not n.startswith("_") and getattr(v, "__module__", "") == graphs.__name__}
    public = defined_here | {"IR_VERSION", "OPSET", "SEED_MODULUS"}
    assert set(graphs.__all__) == public
