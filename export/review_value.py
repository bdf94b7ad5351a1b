"""What the review order buys: accuracy gained per label when people key the most uncertain
referrals first (``review_order = "most_uncertain"``) rather than the oldest.

The depot's situation, simulated on the digits' training split (scikit-learn's bundled
set): a network trained on a small labelled start (``start`` rows) serves the rest of the
split as traffic; the cases its served score refers (the ``referred`` share with the highest
predictive entropy) wait in the queue; people key ``budget`` of them, either first in, first
out (arrival order) or by decreasing mutual information between prediction and weights (BALD,
Houlsby et al. 2011); the network is retrained on the start plus the keyed cases and measured
on the untouched test split. Retraining is from scratch with the same settings and seed, so
the only difference between the two arms is which cases were keyed.

    python -m demur.export.review_value --seeds 0 1 2 --budget 60

Prints one row per seed and the mean; README, "Human review", has the table.
"""

from __future__ import annotations

import argparse
import dataclasses
import sys
from typing import Any

import numpy as np
import torch

from demur.serve.core.summary import summarise

from demur.export.datasets import Dataset, load_dataset
from demur.export.training import predict_draws, standardise_inputs, train

__all__ = ["main", "measure_review_order"]


def _subset(ds: Dataset, rows: np.ndarray) -> Dataset:
    return dataclasses.replace(ds, x_train=ds.x_train[rows], y_train=ds.y_train[rows])


def measure_review_order(seed: int, *, start: int = 150, budget: int = 60, referred: float = 0.3,
                         epochs: int = 40, draws: int = 32) -> dict[str, Any]:
    """One seed of the trial (module docstring): test accuracy of the start model, and after
    retraining with ``budget`` labels picked first-in-first-out and by mutual information."""
    ds = load_dataset("digits")
    rng = np.random.default_rng(seed)
    order = rng.permutation(len(ds.y_train))
    first, pool = order[:start], order[start:]
    settings = {"hidden": (64,), "threads": 1}
    base = train(_subset(ds, first), seed=seed, epochs=epochs, progress=False, **settings)
    torch.manual_seed(seed)
    x_pool = torch.as_tensor(standardise_inputs(base.meta["inputs"], ds.x_train[pool]))
    summary = summarise("classification", predict_draws(base.model, x_pool, S=draws).numpy(), 0.9, {})
    cut = np.quantile(summary.predictive_entropy, 1.0 - referred)
    queue = np.flatnonzero(summary.predictive_entropy >= cut)  # arrival order: the pool's order
    picks = {"oldest": queue[:budget],
             "most_uncertain": queue[np.argsort(-summary.mutual_information[queue], kind="stable")][:budget]}
    out: dict[str, Any] = {"seed": seed, "start": start, "budget": budget, "queue": int(len(queue)),
                           "start_accuracy": base.metrics["test"]["accuracy"]}
    for name, picked in picks.items():
        rows = np.concatenate([first, pool[picked]])
        result = train(_subset(ds, rows), seed=seed, epochs=epochs, progress=False, **settings)
        out[name] = result.metrics["test"]["accuracy"]
        out[f"{name}_gain_per_label"] = (out[name] - out["start_accuracy"]) / budget
    return out


def _table(rows: list[dict[str, Any]], start: int, budget: int) -> list[str]:
    """The trial's rows as a Markdown table, with the mean and the paired difference."""
    out = [f"{budget} labels on top of {start}; test accuracy (359 digits); gain in accuracy points per 100 labels",
           "| seed | start | oldest first | most uncertain first | gain per 100 labels: oldest / most uncertain |",
           "|---|---|---|---|---|"]
    keys = ("start_accuracy", "oldest", "most_uncertain", "oldest_gain_per_label", "most_uncertain_gain_per_label")
    mean = {k: float(np.mean([r[k] for r in rows])) for k in keys}
    for r in [*rows, {"seed": "mean", **mean}]:
        out.append(f"| {r['seed']} | {r['start_accuracy']:.3f} | {r['oldest']:.3f} | {r['most_uncertain']:.3f} | "
                   f"{1e4 * r['oldest_gain_per_label']:.1f} / {1e4 * r['most_uncertain_gain_per_label']:.1f} |")
    diff = np.array([r["most_uncertain"] - r["oldest"] for r in rows])
    se = float(diff.std(ddof=1) / np.sqrt(len(diff))) if len(diff) > 1 else float("nan")
    out.append(f"most uncertain minus oldest: {diff.mean():+.4f} accuracy (paired standard error {se:.4f}, "
               f"{len(diff)} seeds)")
    return out


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m demur.export.review_value", description=__doc__.split("\n\n")[0])
    p.add_argument("--seeds", type=int, nargs="+", default=[0, 1, 2])
    p.add_argument("--start", type=int, default=150)
    p.add_argument("--budget", type=int, default=60)
    p.add_argument("--epochs", type=int, default=40)
    args = p.parse_args(argv)
    rows = [measure_review_order(s, start=args.start, budget=args.budget, epochs=args.epochs) for s in args.seeds]
    print("\n".join(_table(rows, args.start, args.budget)))
    return 0


if __name__ == "__main__":
    sys.exit(main())
