"""export/continual.py and `demur train --prior-from`: the posterior of one round as the prior of the next.

Reference: Nguyen, Li, Bui & Turner, "Variational Continual Learning", ICLR 2018 (eq. 4: the
previous approximate posterior is the next prior); torch.distributions for the Gaussian KL.
The measured forgetting table (digits 0-4, then 5-9) is in the README, not a test.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import nn
from torch.distributions import Normal, kl_divergence

from demur.export.continual import posterior_as_prior
from demur.export.datasets import load_dataset, write_labelled
from demur.export.errors import LayerConfigError
from demur.export.layers import build_model, total_kl, variational_layers
from demur.export.training import load_checkpoint, train
from demur.serve.cli import main


def test_the_copy_starts_at_zero_kl_and_the_original_is_untouched():
    # reference: KL(q || q) = 0 (torch.distributions.kl_divergence of equal Normals is 0)
    model = build_model("mlp", [64], 10, "gaussian", hidden=(8,), init_spread=0.05, sigma_param="log")
    before = total_kl(model).item()
    updated = posterior_as_prior(model)
    assert abs(total_kl(updated).item()) < 1e-3
    mu, sigma = model[1].weight_mu.detach(), model[1].weight_sigma.detach()
    assert float(kl_divergence(Normal(mu, sigma), Normal(mu, sigma)).sum()) == 0.0
    assert total_kl(model).item() == pytest.approx(before)  # the original keeps its N(0, 1) prior
    assert updated.training and all(a is not b for a, b in zip(model.parameters(), updated.parameters()))


def test_a_radial_posterior_becomes_a_gaussian_prior_with_its_per_weight_sd():
    # the prior sd per weight is the radial marginal's sd, sigma / sqrt(d) (layers.spread)
    model = build_model("mlp", [64], 10, "radial", hidden=(8,), init_spread=0.03, sigma_param="log")
    layer = variational_layers(posterior_as_prior(model))[0]
    assert torch.allclose(layer.weight_prior_sigma, torch.full_like(layer.weight_prior_sigma, 0.03), rtol=1e-5)
    assert torch.equal(layer.weight_prior_mu, model[1].weight_mu.detach())


def test_a_module_without_variational_layers_is_refused():
    with pytest.raises(LayerConfigError, match="no variational layers"):
        posterior_as_prior(nn.Linear(3, 2))


def _digits_csv(path, ds, keep):
    x = np.concatenate([ds.x_train, ds.x_val, ds.x_cal, ds.x_test])
    y = np.concatenate([ds.y_train, ds.y_val, ds.y_cal, ds.y_test])
    m = keep(y)
    return write_labelled(path, x[m], [str(v) for v in y[m]], ds.feature_names, "digit")


def test_cli_update_keeps_the_network_and_refuses_unknown_labels(tmp_path, capsys):
    ds = load_dataset("digits")
    first = tmp_path / "first"
    assert main(["train", "--data", "digits", "--epochs", "1", "--hidden", "16", "--sigma-param", "log",
                 "--out", str(first), "--no-progress"]) == 0
    new = _digits_csv(tmp_path / "reviewed.csv", ds, lambda y: y >= 5)
    assert main(["train", "--data", str(new), "--target", "digit", "--prior-from", str(first), "--epochs", "1",
                 "--out", str(tmp_path / "second"), "--no-progress"]) == 0
    old_model, old = load_checkpoint(first)
    model, meta = load_checkpoint(tmp_path / "second")
    assert meta["labels"] == old["labels"] == [str(i) for i in range(10)]  # 5-9 mapped onto the old head
    assert meta["inputs"]["center"] == old["inputs"]["center"]  # the old standardisation kept
    assert meta["arch"] == old["arch"] and meta["training"]["prior_from"] == str(first)
    assert not torch.equal(model[1].weight_mu, old_model[1].weight_mu)
    capsys.readouterr()

    unknown = write_labelled(tmp_path / "unknown.csv", ds.x_test[:358], ["5", "12"] * (len(ds.x_test) // 2),
                             ds.feature_names, "digit")
    assert main(["train", "--data", str(unknown), "--target", "digit", "--prior-from", str(first),
                 "--out", str(tmp_path / "bad"), "--no-progress"]) == 1
    assert "labels ['12'] the checkpoint's model does not know" in capsys.readouterr().err
    other = tmp_path / "other.csv"
    other.write_text("a,b,digit\n" + "".join(f"{i},{i + 1},{i % 2}\n" for i in range(40)))
    assert main(["train", "--data", str(other), "--target", "digit", "--prior-from", str(first),
                 "--out", str(tmp_path / "bad"), "--no-progress"]) == 1
    assert "feature columns differ from the checkpoint's" in capsys.readouterr().err


def test_an_ensemble_is_updated_member_by_member(tmp_path):
    ds = load_dataset("digits")
    first = tmp_path / "first"
    assert main(["train", "--data", "digits", "--members", "2", "--epochs", "1", "--hidden", "16",
                 "--out", str(first)]) == 0
    new = _digits_csv(tmp_path / "reviewed.csv", ds, lambda y: y >= 5)
    assert main(["train", "--data", str(new), "--target", "digit", "--prior-from", str(first), "--epochs", "1",
                 "--out", str(tmp_path / "second")]) == 0
    members, meta = load_checkpoint(tmp_path / "second")
    assert len(members) == 2 and meta["training"]["prior_from"].endswith("member 0")
    with pytest.raises(LayerConfigError, match="ensemble of 2"):
        train(ds, epochs=1, prior_from=first)
