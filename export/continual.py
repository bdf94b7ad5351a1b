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
import dataclasses
from pathlib import Path
from typing import Any

import numpy as np
from torch import nn

from demur.export.datasets import Dataset
from demur.export.errors import LayerConfigError
from demur.export.layers import variational_layers

__all__ = ["posterior_as_prior", "update_start"]


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


def update_start(prior_from: Path | str | tuple[nn.Module, dict[str, Any]], dataset: Dataset) -> dict[str, Any]:
    """What a continual update starts from: the old model, its metadata, the settings that fix
    the network (architecture, prior family), and ``dataset`` with its labels mapped onto the
    old model's (a ``LayerConfigError`` naming ``prior_from`` when they do not fit)."""
    from demur.export.checkpoints import load_checkpoint

    if isinstance(prior_from, tuple):
        model, meta = prior_from
        source = str(meta.get("name", "model"))
    else:
        model, meta = load_checkpoint(prior_from)
        source = str(prior_from)
        if isinstance(model, list):
            raise LayerConfigError(f"{prior_from} is an ensemble of {len(model)} networks; update it with "
                                   "train_ensemble(..., prior_from=...) (demur train --prior-from does)",
                                   field="prior_from")
    if meta["task"] != dataset.task:
        raise LayerConfigError(f"the checkpoint is a {meta['task']} model; the new data is {dataset.task}",
                               field="prior_from")
    names = list(meta["inputs"]["names"])
    if sorted(dataset.feature_names) != sorted(names):
        gone = [n for n in names if n not in dataset.feature_names][:5]
        extra = [n for n in dataset.feature_names if n not in names][:5]
        raise LayerConfigError(f"the new data's feature columns differ from the checkpoint's: missing {gone}, "
                               f"not in the checkpoint {extra}; an update needs the same columns", field="prior_from")
    if list(dataset.feature_names) != names:  # same columns, another order: the checkpoint's order
        order = np.array([list(dataset.feature_names).index(n) for n in names])
        dataset = dataclasses.replace(dataset, feature_names=tuple(names), **{
            f"x_{s}": getattr(dataset, f"x_{s}")[:, order] for s in ("train", "val", "cal", "test")})
    old = list(meta["labels"])
    if dataset.task == "classification":
        missing = [lab for lab in dataset.labels if lab not in old]
        if missing:
            raise LayerConfigError(
                f"the new data has labels {missing} the checkpoint's model does not know (it knows {old}); a "
                "continual update keeps the output layer, so the first model must be trained with every label",
                field="prior_from")
        index = np.array([old.index(lab) for lab in dataset.labels], dtype=np.int64)
        mapped = {f"y_{name}": index[getattr(dataset, f"y_{name}")] for name in ("train", "val", "cal", "test")}
        dataset = dataclasses.replace(dataset, labels=tuple(old), **mapped)
    arch = meta["arch"]
    settings = {"hidden": tuple(arch["hidden"]), "channels": tuple(arch["channels"]),
                "prior_scale": float(arch["prior_scale"]), "init_sigma": float(arch.get("init_sigma", 1e-3)),
                "sigma_param": arch.get("sigma_param", "softplus"),
                "input_sigma_param": arch.get("input_sigma_param")}
    return {"model": model, "meta": meta, "arch": arch["kind"], "posterior": arch["posterior"],
            "settings": settings, "dataset": dataset, "source": source}
