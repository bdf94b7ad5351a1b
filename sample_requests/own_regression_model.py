"""Bring your own regression model: a small variational net of your own on scikit-learn's bundled
diabetes data (10 measurements per patient, disease progression one year later: mean about 152,
sd about 77), trained in a few seconds on the STANDARDISED target, with the training, calibration
and test rows written as CSVs for ``demur export``, ``demur calibrate`` and ``demur evaluate``.

    python sample_requests/own_regression_model.py [OUT_DIR]     (default build/own-regression)

Writes OUT_DIR/weights.pt (the state_dict) and OUT_DIR/train.csv, cal.csv, test.csv (feature
names and a ``progression`` column), then prints the commands that export, calibrate and
evaluate it from the command line (README, "A regression model"). The network outputs two
numbers per case, the mean and the log-variance of the standardised target; ``demur export
--target-stats data`` records the mean and sd it was standardised with, so the server answers in
the target's own units. A model like this one supports, and never replaces, the judgement of a
qualified clinician.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import torch
from sklearn.datasets import load_diabetes
from torch import nn

from demur.export import input_spec
from demur.export.layers import VariationalLinear
from demur.export.elbo import fit_elbo

TARGET = "progression"


def build_model() -> nn.Module:
    """The factory ``demur export --factory`` calls (no arguments): [B, 10] -> [B, 2] (mean, log-variance)."""
    return nn.Sequential(VariationalLinear(10, 32, posterior="gaussian", init_spread=0.02), nn.ReLU(),
                         VariationalLinear(32, 2, posterior="gaussian", init_spread=0.02))


def _write_csv(path: Path, x: np.ndarray, y: np.ndarray, names: list[str]) -> None:
    with path.open("w") as f:
        f.write(",".join([*names, TARGET]) + "\n")
        for row, value in zip(x, y):
            f.write(",".join([*(repr(float(v)) for v in row), repr(float(value))]) + "\n")


def main(out: str = "build/own-regression") -> None:
    torch.manual_seed(0)
    torch.set_num_threads(1)
    data = load_diabetes()
    x, y = data.data * 100.0, data.target          # measurements in readable units
    names = [str(n) for n in data.feature_names]
    perm = np.random.default_rng(0).permutation(len(y))
    train, cal, test = perm[:300], perm[300:371], perm[371:]
    spec = input_spec(x[train], names=names)
    xt = torch.from_numpy(spec.standardise(x[train])).float()
    center, scale = float(np.mean(y[train])), float(np.std(y[train]))   # what --target-stats data computes
    yt = torch.from_numpy((y[train] - center) / scale).float()

    model = build_model()
    seconds = fit_elbo(model, xt, yt, task="regression", epochs=150, batch=32, lr=1e-2)   # Gaussian NLL + KL
    print(f"trained in {seconds:.1f} s on {len(xt)} rows")

    root = Path(out)
    root.mkdir(parents=True, exist_ok=True)
    torch.save(model.state_dict(), root / "weights.pt")
    for name, rows in (("train", train), ("cal", cal), ("test", test)):
        _write_csv(root / f"{name}.csv", x[rows], y[rows], names)
    here = Path(__file__).resolve().parent
    print(f"next (from {here}):\n"
          f"  demur export --factory own_regression_model:build_model --weights {root.resolve() / 'weights.pt'} "
          f"--data {root.resolve() / 'train.csv'} --target {TARGET} --task regression --target-stats data "
          f"--out {root.resolve() / 'bundle'}\n"
          f"  demur calibrate {root.resolve() / 'bundle'} --data {root.resolve() / 'cal.csv'} --target {TARGET} "
          f"--test {root.resolve() / 'test.csv'} --coverage 0.9\n"
          f"  demur evaluate {root.resolve() / 'bundle'} --data {root.resolve() / 'test.csv'} --target {TARGET} "
          f"--out {root.resolve() / 'evaluation'}")


if __name__ == "__main__":
    main(*sys.argv[1:2])
