"""export/silent_inputs.py and the per-layer sigma settings of ``demur train``
(``--silent-inputs``, ``--input-sigma-param``, ``--input-rho-lr``).

Data: scikit-learn's ``load_digits`` (demur's digits split); on seed 0 pixels 0, 24, 32, 39 and
56 are 0 in every training image (computed below, not assumed). References: a weight whose
input is 0 in every training row does not change the likelihood, so its exact posterior is its
prior (Bayes' rule); the normalised product q^e p^(1-e) of two Gaussian densities is checked
against numerical integration of ``scipy.stats.norm.logpdf`` on a grid.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy import stats

from demur.export.checkpoints import load_checkpoint
from demur.export.datasets import load_dataset
from demur.export.errors import LayerConfigError
from demur.export.evaluation import _recipe
from demur.export.exporter import export_bundle
from demur.export.layers import build_model, variational_layers
from demur.export.silent_inputs import put_silent_inputs_at_prior, silent_columns
from demur.export.training import _input_spec, standardise_inputs, train
from demur.serve.core.bundle import load_bundle


@pytest.fixture(scope="module")
def digits():
    return load_dataset("digits")


def _silent(ds) -> np.ndarray:
    return np.asarray(ds.x_train).std(axis=0) == 0


def test_silent_columns_are_the_constant_training_pixels(digits):
    z = torch.from_numpy(standardise_inputs(_input_spec(digits, "mlp"), digits.x_train))
    got = silent_columns(z).numpy()
    assert np.array_equal(got, _silent(digits)) and 3 <= got.sum() <= 8  # pixel 0 is blank in every digit


@pytest.mark.parametrize("posterior", ["radial", "gaussian"])
def test_weights_on_silent_inputs_take_the_prior_and_nothing_else_moves(digits, tmp_path, posterior):
    """Same seed, same training: "prior" differs from "learn" only in the first layer's weights
    on silent pixels, which carry the prior's mean 0 and per-weight sd 1 (prior_scale)."""
    kw = dict(posterior=posterior, epochs=2, hidden=(16,), progress=False, seed=3)
    learnt = train(digits, silent_inputs="learn", **kw).model
    placed = train(digits, silent_inputs="prior", out=tmp_path, **kw)
    assert placed.metrics["silent_inputs"] == int(_silent(digits).sum())
    model, meta = load_checkpoint(tmp_path)  # round trip through the checkpoint
    assert meta["training"]["silent_inputs"] == "prior"
    silent = torch.from_numpy(_silent(digits))
    first, first_learnt = variational_layers(model)[0], variational_layers(learnt)[0]
    sd = first.spread()["weight"]
    assert torch.allclose(sd[:, silent], torch.ones_like(sd[:, silent]), rtol=1e-5)
    assert torch.equal(first.weight_mu[:, silent], torch.zeros_like(first.weight_mu[:, silent]))
    assert torch.equal(first.weight_rho[:, ~silent], first_learnt.weight_rho[:, ~silent])
    assert torch.equal(first.weight_mu[:, ~silent], first_learnt.weight_mu[:, ~silent])
    for a, b in zip(variational_layers(model)[1:], variational_layers(learnt)[1:]):
        assert torch.equal(a.weight_rho, b.weight_rho) and torch.equal(a.weight_mu, b.weight_mu)


def test_energy_rule_is_the_normalised_geometric_mixture_of_posterior_and_prior():
    # reference: mean and variance of q^e p^(1-e), normalised, by numerical integration of
    # scipy.stats.norm.logpdf on a grid (q = N(mu, s^2), p = the layer's prior N(0, 1))
    torch.manual_seed(0)
    model = build_model("mlp", [4], 3, "gaussian", hidden=(5,), init_spread=0.05)
    first = variational_layers(model)[0]
    with torch.no_grad():
        first.weight_mu.uniform_(-0.8, 0.8)
    mu0, sd0 = first.weight_mu.detach().clone(), first.spread()["weight"]
    x = torch.tensor([[0.0, 0.5, 1.3, 0.02], [0.0, -0.5, -1.1, -0.02]])  # energies 0, 0.25, >=1, 4e-4
    assert put_silent_inputs_at_prior(model, x, "energy") == 3
    energy = np.minimum(1.0, (x.numpy() ** 2).mean(0))
    got_mu, got_sd = first.weight_mu.detach(), first.spread()["weight"]
    grid = np.linspace(-8, 8, 400_001)
    for j in range(5):
        for i in range(4):
            e = energy[i]
            logd = e * stats.norm.logpdf(grid, float(mu0[j, i]), float(sd0[j, i])) + (1 - e) * stats.norm.logpdf(grid)
            d = np.exp(logd - logd.max())
            d /= np.trapezoid(d, grid)
            mean = np.trapezoid(grid * d, grid)
            var = np.trapezoid((grid - mean) ** 2 * d, grid)
            assert float(got_mu[j, i]) == pytest.approx(mean, abs=1e-5)
            assert float(got_sd[j, i]) == pytest.approx(np.sqrt(var), rel=1e-4)
    with pytest.raises(LayerConfigError, match="rule must be one of"):
        put_silent_inputs_at_prior(model, x, "learn")


def test_a_first_convolution_is_left_alone():
    model = build_model("conv", [1, 8, 8], 10, "radial", channels=(4,), init_spread=0.02)
    before = [p.clone() for p in model.parameters()]
    assert put_silent_inputs_at_prior(model, torch.zeros(6, 1, 8, 8), "prior") == 0
    assert all(torch.equal(a, b) for a, b in zip(before, model.parameters()))


def test_the_settings_reach_the_bundle_and_the_holdout_retrain(digits, tmp_path):
    """`demur evaluate --holdout-class` retrains with the recorded settings, so the rule and the
    first layer's sigma settings must travel checkpoint -> bundle -> recipe."""
    train(digits, epochs=1, hidden=(16,), progress=False, out=tmp_path / "ck", silent_inputs="energy",
          input_sigma_param="log", input_rho_lr=1e-2)
    bundle = export_bundle(tmp_path / "ck", tmp_path / "b", draws=4, seed=1)
    recipe = _recipe(load_bundle(bundle.path))
    assert recipe["recorded"] and recipe["settings"]["silent_inputs"] == "energy"
    assert recipe["settings"]["input_sigma_param"] == "log" and recipe["settings"]["input_rho_lr"] == 1e-2
    with pytest.raises(LayerConfigError, match="silent_inputs must be one of"):
        train(digits, epochs=1, hidden=(16,), progress=False, silent_inputs="zero")


def test_the_first_layers_sigma_parameterisation_round_trips(digits, tmp_path):
    """--input-sigma-param log: the first layer's sigma = exp(rho), the others softplus; recorded in
    the checkpoint's arch, rebuilt by load_checkpoint and kept by a continual update; the first
    layer's rho takes its own step size (after one epoch the first layer's log sigma has moved
    by more than the others' at --input-rho-lr 1e-2 against --rho-lr 1e-3)."""
    result = train(digits, epochs=1, hidden=(16,), progress=False, out=tmp_path / "a", init_spread=0.02,
                   input_sigma_param="log", input_rho_lr=1e-2)
    model, meta = load_checkpoint(tmp_path / "a")
    assert meta["arch"]["input_sigma_param"] == "log"
    assert [lay.sigma_param for lay in variational_layers(model)] == ["log", "softplus"]
    for a, b in zip(variational_layers(model), variational_layers(result.model)):
        assert torch.equal(a.weight_sigma, b.weight_sigma)
    moved = [float((lay.spread()["weight"] / 0.02).log().abs().max()) for lay in variational_layers(model)]
    assert moved[0] > 3 * moved[1]
    updated = train(digits, epochs=1, progress=False, prior_from=tmp_path / "a", out=tmp_path / "b")
    assert updated.meta["arch"]["input_sigma_param"] == "log"
    assert [lay.sigma_param for lay in variational_layers(updated.model)] == ["log", "softplus"]
