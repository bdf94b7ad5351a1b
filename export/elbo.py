"""Fit your own variational module by the ELBO: the loop every own-model example would write.

``fit_elbo`` minimises, per mini-batch, the negative log-likelihood of the batch plus the KL of
the posterior to the prior scaled to one case (``total_kl / n``) with the warm-up weight
``kl_weight`` (the "KL annealing" of Bowman et al. 2016, common practice for small data), by
Adam with the sigma parameters on their own gentler step (``elbo_optimiser``). The likelihood
is categorical (cross-entropy on logits) for a classifier, or Gaussian for a regressor whose
last dimension holds mean and log-variance, the two outputs a demur bundle serves.

Example::

    from demur.export.elbo import fit_elbo

    model = MyNet()                                  # with VariationalLinear / VariationalConv2d layers
    fit_elbo(model, x_std, y, epochs=60)             # x_std: float32 tensor, y: class indices
    export_model(model, "build/bundle", inputs=spec, labels=labels)
"""

from __future__ import annotations

import time

import torch
import torch.nn.functional as F
from torch import nn

from demur.export.errors import LayerConfigError
from demur.export.layers import total_kl
from demur.export.training import elbo_optimiser, kl_weight

__all__ = ["fit_elbo", "gaussian_nll"]


def gaussian_nll(out: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    """Mean Gaussian negative log-likelihood (nats, constant dropped) of ``y`` [B] under
    ``out`` [B, 2] = (mean, log-variance)."""
    mean, log_var = out.unbind(-1)
    return 0.5 * (log_var + (y - mean) ** 2 / log_var.exp()).mean()


def fit_elbo(model: nn.Module, x: torch.Tensor, y: torch.Tensor, *, task: str = "classification",
             epochs: int = 60, batch: int = 64, lr: float = 3e-3, rho_lr: float | None = 1e-3,
             threads: int | None = 1, seed: int | None = 0) -> float:
    """Train ``model`` in place on standardised inputs ``x`` and targets ``y`` (class indices, or
    standardised values for ``task="regression"``); returns the wall seconds it took. The model
    is left in eval mode. ``threads``: torch's intra-op threads (1: small matrices mostly wait on a
    second thread; None leaves torch's setting)."""
    if task not in ("classification", "regression"):
        raise LayerConfigError(f"task must be 'classification' or 'regression'; got {task!r}", field="task")
    if len(x) != len(y) or len(x) == 0:
        raise LayerConfigError(f"x and y must hold the same, non-zero number of cases; got {len(x)} and {len(y)}",
                               field="y")
    if threads is not None:
        torch.set_num_threads(int(threads))
    generator = torch.Generator().manual_seed(int(seed)) if seed is not None else None
    opt = elbo_optimiser(model, lr=lr, rho_lr=rho_lr)
    total = epochs * ((len(x) + batch - 1) // batch)
    started, step = time.perf_counter(), 0
    for _ in range(epochs):
        model.train()
        for idx in torch.randperm(len(x), generator=generator).split(batch):
            out = model(x[idx])
            nll = F.cross_entropy(out, y[idx]) if task == "classification" else gaussian_nll(out, y[idx])
            loss = nll + kl_weight(step, total) * total_kl(model) / len(x)
            opt.zero_grad()
            loss.backward()
            opt.step()
            step += 1
    model.eval()
    return time.perf_counter() - started
