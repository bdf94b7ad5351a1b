"""export/layers.py: variational layers, their noise, KL and whole-network draws.

References named beside each check: torch.distributions (Gaussian KL),
scipy.stats (chi, halfnorm, uniform distributions of sample norms),
Farquhar, Osborne & Gal, "Radial Bayesian Neural Networks", AISTATS 2020.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats
import torch
import torch.nn.functional as F
from torch import nn
from torch.distributions import Normal, kl_divergence

import demur.export.layers as layers
from demur.export.errors import LayerConfigError
from demur.export.layers import (
    VariationalConv2d,
    VariationalLinear,
    build_model,
    forward_draws,
    inverse_softplus,
    sample_network,
    total_kl,
    variational_layers,
)

# KS tests on 2,000 samples: reject only below p = 1e-3, so a correct sampler
# fails about once in a thousand seeds; the seeds are fixed, so runs repeat.
P_MIN = 1e-3
N_DRAWS = 2000


def _standard(layer: layers.VariationalLayer) -> layers.VariationalLayer:
    """mu = 0, sigma = 1 everywhere, so a draw is the raw perturbation."""
    with torch.no_grad():
        for p in (layer.weight_mu, layer.bias_mu):
            p.zero_()
        for p in (layer.weight_rho, layer.bias_rho):
            p.fill_(inverse_softplus(1.0))
    return layer


def _random_params(layer: layers.VariationalLayer, seed: int) -> layers.VariationalLayer:
    g = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        for p in layer.parameters():
            p.copy_(torch.randn(p.shape, generator=g, dtype=p.dtype) * 2.0)
    return layer


def test_inverse_softplus_roundtrip():
    # torch.nn.functional.softplus is the reference
    for s in (1e-4, 1e-3, 0.05, 1.0, 7.0):
        assert F.softplus(torch.tensor(inverse_softplus(s), dtype=torch.float64)).item() == pytest.approx(s, rel=1e-9)


@pytest.mark.parametrize("prior_scale", [0.3, 1.0, 2.5])
@pytest.mark.parametrize(
    "make", [lambda **k: VariationalLinear(7, 5, **k), lambda **k: VariationalConv2d(3, 4, 3, **k)]
)
def test_gaussian_kl_matches_torch_distributions(make, prior_scale):
    # reference: torch.distributions.kl_divergence(Normal(mu, sigma), Normal(0, prior)), summed; 1e-6 absolute
    layer = _random_params(make(posterior="gaussian", prior_scale=prior_scale), seed=3).double()
    want = sum(
        kl_divergence(Normal(mu, sigma), Normal(torch.zeros_like(mu), prior_scale)).sum()
        for mu, sigma in ((layer.weight_mu, layer.weight_sigma), (layer.bias_mu, layer.bias_sigma))
    )
    assert abs(layer.kl().item() - want.item()) <= 1e-6
    # float32 too: same sums up to float32 rounding (relative 1e-6)
    layer32 = layer.float()
    want32 = sum(
        kl_divergence(Normal(mu, sigma), Normal(torch.zeros_like(mu), prior_scale)).sum()
        for mu, sigma in ((layer32.weight_mu, layer32.weight_sigma), (layer32.bias_mu, layer32.bias_sigma))
    )
    assert layer32.kl().item() == pytest.approx(want32.item(), rel=1e-6)


def test_radial_kl_estimate_is_unbiased():
    # Farquhar et al. 2020, sec. 3.1: KL = -sum log sigma (entropy, up to a constant)
    # + E_q[-log p(w)] (cross-entropy, by Monte Carlo). For the radial q the expectation
    # has a closed form: E[w_i^2] = mu_i^2 + sigma_i^2 E[r^2] E[u_i^2] = mu_i^2 + sigma_i^2 / d,
    # because u is uniform on the unit sphere (E[u_i^2] = 1/d) and r ~ N(0, 1).
    p = 0.7
    layer = _random_params(VariationalLinear(6, 4, posterior="radial", prior_scale=p), seed=5).double()
    torch.manual_seed(0)
    want = 0.0
    with torch.no_grad():
        est = torch.stack([layer.kl() for _ in range(3000)])
        for mu, sigma in ((layer.weight_mu, layer.weight_sigma), (layer.bias_mu, layer.bias_sigma)):
            d = mu.numel()
            want += float(-torch.log(sigma).sum())
            want += float(((mu.square() + sigma.square() / d) / (2 * p * p)).sum())
            want += d * (math.log(p) + 0.5 * math.log(2 * math.pi))
    se = float(est.std()) / math.sqrt(len(est))
    assert abs(float(est.mean()) - want) < 5 * se  # 5 standard errors (common practice for MC checks)


def test_radial_kl_has_gradients_for_mu_and_rho():
    layer = VariationalLinear(4, 3, posterior="radial")
    layer.kl().backward()
    for p in layer.parameters():
        assert p.grad is not None and torch.isfinite(p.grad).all()


@pytest.mark.parametrize("d_in,d_out", [(20, 50), (50, 80)])
def test_gaussian_perturbation_norm_is_chi_thin_shell(d_in, d_out):
    # reference: the norm of a d-dim standard Gaussian is chi(d) (scipy.stats.chi);
    # thin-shell concentration: mean ~ sqrt(d), spread O(1) whatever d
    layer = _standard(VariationalLinear(d_in, d_out, posterior="gaussian"))
    with torch.no_grad():
        w = layer.draw(N_DRAWS, torch.Generator().manual_seed(11))["weight"]
    norms = w.reshape(N_DRAWS, -1).norm(dim=1).double().numpy()
    d = d_in * d_out
    assert scipy.stats.kstest(norms, scipy.stats.chi(d).cdf).pvalue > P_MIN
    assert abs(norms.mean() / math.sqrt(d) - 1) < 0.01
    assert norms.std() < 1.0  # chi(d) std -> 1/sqrt(2) ~ 0.707 as d grows


@pytest.mark.parametrize("make", [lambda: VariationalLinear(20, 50, posterior="radial"),
                                  lambda: VariationalLinear(50, 80, posterior="radial"),
                                  lambda: VariationalConv2d(16, 32, 3, posterior="radial")])
def test_radial_perturbation_norm_is_halfnormal_whatever_d(make):
    # Farquhar et al. 2020, eq. 2: ||(eps/||eps||) * r|| = |r|, r ~ N(0, 1) -> half-normal
    # (scipy.stats.halfnorm), mean sqrt(2/pi) ~ 0.798 for every d
    layer = _standard(make())
    with torch.no_grad():
        draw = layer.draw(N_DRAWS, torch.Generator().manual_seed(12))
    for key in ("weight", "bias"):  # normalised per parameter tensor
        norms = draw[key].reshape(N_DRAWS, -1).norm(dim=1).double().numpy()
        assert scipy.stats.kstest(norms, scipy.stats.halfnorm.cdf).pvalue > P_MIN
        se = scipy.stats.halfnorm.std() / math.sqrt(N_DRAWS)
        assert abs(norms.mean() - math.sqrt(2 / math.pi)) < 5 * se
    d = draw["weight"][0].numel()
    chi = scipy.stats.kstest(draw["weight"].reshape(N_DRAWS, -1).norm(dim=1).double().numpy(), scipy.stats.chi(d).cdf)
    assert chi.pvalue < 1e-12  # not the Gaussian's thin shell


@pytest.mark.parametrize("posterior", ["radial", "gaussian"])
def test_init_spread_is_each_weights_initial_sd(posterior):
    # Farquhar et al. 2020, eq. 2: a coordinate of the uniform unit direction has variance 1/d
    # and E[r^2] = 1, so a radial weight's sd is sigma / sqrt(d); init_spread sets that sd
    # (radial sigma = spread * sqrt(d)), a Gaussian weight's sd is sigma itself. The mean square
    # of (w - mu) pooled over the 240 weights and 2,000 draws is, for radial, exactly
    # spread^2 * mean(r^2) (the direction has unit norm), i.e. spread^2 * chi2(2000) / 2000;
    # for Gaussian spread^2 * chi2(480000) / 480000, narrower. 99.9% interval from scipy.stats.chi2.
    layer = VariationalLinear(40, 6, posterior=posterior, init_spread=0.02)
    expected_sigma = 0.02 * math.sqrt(240) if posterior == "radial" else 0.02
    assert torch.allclose(layer.weight_sigma, torch.full((6, 40), expected_sigma), rtol=1e-5)
    with torch.no_grad():
        w = layer.draw(N_DRAWS, torch.Generator().manual_seed(21))["weight"] - layer.weight_mu
    var = w.double().square().mean().item()  # mean zero by construction: pooled E[(w - mu)^2]
    dof = N_DRAWS  # exact for radial, conservative for Gaussian (see above)
    lo, hi = scipy.stats.chi2.ppf([0.0005, 0.9995], dof) / dof
    assert lo * 0.02**2 < var < hi * 0.02**2
    with pytest.raises(LayerConfigError, match="init_spread must be a positive number"):
        VariationalLinear(4, 2, init_spread=0.0)


def test_radial_direction_is_unit_and_uniform_on_the_sphere():
    # The direction eps/||eps|| has unit norm, and is uniform on the sphere: in 3-D each
    # coordinate of a uniform point on the sphere is Uniform(-1, 1) (Archimedes' hat-box
    # theorem), checked with scipy.stats.uniform(-1, 2).
    layer = _standard(VariationalLinear(3, 1, posterior="radial"))
    with torch.no_grad():
        w = layer.draw(N_DRAWS, torch.Generator().manual_seed(13))["weight"].reshape(N_DRAWS, 3).double()
    direction = w / w.norm(dim=1, keepdim=True)
    np.testing.assert_allclose(direction.norm(dim=1).numpy(), 1.0, atol=1e-12)
    for j in range(3):
        assert scipy.stats.kstest(direction[:, j].numpy(), scipy.stats.uniform(-1, 2).cdf).pvalue > P_MIN


def test_gaussian_draws_match_mu_and_sigma():
    # w = mu + sigma * eps: sample mean and std per weight within 5 standard errors
    layer = _random_params(VariationalLinear(3, 2, posterior="gaussian"), seed=1)
    with torch.no_grad():
        layer.weight_rho.copy_(torch.tensor([[-2.0, 0.0, 1.0], [0.5, -1.0, 2.0]]))
        w = layer.draw(N_DRAWS, torch.Generator().manual_seed(2))["weight"].double()
    sigma = layer.weight_sigma.double()
    assert ((w.mean(0) - layer.weight_mu.double()).abs() < 5 * sigma / math.sqrt(N_DRAWS)).all()
    assert ((w.std(0) / sigma - 1).abs() < 5 / math.sqrt(2 * N_DRAWS)).all()


@pytest.mark.parametrize("posterior", ["radial", "gaussian"])
def test_draw_shapes_and_repeatability(posterior):
    lin = VariationalLinear(64, 10, posterior=posterior)
    conv = VariationalConv2d(1, 16, 3, padding=1, posterior=posterior)
    d = lin.draw(5, torch.Generator().manual_seed(0))
    assert d["weight"].shape == (5, 10, 64) and d["bias"].shape == (5, 10)
    d2 = lin.draw(5, torch.Generator().manual_seed(0))
    assert torch.equal(d["weight"], d2["weight"]) and torch.equal(d["bias"], d2["bias"])
    c = conv.draw(3)
    assert c["weight"].shape == (3, 16, 1, 3, 3) and c["bias"].shape == (3, 16)
    with pytest.raises(LayerConfigError, match="draws"):
        lin.draw(0)


def test_forward_with_matches_torch_functional():
    # references: torch.nn.functional.linear / conv2d
    lin = VariationalLinear(8, 3)
    x = torch.randn(4, 8)
    d = lin.draw(1)
    assert torch.equal(lin.forward_with(x, d["weight"][0], d["bias"][0]), F.linear(x, d["weight"][0], d["bias"][0]))
    conv = VariationalConv2d(2, 5, 3, stride=2, padding=1)
    xi = torch.randn(4, 2, 8, 8)
    c = conv.draw(1)
    got = conv.forward_with(xi, c["weight"][0], c["bias"][0])
    assert torch.equal(got, F.conv2d(xi, c["weight"][0], c["bias"][0], stride=2, padding=1))
    assert got.shape == (4, 5, conv.output_size(8), conv.output_size(8)) == (4, 5, 4, 4)
    assert lin(x).shape == (4, 3)  # one fresh draw


def test_unknown_posterior_and_bad_shapes_are_named():
    with pytest.raises(LayerConfigError, match="posterior") as info:
        VariationalLinear(3, 2, posterior="laplace")  # type: ignore[arg-type]
    assert info.value.field == "posterior"
    with pytest.raises(LayerConfigError, match="prior_scale"):
        VariationalLinear(3, 2, prior_scale=0.0)
    with pytest.raises(LayerConfigError, match="input_shape"):
        build_model("conv", (64,), 10, "radial")
    with pytest.raises(LayerConfigError, match="arch"):
        build_model("transformer", (64,), 10, "radial")


@pytest.mark.parametrize("kind,shape,n_var", [("mlp", (64,), 3), ("mlp", (1, 8, 8), 3), ("conv", (1, 8, 8), 3)])
@pytest.mark.parametrize("posterior", ["radial", "gaussian"])
def test_build_model_uses_only_supported_modules(kind, shape, n_var, posterior):
    model = build_model(kind, shape, 10, posterior)
    allowed = (VariationalLinear, VariationalConv2d, nn.ReLU, nn.Flatten)
    assert isinstance(model, nn.Sequential) and all(isinstance(m, allowed) for m in model)
    assert len(variational_layers(model)) == n_var
    assert all(layer.posterior == posterior for layer in variational_layers(model))
    assert model(torch.randn(2, *shape)).shape == (2, 10)
    assert total_kl(model).ndim == 0


def test_demo_mlp_has_about_84k_weights():
    # 64*256 + 256*256 + 256*10 weights (+ biases): the size the KL pitfall describes
    model = build_model("mlp", (64,), 10, "radial")
    n = sum(layer.weight_mu.numel() + layer.bias_mu.numel() for layer in variational_layers(model))
    assert n == 64 * 256 + 256 + 256 * 256 + 256 + 256 * 10 + 10


@pytest.mark.parametrize("kind", ["mlp", "conv"])
def test_forward_draws_equals_per_draw_functional_pass(kind):
    # reference: the same network written out with torch.nn.functional for each draw
    torch.manual_seed(0)
    model = build_model(kind, (1, 8, 8), 4, "radial", hidden=(16, 8), channels=(4, 6))
    x = torch.randn(5, 1, 8, 8)
    draws = sample_network(model, 3, torch.Generator().manual_seed(4))
    assert [d["weight"].shape[0] for d in draws] == [3, 3, 3]
    got = forward_draws(model, x, draws)
    assert got.shape == (3, 5, 4)
    for s in range(3):
        if kind == "mlp":
            h = x.flatten(1)
            h = F.relu(F.linear(h, draws[0]["weight"][s], draws[0]["bias"][s]))
            h = F.relu(F.linear(h, draws[1]["weight"][s], draws[1]["bias"][s]))
            want = F.linear(h, draws[2]["weight"][s], draws[2]["bias"][s])
        else:
            h = F.relu(F.conv2d(x, draws[0]["weight"][s], draws[0]["bias"][s], padding=1))
            h = F.relu(F.conv2d(h, draws[1]["weight"][s], draws[1]["bias"][s], stride=2, padding=1))
            want = F.linear(h.flatten(1), draws[2]["weight"][s], draws[2]["bias"][s])
        torch.testing.assert_close(got[s], want, rtol=0, atol=1e-6)
    again = sample_network(model, 3, torch.Generator().manual_seed(4))
    assert all(torch.equal(a["weight"], b["weight"]) for a, b in zip(draws, again))
    with pytest.raises(LayerConfigError, match="one draw dict per variational layer"):
        forward_draws(model, x, draws[:2])


# -- sigma parameterisation and a prior per parameter -----------------------------------------
def test_log_sigma_parameterisation_maps_rho_by_exp_and_starts_at_the_spread():
    # sigma = exp(rho): torch.exp is the reference; the radial layer starts at sigma = spread * sqrt(d)
    layer = VariationalLinear(40, 6, posterior="radial", init_spread=0.02, sigma_param="log")
    assert torch.allclose(layer.weight_rho, torch.full((6, 40), math.log(0.02 * math.sqrt(240))))
    assert torch.allclose(layer.weight_sigma, torch.exp(layer.weight_rho))
    assert torch.allclose(layer.spread()["weight"], torch.full((6, 40), 0.02), rtol=1e-5)
    gauss = VariationalConv2d(2, 3, 3, posterior="gaussian", init_sigma=0.05, sigma_param="log")
    assert torch.allclose(gauss.bias_sigma, torch.full((3,), 0.05)) and torch.allclose(gauss.spread()["bias"],
                                                                                        gauss.bias_sigma)
    with pytest.raises(LayerConfigError, match="sigma_param"):
        VariationalLinear(3, 2, sigma_param="exp")


def test_a_log_sigma_step_is_relative_and_a_softplus_step_absolute():
    # Why the log parameterisation (module docstring): one Adam step moves rho by about lr
    # (Kingma & Ba 2015, sec. 2.1: the effective step is bounded by the step size), so on
    # exp(rho) a big and a small sigma change by the same factor; on softplus(rho) in its
    # linear range the change is absolute, so a radial sigma of ~5 hardly moves.
    changes = {}
    for param in ("log", "softplus"):
        layer = VariationalLinear(64, 256, posterior="radial", init_spread=0.02, sigma_param=param)
        before = layer.weight_sigma.detach().clone()
        opt = torch.optim.Adam([layer.weight_rho], lr=1e-2)
        layer.weight_sigma.sum().backward()
        opt.step()
        changes[param] = float((layer.weight_sigma.detach() / before).mean())
    assert changes["log"] == pytest.approx(math.exp(-1e-2), rel=1e-4)
    # sigma = 0.02 * sqrt(16384) = 2.56: about -0.01 * sigmoid(rho) absolute, 0.36% relative
    assert 1.0 - changes["softplus"] < (1.0 - changes["log"]) / 2


@pytest.mark.parametrize("posterior", ["gaussian", "radial"])
def test_a_prior_per_parameter_gives_the_kl_to_that_prior(posterior):
    # reference: torch.distributions.kl_divergence(Normal(mu, sigma), Normal(m, s)) (closed form);
    # radial: the same Monte Carlo estimate as above, with E[(w - m)^2] = (mu - m)^2 + sigma^2 / d
    layer = _random_params(VariationalLinear(5, 3, posterior=posterior), seed=9).double()
    g = torch.Generator().manual_seed(2)
    m_w, m_b = torch.randn(3, 5, generator=g, dtype=torch.float64), torch.randn(3, generator=g, dtype=torch.float64)
    s_w, s_b = torch.rand(3, 5, generator=g, dtype=torch.float64) + 0.2, torch.rand(3, generator=g,
                                                                                   dtype=torch.float64) + 0.2
    layer.set_prior(m_w, s_w, m_b, s_b)
    pairs = ((layer.weight_mu, layer.weight_sigma, m_w, s_w), (layer.bias_mu, layer.bias_sigma, m_b, s_b))
    with torch.no_grad():
        if posterior == "gaussian":
            want = sum(float(kl_divergence(Normal(mu, sig), Normal(m, s)).sum()) for mu, sig, m, s in pairs)
            assert float(layer.kl()) == pytest.approx(want, rel=1e-10)
            return
        torch.manual_seed(0)
        est = torch.stack([layer.kl() for _ in range(3000)])
        want = 0.0
        for mu, sig, m, s in pairs:
            d = mu.numel()
            want += float(-torch.log(sig).sum() + (((mu - m).square() + sig.square() / d) / (2 * s * s)).sum()
                          + (torch.log(s) + 0.5 * math.log(2 * math.pi)).sum())
    se = float(est.std()) / math.sqrt(len(est))
    assert abs(float(est.mean()) - want) < 5 * se  # 5 standard errors (common practice for MC checks)


def test_the_prior_per_parameter_stays_out_of_the_state_dict_and_is_checked():
    layer = VariationalLinear(4, 2)
    keys = set(layer.state_dict())
    layer.set_prior(torch.zeros(2, 4), torch.ones(2, 4), torch.zeros(2), torch.ones(2))
    assert set(layer.state_dict()) == keys  # training-only: checkpoints and bundles do not change
    with pytest.raises(LayerConfigError, match="weight prior must have shape"):
        layer.set_prior(torch.zeros(4, 2), torch.ones(4, 2), torch.zeros(2), torch.ones(2))
    with pytest.raises(LayerConfigError, match="sds > 0"):
        layer.set_prior(torch.zeros(2, 4), torch.zeros(2, 4), torch.zeros(2), torch.ones(2))
