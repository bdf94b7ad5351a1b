"""Your own deterministic backbone with a variational head ("Bayesian last layers"), end to end:
train (or load) the backbone, freeze it, fit a variational head on features computed once,
export the whole model, calibrate, and run it the way the server does. Nothing is downloaded:
the images are scikit-learn's bundled 8x8 digits (the depot's handwritten postcode digits).

    python sample_requests/own_backbone.py [OUT_DIR] [--weights backbone_state_dict.pt]

``--weights``: your own trained backbone's ``state_dict`` (this script's ``Backbone``
architecture; put yours in its place); without it the backbone is trained here in seconds.

Why this shape: a trained network you already trust stays as it is; only the last layers learn
a weight posterior, from features computed once (seconds, not minutes). demur's export runs the
frozen backbone once per call and only the head once per draw (the manifest's
``graphs.<kind>.computation`` says where the draws enter), so serving 32 draws costs about what
the deterministic network costs.
"""

from __future__ import annotations

import argparse
import time

import torch
import torch.nn.functional as F
from sklearn.datasets import load_digits
from sklearn.model_selection import train_test_split
from torch import nn

from demur.export import calibrate, export_model, input_spec
from demur.export.layers import VariationalLinear
from demur.export.elbo import fit_elbo
from demur.serve.adapters.engine import Engine
from demur.serve.core.bundle import load_bundle
from demur.serve.core.decision import decide, rule_from
from demur.serve.core.summary import summarise
from demur.serve.core.support import support_from_manifest


class Block(nn.Module):
    """conv -> batch norm -> ReLU -> conv -> batch norm, + the input, ReLU."""

    def __init__(self, channels: int) -> None:
        super().__init__()
        self.conv1, self.bn1 = nn.Conv2d(channels, channels, 3, padding=1), nn.BatchNorm2d(channels)
        self.conv2, self.bn2 = nn.Conv2d(channels, channels, 3, padding=1), nn.BatchNorm2d(channels)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return F.relu(x + self.bn2(self.conv2(F.relu(self.bn1(self.conv1(x))))))


class Backbone(nn.Module):
    """[1, 8, 8] -> 64 features: plain torch, deterministic (yours goes here)."""

    def __init__(self) -> None:
        super().__init__()
        self.stem = nn.Sequential(nn.Conv2d(1, 16, 3, padding=1), nn.BatchNorm2d(16), nn.ReLU())
        self.blocks = nn.Sequential(Block(16), nn.MaxPool2d(2), Block(16), nn.AdaptiveAvgPool2d(2))
        self.features = nn.Linear(16 * 2 * 2, 64)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return F.relu(self.features(self.blocks(self.stem(x)).flatten(1)))


def variational_head(features: int = 64, classes: int = 10) -> nn.Sequential:
    """The only uncertain part: two of demur's variational layers."""
    return nn.Sequential(VariationalLinear(features, 32, posterior="gaussian", init_spread=0.02), nn.GELU(),
                         VariationalLinear(32, classes, posterior="gaussian", init_spread=0.02))


def train_backbone(xt: torch.Tensor, yt: torch.Tensor, epochs: int = 15) -> Backbone:
    """Ordinary deterministic training with a throw-away linear classifier on top."""
    backbone, probe = Backbone(), nn.Linear(64, 10)
    opt = torch.optim.Adam([*backbone.parameters(), *probe.parameters()], lr=3e-3)
    for _ in range(epochs):
        backbone.train()
        for idx in torch.randperm(len(xt)).split(64):
            loss = F.cross_entropy(probe(backbone(xt[idx])), yt[idx])
            opt.zero_grad()
            loss.backward()
            opt.step()
    return backbone


def fit_head(features: torch.Tensor, yt: torch.Tensor, epochs: int = 60) -> nn.Sequential:
    """The ELBO on features computed once: cross-entropy + annealed KL / n (demur.export.elbo.fit_elbo)."""
    head = variational_head(features.shape[1])
    fit_elbo(head, features, yt, epochs=epochs, batch=128, threads=None)
    return head


def main(out: str = "build/own-backbone", weights: str | None = None) -> None:
    torch.manual_seed(0)
    torch.set_num_threads(1)
    x, y = load_digits(return_X_y=True)
    x_train, x_rest, y_train, y_rest = train_test_split(x, y, test_size=0.45, random_state=0, stratify=y)
    x_ref, x_rest, _, y_rest = train_test_split(x_rest, y_rest, test_size=0.75, random_state=0, stratify=y_rest)
    x_cal, x_test, y_cal, y_test = train_test_split(x_rest, y_rest, test_size=0.4, random_state=0, stratify=y_rest)
    spec = input_spec(x_train, names=[f"px_r{r}c{c}" for r in range(8) for c in range(8)], shape=[1, 8, 8])
    xt, yt = torch.from_numpy(spec.standardise(x_train)), torch.as_tensor(y_train)

    started = time.perf_counter()
    if weights:
        backbone = Backbone()
        backbone.load_state_dict(torch.load(weights, weights_only=True))
    else:
        backbone = train_backbone(xt, yt)
    backbone.eval().requires_grad_(False)                       # frozen: batch norm on its running statistics
    with torch.no_grad():
        features = backbone(xt)                                 # once
    t_backbone = time.perf_counter() - started
    head = fit_head(features, yt)
    print(f"backbone {'loaded' if weights else f'trained in {t_backbone:.1f} s'}; variational head fitted on "
          f"{len(features)} feature rows in {time.perf_counter() - started - t_backbone:.1f} s")

    model = nn.Sequential(backbone, head).eval()
    bundle = export_model(model, out, inputs=spec, labels=[str(d) for d in range(10)], kind="flip", draws=32,
                          reference=x_ref, name="postcode-digits-backbone", seed=0)
    m = bundle.manifest
    print(f"wrote {bundle.path}: {m.posterior['family']} head, graphs {sorted(m.graphs)}; flip graph: "
          f"{bundle.manifest.raw['graphs']['flip']['computation']}")

    record = calibrate(out, x_cal, y_cal, target_accuracy=0.98, confidence=0.9, max_abstain=0.5)
    print(f"calibrated: {record['score']} > {record['threshold']:.4g} abstains")

    b = load_bundle(out)
    engine = Engine(b).load()
    s = summarise(b.manifest.task, engine.run(x_test), b.manifest.interval_level, b.manifest.target)
    # as the server decides: the calibrated rule, and the support check on the raw inputs
    verdicts = decide(s, rule_from(b.manifest), support=support_from_manifest(b.manifest), x_raw=x_test)
    kept = ~verdicts.abstain
    accuracy = float((s.prediction[kept] == y_test[kept]).mean()) if kept.any() else float("nan")
    print(f"test: {kept.mean():.1%} accepted, accuracy on them {accuracy:.3f} (all: "
          f"{float((s.prediction == y_test).mean()):.3f}); serve it with: demur serve {out}")
    print("demur supports, never replaces, the judgement of the person keying uncertain postcodes.")


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("out", nargs="?", default="build/own-backbone")
    parser.add_argument("--weights", default=None, help="your backbone's state_dict (torch.save)")
    args = parser.parse_args()
    main(args.out, args.weights)
