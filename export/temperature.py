"""What a classifier's bundle serves besides its network: a temperature and a score reference.

``demur train`` calls ``served_statistics`` once the network (or the ensemble's mixture) is
trained and writes the result into the checkpoint's ``target``, which ``demur export`` copies
into the manifest; serve/core/summary.py applies both (module docstring there), so calibrate,
evaluate and the server serve the same thing.

``temperature`` (opt-in, ``--fit-temperature``): the T > 0 minimising the validation NLL of the
tempered predictive mean softmax(ln p̄ / T), Guo et al., "On Calibration of Modern Neural
Networks", ICML 2017, section 4.2: one number, so it cannot change which class is predicted.

``score_reference``: the quantiles at levels 0, 0.01, ..., 1 of predictive entropy and mutual
information over the training and validation rows, computed by the serving code itself (with
the temperature). They define the ``joint_rank`` score; they never come from the rows
``demur calibrate`` uses, so its guarantee holds for that score as for any other.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import torch
from torch import nn

__all__ = ["mixture_statistics", "served_statistics"]


def served_statistics(val_draws: torch.Tensor, y_val: np.ndarray, reference_draws: torch.Tensor, *,
                      fit: bool) -> dict[str, Any]:
    """What a classifier's bundle needs in ``target`` besides the network (serve/core/summary.py):
    ``temperature`` (``fit``: the T > 0 minimising the validation NLL of softmax(ln p̄ / T), Guo et
    al. 2017, section 4.2, searched on ln T in [-3, 3]; else 1) and ``score_reference``, the
    quantiles at levels 0, 0.01, ..., 1 of predictive entropy and mutual information over
    ``reference_draws`` (the training and validation rows), computed by the serving code itself
    with that temperature. ``*_draws``: float32[S, B, K] logits."""
    from scipy.optimize import minimize_scalar

    from demur.serve.core.summary import classification_summary

    t = 1.0
    if fit:
        log_mean = torch.logsumexp(torch.log_softmax(val_draws.double(), -1), 0) - math.log(val_draws.shape[0])
        yt = torch.as_tensor(np.asarray(y_val), dtype=torch.long)

        def nll(log_t: float) -> float:
            logp = torch.log_softmax(log_mean / math.exp(log_t), dim=-1)
            return float(-logp[torch.arange(len(yt)), yt].mean())

        t = float(math.exp(minimize_scalar(nll, bounds=(-3.0, 3.0), method="bounded").x))
    s = classification_summary(reference_draws.numpy(), temperature=t)
    levels = np.linspace(0.0, 1.0, 101)
    return {"temperature": t, "score_reference": {
        "predictive_entropy": np.quantile(s.predictive_entropy, levels).tolist(),
        "mutual_information": np.quantile(s.mutual_information, levels).tolist()}}


def mixture_statistics(models: list[nn.Module], inputs: dict[str, Any], x_val: np.ndarray, y_val: np.ndarray,
                       x_train: np.ndarray, *, fit: bool, draws: int = 32) -> dict[str, Any]:
    """``served_statistics`` of the mixture of ``models`` (one model: its own posterior), each
    giving ``draws // len(models)`` torch draws, on raw validation and training rows (the
    checkpoint's ``inputs`` standardise them), as the bundle exported from them serves."""
    from demur.export.training import predict_draws, standardise_inputs  # training imports this module

    per = max(1, int(draws) // len(models))

    def mixture(x: np.ndarray) -> torch.Tensor:
        xt = torch.from_numpy(standardise_inputs(inputs, x))
        return torch.cat([predict_draws(m, xt, S=per) for m in models])

    return served_statistics(mixture(x_val), y_val, mixture(np.concatenate([x_train, x_val])), fit=fit)
