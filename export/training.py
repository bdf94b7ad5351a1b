"""ELBO training of a variational network (``demur train``; its flags: export/commands.py).

The loss per mini-batch is the negative ELBO per training example::

    loss = mean_batch NLL(y | f_w(x)) + beta(step) * kl_weight * KL(q || p) / N_train

with w one reparameterised draw from q per step (Blundell et al., "Weight
Uncertainty in Neural Networks", ICML 2015, eq. 2 with mini-batches), Adam,
and:

* **Posterior spread (our defaults, measured).** Three settings decide how
  much epistemic spread the trained posterior carries:
  ``init_spread`` = 0.02 (each weight's initial posterior standard deviation;
  for the radial posterior the layer turns it into sigma = 0.02 * sqrt(d) for
  a d-element tensor, see ``demur.export.layers``), ``rho_lr`` = 1e-3 (Adam step
  size of the ``*_rho`` parameters; the means keep ``lr`` = 3e-3) and
  ``kl_weight`` = ``KL_WEIGHT`` = 1 (the plain ELBO, as Farquhar et al. 2020
  train the radial posterior), ramped linearly from 0 over the first
  ``kl_warmup`` = ``KL_WARMUP`` = 0.3 of the steps (KL annealing).
  Why: the demo MLP has ~84k weights and ~1,000 training digits, so the
  KL's pull on every sigma (-log sigma) is always the same sign and Adam
  moves each rho at close to its full step size whatever the KL weight: how
  far sigma travels is set by step size x steps. With the earlier defaults
  (radial sigma initialised to 1e-3, one step size, KL weight 0.1) sigma
  only reached a median 0.04, i.e. a per-weight spread of sigma / sqrt(d)
  ~ 2e-4, and the mutual information was ~4e-6 nats on correct test digits
  and ~4e-5 on wrong ones: a point mass in practice. Starting each weight at
  a real spread and letting rho move gently fixes that without hurting
  accuracy. Measured on the digits (radial MLP, test split, 32 draws;
  seeds 0 / 1 / 2 / 3, each seed also drawing the split):

  ====================  ===============================  ==========================
  metric                old defaults                     these defaults
  ====================  ===============================  ==========================
  accuracy              .975 / .975 / .972 / .978        .972 / .972 / .975 / .981
  ECE (15 bins)         .022 / .013 / .016 / .014        .014 / .017 / .010 / .016
  median per-weight sd  1.6e-4                           0.025
  MI right / wrong      4e-6 / 3e-5 nats (seed 0)        .005 / .07 nats (seed 0)
  MI noisy / clean      69 / 40 / 39 / 223x (of ~5e-6)   85 / 16 / 33 / 38x
  ====================  ===============================  ==========================

  ("noisy": Gaussian pixel noise of sd 6, clipped to 0..16.) Keeping the
  cases with the lowest 90% of MI raised accuracy to .991-.994. Alternatives
  measured and not chosen: only ``init_spread`` 0.01 with the tempered KL
  0.1 (accuracy .967-.981, MI right/wrong .004/.07-.15); ``init_spread``
  0.01 with the plain ELBO and one step size (accuracy .961-.975);
  ``rho_lr`` 3e-2 (sigma runs away, spread .05, accuracy .961-.967); more
  epochs, a larger ``lr``, batch 32 or prior scale 0.3 (lower accuracy or
  ECE .06-.07). The Gaussian posterior with the same defaults gave .955 /
  .978 (seeds 0 / 1; the old defaults .961 / .944). ``--kl-weight 0.1``
  gives the tempered posterior (common practice for small data). The demo
  trains five such networks (``train_ensemble``, ``demur train --members 5``)
  and serves the mixture of their posteriors: README, "Choosing the demo's
  defaults", has the 3-seed table against the alternatives.
* **Spread set by the ELBO (``sigma_param="log"``, opt-in).** With softplus sigmas the rho step
  of 1e-3 is an absolute change, so a radial sigma of 0.02 * sqrt(d) ~ 1-5 barely moves: the
  trained per-weight spread stays at its initial 0.025 whatever the data say. ``--sigma-param
  log`` (sigma = exp(rho)) makes each step relative; from initial spreads 0.01 and 0.1 the
  trained spreads meet (tests/export/test_training.py). The spreads it learns are wide (median
  0.21 radial, 0.27 gaussian at ``--rho-lr 3e-3 --kl-weight 0.1``; ~0.6-0.8 at the plain ELBO)
  and cost clean accuracy; README, "Choosing the demo's defaults", has the measured table and
  why the demo keeps softplus.
* **Spread of the input layer alone (``input_sigma_param`` / ``input_rho_lr``, opt-in).** Log
  sigma in the first variational layer only (``--input-sigma-param log``), with its own rho step
  (``--input-rho-lr``); the other layers keep softplus and the initial spread. Recorded in the
  checkpoint's ``arch`` (``input_sigma_param``) and ``training``. Measured (digits, seed 0): at
  the rho step 1e-3 every first-layer weight widens alike (0.02 -> 0.07); at 1e-2 the ELBO sends
  every first-layer weight, not only those on silent pixels, to the prior (sd ~1; accuracy .958,
  NLL .30). Not the way to reach the silent inputs; README, "Weights on quiet inputs at their prior".
* **Weights on quiet inputs toward the prior (``silent_inputs``, default ``"energy"``).** ``"learn"``:
  train them like the rest (the behaviour before this setting); ``"prior"``: the
  first layer's weights on inputs that are 0 in every standardised training row are set, after
  training, to their exact posterior, the prior; ``"energy"``: every input's weights are moved
  toward the prior by how little of a standardised input's unit energy it carries
  (export/silent_inputs.py). Every other weight is trained as above, and clean inputs whose
  quiet pixels stay quiet get nearly the same predictive. The default since the 5-seed
  measurement (README, "Weights on quiet inputs at their prior"): far-off AUROC (predictive
  entropy) .895 / .930 -> .997 / .963, NLL .078 -> .079, unseen class .948 -> .947.
* **Step sizes decayed along a half cosine (``lr_schedule``, default ``"cosine"``).** Every
  param group's step (the means' ``lr`` and the sigmas' ``rho_lr``) goes from its set value to
  0 over the run, eta_t = eta (1 + cos(pi t / T)) / 2 (Loshchilov & Hutter, "SGDR", ICLR 2017,
  eq. (5), one cycle, eta_min = 0; common practice for the last steps of a noisy ELBO, whose
  one weight draw per step keeps a constant-step Adam wandering). The default since the 5-seed
  measurement in README, "The step-size schedule" (served, side by side): NLL .079 -> .076, ECE
  .020 -> .017, unseen class (joint rank) .944 -> .947, uniform noise .976 -> .980, the same
  cost; on scikit-learn's breast cancer, wine and diabetes no worse. ``"constant"`` trains as before.
* **Served temperature and score reference.** For a classifier ``served_statistics`` records in
  ``target`` the PE and MI quantiles of the training rows (the ``joint_rank`` score,
  serve/core/summary.py) and, with ``--fit-temperature``, a temperature fitted on the
  validation split (Guo et al. 2017). Off by default: the demo's validation split has 90 cases,
  and refitting on fresh draws of one trained mixture moved T between 0.73 and 1.42.
* **One intra-op thread by default.** The matrices are small (batch 64 x
  256), so a second thread mostly waits: on this 2-core machine 60 epochs
  took 13 s wall / 9 s CPU with 1 thread but 56 s / 53 s with 2 when other
  work shared the cores (same accuracy either way). ``--threads 2`` is there.
* **Inputs standardised** with the train split's mean and std, the std
  floored by ``demur.serve.core.support.standardisation`` (images: 0.3 x the
  pooled pixel std; named features: 5% of the feature's range; constant
  features: 1), so a near-constant training pixel cannot turn a small change
  into a huge z-score. The statistics go into the checkpoint and the bundle.
* **Classification**: cross-entropy on logits. **Regression**:
  heteroscedastic Gaussian with two outputs, mean and log-variance, both in
  standardised target units (y_std = (y - target.center) / target.scale).

Evaluation uses ``EVAL_DRAWS`` weight draws: the predictive probabilities are
the mean of the per-draw softmaxes (computed as a log-sum-exp), accuracy,
NLL and ECE (15 equal-width confidence bins, Guo et al., "On Calibration of
Modern Neural Networks", ICML 2017, eq. 3) on the validation and test splits.

Files written to ``out``: ``checkpoint.pt`` (layout in DEVELOPERS.md,
"Checkpoint"; only tensors, dicts, lists, strings and numbers so
``torch.load(weights_only=True)`` reads it) and ``training.json`` (settings,
metrics, per-epoch history, wall time).

Python use (the test fixtures do this)::

    ds = load_dataset("digits")
    result = train(ds, arch="mlp", posterior="radial", out=Path("run"))
    result.metrics["test"]["accuracy"]
"""

from __future__ import annotations

import json
import math
import sys
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

from demur.serve.core.drift import feature_reference
from demur.serve.offline.metrics import expected_calibration_error

from demur.export.datasets import Dataset
from demur.export.checkpoints import (CHECKPOINT_FILE, CHECKPOINT_FORMAT, CHECKPOINT_VERSION, load_checkpoint,
                                      save_checkpoint)
from demur.export.errors import LayerConfigError, TrainingError
from demur.export.exporter import input_spec
from demur.export.temperature import mixture_statistics
from demur.export.silent_inputs import SILENT_INPUTS, put_silent_inputs_at_prior
from demur.export.layers import ARCHITECTURES, POSTERIORS, build_model, total_kl, variational_layers

__all__ = [
    "DEFAULTS",
    "EVAL_DRAWS",
    "KL_WARMUP",
    "KL_WEIGHT",
    "LR_SCHEDULES",
    "SCALE_FLOOR",
    "TrainResult",
    "UNRECORDED",
    "elbo_optimiser",
    "kl_weight",
    "predict_draws",
    "predictive_metrics",
    "standardise_inputs",
    "summary_line",
    "total_kl",
    "train",
    "train_ensemble",
]

KL_WEIGHT = 1.0
"""Default temperature on the KL term (1.0 = the plain ELBO); see the module docstring."""

KL_WARMUP = 0.3
"""Fraction of all training steps over which the KL weight ramps from 0 to ``KL_WEIGHT``."""

SCALE_FLOOR = 1e-6
"""A regression target whose train std is below this gets scale 1e-6 (inputs: see ``standardisation``)."""

EVAL_DRAWS = 32
"""Weight draws used for the reported metrics."""


DEFAULTS: dict[str, Any] = {
    "epochs": 60,
    "lr": 3e-3,
    "batch_size": 64,
    "prior_scale": 1.0,
    "kl_weight": KL_WEIGHT,
    "kl_warmup": KL_WARMUP,
    "init_sigma": 1e-3,
    "init_spread": 0.02,
    "rho_lr": 1e-3,
    "sigma_param": "softplus",
    "input_sigma_param": None,
    "input_rho_lr": None,
    "silent_inputs": "energy",
    "fit_temperature": False,
    "hidden": (256, 256),
    "channels": (16, 32),
    "threads": 1,
    "lr_schedule": "cosine",
}
"""Training settings used when ``train`` is not told otherwise."""

UNRECORDED: dict[str, Any] = {"silent_inputs": "learn", "lr_schedule": "constant"}
"""How a checkpoint that does not record a setting was trained: each was added, with a new
default, after such checkpoints were written (``demur evaluate --holdout-class`` retrains them
as they were, not with today's defaults)."""


@dataclass(frozen=True)
class TrainResult:
    """What ``train`` returns: the trained model (eval mode), the checkpoint
    metadata (the checkpoint dict without ``state_dict``), the metrics, the
    output directory (or None) and the dataset it was trained on."""

    model: nn.Sequential
    meta: dict[str, Any]
    metrics: dict[str, Any]
    out: Path | None
    dataset: Dataset

    @property
    def checkpoint_path(self) -> Path | None:
        return None if self.out is None else self.out / CHECKPOINT_FILE


# -- inputs -------------------------------------------------------------------
def _input_spec(ds: Dataset, arch: str) -> dict[str, Any]:
    """The bundle's input spec for ``ds`` (the public ``input_spec``: floored standardisation,
    training range); a conv net sees the image shape."""
    shape = list(ds.image_shape) if arch == "conv" and ds.image_shape is not None else [ds.n_features]
    return input_spec(ds.x_train, names=list(ds.feature_names), shape=shape,
                      kind="image" if ds.image_shape is not None else "tabular").spec


def standardise_inputs(inputs: dict[str, Any], x: np.ndarray) -> np.ndarray:
    """Raw cases float[B, F] -> float32[B, *inputs["shape"]] ready for the network."""
    x = np.asarray(x, dtype=np.float64).reshape(len(x), -1)
    z = (x - np.asarray(inputs["center"])) / np.asarray(inputs["scale"])
    return z.astype(np.float32).reshape(len(x), *inputs["shape"])


# -- evaluation -----------------------------------------------------------------
@torch.no_grad()
def predict_draws(model: nn.Module, x: torch.Tensor, S: int = EVAL_DRAWS, chunk: int = 512) -> torch.Tensor:
    """S fresh forward passes (one weight draw each, shared by all cases): float32[S, B, K]."""
    out = []
    for _ in range(S):
        out.append(torch.cat([model(x[i:i + chunk]) for i in range(0, len(x), chunk)]))
    return torch.stack(out)


def predictive_metrics(
    draws: torch.Tensor, y: np.ndarray, task: str, target: dict[str, float] | None = None
) -> dict[str, float]:
    """Metrics of the Monte-Carlo predictive from ``draws``: float32[S, B, K].

    classification: accuracy, nll (nats per case), ece (15 bins), mean_confidence, of the
    predictive mean after the temperature ``target["temperature"]`` if present (what is served:
    serve/core/summary.py).
    regression (draws hold mean and log-variance in standardised units; ``y``
    in target units): rmse and mean absolute error in target units, nll of the
    Gaussian mixture in target units (nats per case).
    """
    S = draws.shape[0]
    if task == "classification":
        logp = torch.logsumexp(torch.log_softmax(draws.double(), dim=-1), dim=0) - math.log(S)
        logp = torch.log_softmax(logp / float((target or {}).get("temperature", 1.0)), dim=-1)
        probs = logp.exp().numpy()
        yt = torch.as_tensor(np.asarray(y), dtype=torch.long)
        return {
            "accuracy": float((probs.argmax(1) == np.asarray(y)).mean()),
            "nll": float(-logp[torch.arange(len(yt)), yt].mean()),
            "ece": expected_calibration_error(probs, np.asarray(y)),
            "mean_confidence": float(probs.max(1).mean()),
        }
    t = target or {"center": 0.0, "scale": 1.0}
    mean, logvar = draws[..., 0].double(), draws[..., 1].double()
    ys = (torch.as_tensor(np.asarray(y), dtype=torch.float64) - t["center"]) / t["scale"]
    pred = mean.mean(0) * t["scale"] + t["center"]
    log_comp = -0.5 * (math.log(2 * math.pi) + logvar + (ys - mean).square() / logvar.exp())
    nll_std = -(torch.logsumexp(log_comp, dim=0) - math.log(S))
    err = pred.numpy() - np.asarray(y, dtype=np.float64)
    return {
        "rmse": float(np.sqrt(np.mean(err**2))),
        "mae": float(np.mean(np.abs(err))),
        "nll": float(nll_std.mean() + math.log(t["scale"])),
    }


# -- training -------------------------------------------------------------------
def _nll(out: torch.Tensor, y: torch.Tensor, task: str) -> torch.Tensor:
    if task == "classification":
        return F.cross_entropy(out, y)
    mean, logvar = out[:, 0], out[:, 1]
    return (0.5 * (logvar + (y - mean).square() * torch.exp(-logvar) + math.log(2 * math.pi))).mean()


def train(
    dataset: Dataset,
    *,
    arch: str = "mlp",
    posterior: str = "radial",
    epochs: int | None = None,
    seed: int = 0,
    out: Path | str | None = None,
    progress: bool | None = None,
    prior_from: Path | str | tuple[nn.Module, dict[str, Any]] | None = None,
    **hyper: Any,
) -> TrainResult:
    """Fit a variational ``arch`` network to ``dataset`` and (if ``out``) write its checkpoint.

    ``prior_from`` (a ``demur train`` checkpoint of one network, or ``load_checkpoint``'s
    (model, meta) of one) makes this a continual update (``demur.export.continual``): the
    network, its input standardisation and its labels come from there, training starts at
    its posterior with that posterior as the prior, and ``dataset`` holds only the new rows
    (its labels a subset of the checkpoint's). ``kl_warmup`` then defaults to 0: the prior
    already says what the old rows taught, so the KL pulls from the first step.

    ``hyper`` overrides ``DEFAULTS`` (lr, rho_lr, batch_size, prior_scale,
    kl_weight, kl_warmup, init_spread, init_sigma, hidden, channels, threads).
    ``init_spread`` None falls back to ``init_sigma`` (sigma itself, any
    posterior); ``rho_lr`` None gives the rho parameters the step size ``lr``.
    ``progress`` shows a tqdm bar (default: only when stderr is a terminal).
    """
    unknown = set(hyper) - set(DEFAULTS)
    if unknown:
        raise LayerConfigError(f"unknown training settings {sorted(unknown)}; known: {sorted(DEFAULTS)}",
                               field=sorted(unknown)[0])
    if arch not in ARCHITECTURES:
        raise LayerConfigError(f"arch must be one of {list(ARCHITECTURES)}; got {arch!r}", field="arch")
    if posterior not in POSTERIORS:
        raise LayerConfigError(f"posterior must be one of {list(POSTERIORS)}; got {posterior!r}", field="posterior")
    if arch == "conv" and dataset.image_shape is None:
        raise LayerConfigError(f"arch 'conv' needs image inputs; dataset {dataset.name!r} is tabular", field="arch")
    start = None
    if prior_from is not None:
        from demur.export.continual import update_start

        start = update_start(prior_from, dataset)
        arch, posterior, dataset = start["arch"], start["posterior"], start["dataset"]
        hyper = {"kl_warmup": 0.0, **hyper, **start["settings"]}
    h = {**DEFAULTS, **hyper}
    h["epochs"] = int(DEFAULTS["epochs"] if epochs is None else epochs)
    if h["epochs"] < 1:
        raise LayerConfigError(f"epochs must be >= 1; got {h['epochs']}", field="epochs")
    for key in ("lr", "rho_lr", "input_rho_lr"):
        if h[key] is not None and not (float(h[key]) > 0 and math.isfinite(float(h[key]))):
            raise LayerConfigError(f"{key} must be a positive number; got {h[key]}", field=key)
    if h["silent_inputs"] not in SILENT_INPUTS:
        raise LayerConfigError(f"silent_inputs must be one of {list(SILENT_INPUTS)}; got {h['silent_inputs']!r}",
                               field="silent_inputs")
    if h["lr_schedule"] not in LR_SCHEDULES:
        raise LayerConfigError(f"lr_schedule must be one of {list(LR_SCHEDULES)}; got {h['lr_schedule']!r}",
                               field="lr_schedule")
    if int(h["threads"]) < 1:
        raise LayerConfigError(f"threads must be >= 1; got {h['threads']}", field="threads")
    previous_threads = torch.get_num_threads()
    torch.set_num_threads(int(h["threads"]))
    try:
        return _fit(dataset, arch, posterior, seed, out, progress, h, start)
    finally:
        torch.set_num_threads(previous_threads)


def train_ensemble(dataset: Dataset, members: int, *, posterior: str = "radial", seed: int = 0,
                   out: Path | str | None = None, prior_from: Path | str | None = None,
                   **options: Any) -> list[TrainResult]:
    """``members`` variational networks on the same split, member i from seed ``seed * members + i``
    (its own initialisation and shuffling; Lakshminarayanan et al. 2017 train deep-ensemble members
    from random initialisations). ``options`` are ``train``'s. Exported together (``export_model``
    with the list of models, or ``demur export`` of the checkpoint ``out`` gets) they serve the
    mixture of the members' posteriors. The checkpoint's ``metrics`` are the mixture's (``EVAL_DRAWS``
    draws split evenly over the members); each member's own are under ``member_metrics``.
    ``prior_from``: an ensemble checkpoint of ``members`` networks; member i is updated from
    its member i (``train``'s ``prior_from``)."""
    if isinstance(members, bool) or not isinstance(members, int) or members < 2:
        raise LayerConfigError(f"an ensemble needs at least 2 members; got {members!r}", field="members")
    starts: list[Any] = [None] * members
    if prior_from is not None:
        old, meta = load_checkpoint(prior_from)
        if not isinstance(old, list) or len(old) != members:
            got = len(old) if isinstance(old, list) else 1
            raise LayerConfigError(f"{prior_from} holds {got} network(s); updating it needs --members {got}",
                                   field="prior_from")
        starts = [(model, {**meta, "name": f"{prior_from} member {i}"}) for i, model in enumerate(old)]
    results = [train(dataset, posterior=posterior, seed=seed * members + i, progress=False, prior_from=starts[i],
                     **options) for i in range(members)]
    if out is not None:
        _write_ensemble(results, Path(out), seed)
    return results


def _write_ensemble(results: list[TrainResult], out: Path, seed: int) -> None:
    """One checkpoint for the ensemble: member 0's metadata, ``members``, a list of state_dicts."""
    first, ds = results[0], results[0].dataset
    per = max(1, EVAL_DRAWS // len(results))
    metrics: dict[str, Any] = {
        "train_seconds": sum(r.metrics["train_seconds"] for r in results),
        "cpu_seconds": sum(r.metrics["cpu_seconds"] for r in results),
        "threads": first.metrics["threads"], "eval_draws": per * len(results),
    }
    target = dict(first.meta["target"])
    if first.meta["task"] == "classification":
        target.update(mixture_statistics(
            [r.model for r in results], first.meta["inputs"], ds.x_val, ds.y_val, ds.x_train,
            fit=bool(first.meta["training"].get("fit_temperature", False))))
    for split in ("val", "test"):
        x, y = ds.split(split)
        xt = torch.from_numpy(standardise_inputs(first.meta["inputs"], x))
        with torch.no_grad():
            draws = torch.cat([predict_draws(r.model, xt, S=per) for r in results])
        metrics[split] = predictive_metrics(draws, y, first.meta["task"], target)
    meta = {**first.meta, "name": f"{first.meta['name']}-x{len(results)}", "members": len(results), "target": target,
            "metrics": metrics, "member_metrics": [r.metrics for r in results],
            "training": {**first.meta["training"], "seed": int(seed),
                         "member_seeds": [int(r.meta["training"]["seed"]) for r in results]}}
    save_checkpoint(out, meta, [r.model.state_dict() for r in results])
    record = {k: meta[k] for k in ("name", "arch", "task", "labels", "data", "training", "metrics", "members")}
    (out / "training.json").write_text(json.dumps(record, indent=2) + "\n")


def _fit(
    dataset: Dataset, arch: str, posterior: str, seed: int, out: Path | str | None, progress: bool | None,
    h: dict[str, Any], start: dict[str, Any] | None = None,
) -> TrainResult:
    torch.manual_seed(seed)
    np.random.seed(seed % 2**32)
    started, cpu_started = time.perf_counter(), time.process_time()

    # An update keeps the old network's standardisation: its weights were fitted to it.
    inputs = _input_spec(dataset, arch) if start is None else start["meta"]["inputs"]
    task = dataset.task
    if start is not None:
        target = dict(start["meta"]["target"])
    elif task == "regression":
        ytr = dataset.y_train.astype(np.float64)
        target = {"center": float(ytr.mean()), "scale": float(max(ytr.std(), SCALE_FLOOR))}
    else:
        target = {"center": 0.0, "scale": 1.0}

    def tensors(x: np.ndarray, y: np.ndarray) -> tuple[torch.Tensor, torch.Tensor]:
        xt = torch.from_numpy(standardise_inputs(inputs, x))
        if task == "classification":
            return xt, torch.as_tensor(y, dtype=torch.long)
        return xt, torch.as_tensor((y - target["center"]) / target["scale"], dtype=torch.float32)

    x_tr, y_tr = tensors(dataset.x_train, dataset.y_train)
    x_va, _ = tensors(dataset.x_val, dataset.y_val)
    n = len(x_tr)
    model = build_model(
        arch, inputs["shape"], dataset.outputs, posterior,  # type: ignore[arg-type]
        prior_scale=float(h["prior_scale"]), hidden=tuple(h["hidden"]), channels=tuple(h["channels"]),
        init_sigma=float(h["init_sigma"]),
        init_spread=None if h["init_spread"] is None else float(h["init_spread"]),
        sigma_param=str(h["sigma_param"]),  # type: ignore[arg-type]
        input_sigma_param=h["input_sigma_param"],
    )
    if start is not None:
        from demur.export.continual import posterior_as_prior

        model.load_state_dict(start["model"].state_dict())
        model = posterior_as_prior(model)
    opt = _optimiser(model, float(h["lr"]), None if h["rho_lr"] is None else float(h["rho_lr"]),
                     None if h["input_rho_lr"] is None else float(h["input_rho_lr"]))
    bs = int(h["batch_size"])
    steps_per_epoch = math.ceil(n / bs)
    total_steps = h["epochs"] * steps_per_epoch
    shuffle = torch.Generator().manual_seed(seed)
    schedule = _lr_schedule(opt, str(h["lr_schedule"]), total_steps)
    history: list[dict[str, float]] = []
    show = sys.stderr.isatty() if progress is None else progress
    from tqdm import tqdm

    bar = tqdm(range(h["epochs"]), desc=f"train {arch}/{posterior}", disable=not show, leave=False)
    step = 0
    for epoch in bar:
        model.train()
        sums = {"nll": 0.0, "kl": 0.0}
        for idx in torch.randperm(n, generator=shuffle).split(bs):
            beta = kl_weight(step, total_steps, warmup=float(h["kl_warmup"]), weight=float(h["kl_weight"]))
            nll = _nll(model(x_tr[idx]), y_tr[idx], task)
            kl = total_kl(model)
            loss = nll + beta * kl / n
            if not torch.isfinite(loss):
                raise TrainingError(
                    f"loss became {loss.item()} at epoch {epoch + 1}, step {step + 1} (lr {h['lr']}); "
                    "expected a finite number: try a smaller --lr", field="lr"
                )
            opt.zero_grad(set_to_none=True)
            loss.backward()
            opt.step()
            schedule.step()
            step += 1
            sums["nll"] += nll.item() * len(idx) / n
            sums["kl"] = kl.item()
        model.eval()
        row = {"epoch": epoch + 1, "nll": sums["nll"], "kl_per_example": sums["kl"] / n, "beta": beta}
        if (epoch + 1) % 10 == 0 or epoch + 1 == h["epochs"]:
            val = predictive_metrics(predict_draws(model, x_va, S=8), dataset.y_val, task, target)
            row.update({f"val_{k}": v for k, v in val.items()})
            bar.set_postfix({k: round(v, 4) for k, v in row.items() if k in ("nll", "val_accuracy", "val_rmse")})
        history.append(row)
    bar.close()
    if h["silent_inputs"] != "learn":  # their exact posterior (export/silent_inputs.py)
        silent = put_silent_inputs_at_prior(model, x_tr, str(h["silent_inputs"]))
    train_seconds = time.perf_counter() - started
    cpu_seconds = time.process_time() - cpu_started

    model.eval()
    metrics: dict[str, Any] = {
        "train_seconds": train_seconds,
        "cpu_seconds": cpu_seconds,
        "threads": int(h["threads"]),
        "eval_draws": EVAL_DRAWS,
    }
    if task == "classification":
        target.update(mixture_statistics([model], inputs, dataset.x_val, dataset.y_val, dataset.x_train,
                                         fit=bool(h["fit_temperature"])))
    for split in ("val", "test"):
        x, y = dataset.split(split)
        metrics[split] = predictive_metrics(predict_draws(model, tensors(x, y)[0]), y, task, target)
    metrics["sigma"] = _sigma_summary(model)
    if h["silent_inputs"] != "learn":
        metrics["silent_inputs"] = silent

    settings = {k: (list(v) if isinstance(v, tuple) else v) for k, v in h.items()}
    meta: dict[str, Any] = {
        "format": CHECKPOINT_FORMAT,
        "version": CHECKPOINT_VERSION,
        "name": f"{dataset.name}-{arch}-{posterior}",
        "arch": {
            "kind": arch,
            "hidden": [int(v) for v in h["hidden"]],
            "channels": [int(v) for v in h["channels"]],
            "posterior": posterior,
            "prior_scale": float(h["prior_scale"]),
            "init_sigma": float(h["init_sigma"]),
            "sigma_param": str(h["sigma_param"]),
            "input_sigma_param": None if h["input_sigma_param"] is None else str(h["input_sigma_param"]),
        },
        "task": task,
        "labels": list(dataset.labels),
        "inputs": inputs,
        "target": target,
        "data": {"source": dataset.source, "target": dataset.target, "seed": int(dataset.seed)},
        "metrics": metrics,
        "training": {**settings, "seed": int(seed), "n_train": n,
                     **({"prior_from": start["source"]} if start is not None else {})},
        "drift_features": feature_reference(dataset.x_train),
    }
    out_dir = None
    if out is not None:
        out_dir = Path(out)
        save_checkpoint(out_dir, meta, model.state_dict())
        record = {k: meta[k] for k in ("name", "arch", "task", "labels", "data", "training", "metrics")}
        (out_dir / "training.json").write_text(json.dumps({**record, "history": history}, indent=2) + "\n")
    return TrainResult(model=model, meta=meta, metrics=metrics, out=out_dir, dataset=dataset)


def kl_weight(step: int, total_steps: int, *, warmup: float = KL_WARMUP, weight: float = KL_WEIGHT) -> float:
    """The KL term's weight at 0-based ``step``: ramps linearly from 0 to ``weight`` over the first
    ``warmup`` fraction of ``total_steps`` (KL annealing), then stays. Loss per mini-batch:
    ``nll + kl_weight(step, total) * total_kl(model) / n_train`` (module docstring)."""
    warm = max(1, int(round(float(warmup) * int(total_steps))))
    return min(1.0, (int(step) + 1) / warm) * float(weight)


LR_SCHEDULES = ("constant", "cosine")
"""How every step size changes over training: kept, or decayed to 0 along a half cosine
(Loshchilov & Hutter, "SGDR", ICLR 2017, eq. (5) with one cycle and eta_min = 0)."""


def _lr_schedule(opt: torch.optim.Optimizer, kind: str, total_steps: int) -> torch.optim.lr_scheduler.LRScheduler:
    if kind == "cosine":
        return torch.optim.lr_scheduler.CosineAnnealingLR(opt, T_max=total_steps, eta_min=0.0)
    return torch.optim.lr_scheduler.LambdaLR(opt, lambda step: 1.0)


def elbo_optimiser(model: nn.Module, lr: float = 3e-3, rho_lr: float | None = 1e-3) -> torch.optim.Optimizer:
    """Adam with demur's separate step size for the ``*_rho`` (sigma) parameters; see the module
    docstring for why sigma moves more gently than the means (``rho_lr`` None: one step size)."""
    return _optimiser(model, lr, rho_lr)


def _optimiser(model: nn.Module, lr: float, rho_lr: float | None,
               input_rho_lr: float | None = None) -> torch.optim.Optimizer:
    """Adam; the ``*_rho`` parameters get their own step size ``rho_lr`` when given, and those of
    the first variational layer ``input_rho_lr`` when that is given."""
    first = {id(p) for p in (variational_layers(model) or [nn.Module()])[0].parameters()}
    groups: dict[float, list[nn.Parameter]] = {}
    for name, p in model.named_parameters():
        step = lr
        if name.endswith("_rho"):
            step = input_rho_lr if input_rho_lr is not None and id(p) in first else (rho_lr or lr)
        groups.setdefault(step, []).append(p)
    return torch.optim.Adam([{"params": ps, "lr": step} for step, ps in groups.items()], lr=lr)


def _sigma_summary(model: nn.Module) -> dict[str, Any]:
    """sigma's median / max / min, the median per-parameter posterior sd (``spread``), and each
    variational layer's median weight sd (module order)."""
    with torch.no_grad():
        layers = variational_layers(model)
        sig = torch.cat([t.flatten() for m in layers for t in (m.weight_sigma, m.bias_sigma)])
        spread = torch.cat([t.flatten() for m in layers for t in m.spread().values()])
    return {"median": float(sig.median()), "max": float(sig.max()), "min": float(sig.min()),
            "spread_median": float(spread.median()),
            "weight_spread_median_by_layer": [float(m.spread()["weight"].median()) for m in layers]}


def summary_line(result: TrainResult) -> str:
    """One human line: what was trained, its test metrics, how long it took, where it went."""
    m = result.metrics
    t = m["test"]
    what = f"{result.meta['name']} ({len(result.dataset.y_train)} training cases)"
    if result.meta["task"] == "classification":
        score = f"test accuracy {t['accuracy']:.3f}, ECE {t['ece']:.3f} (15 bins), NLL {t['nll']:.3f}"
    else:
        score = f"test RMSE {t['rmse']:.4g}, MAE {t['mae']:.4g}, NLL {t['nll']:.3f}"
    where = f" -> {result.checkpoint_path}" if result.out is not None else ""
    took = f"trained in {m['train_seconds']:.1f} s (CPU {m['cpu_seconds']:.1f} s, {m['threads']} threads)"
    return f"{what}: {score}; {took}{where}"
