"""fit_elbo (export/elbo.py): the examples' training loop as one public helper."""

from __future__ import annotations

import pytest
import torch
from sklearn.datasets import load_iris
from torch import nn

from demur.export.elbo import fit_elbo, gaussian_nll
from demur.export.errors import LayerConfigError
from demur.export.layers import VariationalLinear


def test_fit_elbo_learns_iris_and_leaves_eval_mode() -> None:
    """scikit-learn's bundled iris: a variational MLP fitted by the ELBO classifies its training
    rows well above chance (3 classes: 1/3) -- a smoke check that the loop learns."""
    x, y = load_iris(return_X_y=True)
    xt = torch.as_tensor((x - x.mean(0)) / x.std(0), dtype=torch.float32)
    yt = torch.as_tensor(y)
    torch.manual_seed(0)
    model = nn.Sequential(VariationalLinear(4, 16, posterior="gaussian"), nn.ReLU(),
                          VariationalLinear(16, 3, posterior="gaussian"))
    seconds = fit_elbo(model, xt, yt, epochs=40, batch=32)
    assert seconds > 0 and not model.training
    with torch.no_grad():
        acc = (model(xt).argmax(1) == yt).float().mean().item()
    assert acc > 0.8


def test_gaussian_nll_matches_torch_distributions() -> None:
    """Source: torch.distributions.Normal(mean, sd).log_prob, less the constant 0.5 ln(2 pi)."""
    out = torch.tensor([[0.3, -0.5], [1.0, 0.2]])
    y = torch.tensor([0.1, 2.0])
    ref = -torch.distributions.Normal(out[:, 0], (0.5 * out[:, 1]).exp()).log_prob(y) - 0.5 * torch.log(
        torch.tensor(2 * torch.pi))
    assert gaussian_nll(out, y).item() == pytest.approx(ref.mean().item(), rel=1e-6)


def test_fit_elbo_refuses_by_name() -> None:
    model = nn.Sequential(VariationalLinear(2, 2))
    with pytest.raises(LayerConfigError) as info:
        fit_elbo(model, torch.zeros(3, 2), torch.zeros(3, dtype=torch.long), task="ranking")
    assert info.value.field == "task"
    with pytest.raises(LayerConfigError) as info:
        fit_elbo(model, torch.zeros(3, 2), torch.zeros(2, dtype=torch.long))
    assert info.value.field == "y"
