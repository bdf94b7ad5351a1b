"""Bring your own tabular model: a small variational net of your own on scikit-learn's bundled
breast-cancer data (30 named measurements, two classes), trained in a few seconds, exported
with demur's public API, with the held-out rows written as a labelled CSV whose columns are
named and shuffled, ready for ``demur calibrate``.

    python sample_requests/own_tabular_model.py [OUT_DIR]     (default build/own-tabular)

Writes OUT_DIR/bundle (the bundle), OUT_DIR/weights.pt (the state_dict, for
``demur export --factory sample_requests.own_tabular_model:build_model``), OUT_DIR/train.csv,
OUT_DIR/holdout-cal.csv and OUT_DIR/holdout-test.csv (feature names and a ``diagnosis`` column).

The architecture is yours: a variational input layer, layer norm, a residual block with a
variational layer and GELU, and a deterministic ``nn.Linear`` head. A model like this one
supports, and never replaces, the judgement of a qualified clinician.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import torch
import torch.nn.functional as F
from sklearn.datasets import load_breast_cancer
from sklearn.model_selection import train_test_split
from torch import nn

from demur.export import export_model, input_spec
from demur.export.layers import VariationalLinear
from demur.export.elbo import fit_elbo

TARGET = "diagnosis"


class ResidualBlock(nn.Module):
    def __init__(self, width: int) -> None:
        super().__init__()
        self.norm = nn.LayerNorm(width)
        self.inner = VariationalLinear(width, width, posterior="gaussian", init_spread=0.02)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return x + F.gelu(self.inner(self.norm(x)))


class TriageNet(nn.Module):
    def __init__(self, n_features: int = 30, width: int = 32, n_classes: int = 2) -> None:
        super().__init__()
        self.inp = VariationalLinear(n_features, width, posterior="gaussian", init_spread=0.02)
        self.block = ResidualBlock(width)
        self.head = nn.Linear(width, n_classes)        # deterministic: no weight uncertainty here

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.head(self.block(torch.tanh(self.inp(x))))


def build_model() -> nn.Module:
    """The factory ``demur export --factory`` calls (no arguments)."""
    return TriageNet()


def _write_csv(path: Path, x: np.ndarray, y: np.ndarray, names: list[str], labels: list[str],
               seed: int | None) -> None:
    """Named columns (shuffled when ``seed`` is given), the class written as its name."""
    order = np.arange(len(names)) if seed is None else np.random.default_rng(seed).permutation(len(names))
    with path.open("w") as f:
        f.write(",".join([TARGET] + [names[i] for i in order]) + "\n")
        for row, label in zip(x, y):
            f.write(",".join([labels[int(label)]] + [repr(float(row[i])) for i in order]) + "\n")


def main(out: str = "build/own-tabular") -> None:
    torch.manual_seed(0)
    torch.set_num_threads(1)
    data = load_breast_cancer()
    names, labels = [str(n) for n in data.feature_names], [str(n) for n in data.target_names]
    x_train, x_held, y_train, y_held = train_test_split(data.data, data.target, test_size=0.45, random_state=0,
                                                        stratify=data.target)
    spec = input_spec(x_train, names=names)
    xt, yt = torch.from_numpy(spec.standardise(x_train)).float(), torch.as_tensor(y_train)

    model = TriageNet(len(names), 32, len(labels))
    seconds = fit_elbo(model, xt, yt, epochs=60, batch=32)
    print(f"trained in {seconds:.1f} s on {len(xt)} rows")

    root = Path(out)
    root.mkdir(parents=True, exist_ok=True)
    torch.save(model.state_dict(), root / "weights.pt")
    n_cal = int(len(x_held) * 0.6)
    _write_csv(root / "train.csv", x_train, y_train, names, labels, seed=None)   # the model's input order
    _write_csv(root / "holdout-cal.csv", x_held[:n_cal], y_held[:n_cal], names, labels, seed=2)
    _write_csv(root / "holdout-test.csv", x_held[n_cal:], y_held[n_cal:], names, labels, seed=3)

    bundle = export_model(model, root / "bundle", inputs=spec, labels=labels, kind="stacked", draws=32,
                          reference=x_held[:n_cal], name="tabular-triage", seed=0)
    m = bundle.manifest
    print(f"wrote {bundle.path}: {m.posterior['family']} posterior, graphs {sorted(m.graphs)}, "
          f"default threshold {m.decision.threshold:.4f} nats (uncalibrated: run demur calibrate)")
    print(f"held-out CSVs: {root / 'holdout-cal.csv'} ({n_cal} rows), {root / 'holdout-test.csv'} "
          f"({len(x_held) - n_cal} rows); next: demur calibrate {root / 'bundle'} --data {root / 'holdout-cal.csv'} "
          f"--test {root / 'holdout-test.csv'} --target-accuracy 0.95")


if __name__ == "__main__":
    main(*sys.argv[1:2])
