"""Continual update: a trained model's posterior becomes the prior of the next round.

Variational continual learning (Nguyen, Li, Bui & Turner, "Variational Continual
Learning", ICLR 2018, eq. 4): after training on the data seen so far, q_t(w)
approximates p(w | D_1..t); training on new data D_t+1 alone with the ELBO whose
prior is q_t gives q_t+1 ~ p(w | D_1..t+1) without the old rows. Weights the old
data pinned down (small posterior sd) are expensive to move; weights it left
loose are free to learn the new rows. Plain fine-tuning has no such pull and
forgets (README, "Updating a model with reviewed cases", has the measured table).

The prior is mean-field Gaussian per parameter: N(mu, sd^2) with mu the posterior
mean and sd each parameter's posterior standard deviation (``VariationalLayer.spread``:
sigma for the gaussian family, sigma / sqrt(d) for the radial one, whose marginal
per weight has that sd). For a radial posterior this is the Gaussian with the
same per-weight mean and variance, an approximation of ours, said here.

Python use (any module built from demur's variational layers)::

    updated = posterior_as_prior(model)          # a copy; model is untouched
    opt = elbo_optimiser(updated)
    loss = nll(updated(x_new), y_new) + total_kl(updated) / len(x_new)

``demur train --prior-from CHECKPOINT --data new.csv`` does this for a checkpoint
of ``demur train`` (export/training.py), an ensemble member by member.
"""

from __future__ import annotations

import copy

from torch import nn

from demur.export.errors import LayerConfigError
from demur.export.layers import variational_layers

__all__ = ["posterior_as_prior"]


def posterior_as_prior(model: nn.Module) -> nn.Module:
    """A deep copy of ``model`` whose every variational layer has, as its prior, the
    posterior of the same layer of ``model`` (per parameter N(mu, spread^2), detached).

    The copy's parameters start at the old posterior, the usual starting point of the next
    round (Nguyen et al. 2018, section 5). The copy is in train mode; ``model`` is not changed.
    Refuses a module without variational layers (there is no posterior to carry over).
    """
    layers = variational_layers(model)
    if not layers:
        raise LayerConfigError("the model has no variational layers, so it has no posterior to use as a prior",
                               field="model")
    updated = copy.deepcopy(model)
    for old, new in zip(layers, variational_layers(updated)):
        spread = old.spread()
        new.set_prior(old.weight_mu.detach(), spread["weight"], old.bias_mu.detach(), spread["bias"])
    return updated.train()
