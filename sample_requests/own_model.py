"""Bring your own model: train a small variational conv net of your own on scikit-learn's
bundled 8x8 digits (the depot's handwritten postcode digits) in a few seconds, export it
with demur's public API, and run the bundle the way the server does.

    python sample_requests/own_model.py [OUT_DIR]     (default build/own-model)

The architecture is yours: a deterministic conv stem, max-pool, a residual block with batch
norm and GELU, and demur's variational layers where you want weight uncertainty. Only the
variational layers must be demur's; everything else is plain torch.

This file stands alone on purpose (you copy it, nothing else): its ``Residual`` block is the
same block ``demur.export.layers.ResidualBlock`` gives the benchmark and the tests, written
out here so you can read and change it.
"""

from __future__ import annotations

import sys
import time

import numpy as np
import torch
import torch.nn.functional as F
from sklearn.datasets import load_digits
from sklearn.model_selection import train_test_split
from torch import nn

from demur.export import export_model, input_spec
from demur.export.layers import VariationalConv2d, VariationalLinear
from demur.export.training import elbo_optimiser, kl_weight, total_kl
from demur.serve.adapters.engine import Engine
from demur.serve.core.bundle import load_bundle
from demur.serve.core.summary import summarise


class Residual(nn.Module):
    def __init__(self, channels: int) -> None:
        super().__init__()
        self.conv = VariationalConv2d(channels, channels, 3, padding=1, posterior="radial", init_spread=0.02)
        self.bn = nn.BatchNorm2d(channels)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return F.gelu(x + self.bn(self.conv(x)))


class PostcodeNet(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.stem = nn.Conv2d(1, 8, 3, padding=1)
        self.block = Residual(8)
        self.head = VariationalLinear(8 * 4 * 4, 10, posterior="radial", init_spread=0.02)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = F.max_pool2d(torch.relu(self.stem(x)), 2)
        return self.head(self.block(h).flatten(1))


def main(out: str = "build/own-model") -> None:
    torch.manual_seed(0)
    x, y = load_digits(return_X_y=True)
    x_train, x_held, y_train, y_held = train_test_split(x, y, test_size=0.3, random_state=0, stratify=y)
    spec = input_spec(x_train, names=[f"px_r{r}c{c}" for r in range(8) for c in range(8)], shape=[1, 8, 8])
    xt, yt = torch.from_numpy(spec.standardise(x_train)), torch.as_tensor(y_train)

    model = PostcodeNet()
    opt = elbo_optimiser(model, lr=3e-3, rho_lr=1e-3)     # sigma moves more gently than the means
    torch.set_num_threads(1)                               # small matrices: a second thread mostly waits
    epochs, batch = 8, 64
    total = epochs * ((len(xt) + batch - 1) // batch)
    started, step = time.perf_counter(), 0
    for _ in range(epochs):
        model.train()
        for idx in torch.randperm(len(xt)).split(batch):
            loss = F.cross_entropy(model(xt[idx]), yt[idx]) + kl_weight(step, total) * total_kl(model) / len(xt)
            opt.zero_grad()
            loss.backward()
            opt.step()
            step += 1
    model.eval()
    print(f"trained in {time.perf_counter() - started:.1f} s")

    bundle = export_model(model, out, inputs=spec, labels=[str(d) for d in range(10)], kind="flip", draws=32,
                          reference=x_held[:200], name="postcode-digits", seed=0)
    m = bundle.manifest
    print(f"wrote {bundle.path}: {m.posterior['family']} posterior, graphs {sorted(m.graphs)}, "
          f"default threshold {m.decision.threshold:.4f} nats (uncalibrated: run demur calibrate)")

    engine = Engine(load_bundle(out)).load()
    s = summarise(m.task, engine.run(x_held[200:]), m.interval_level, m.target)
    accuracy = float((s.prediction == y_held[200:]).mean())
    print(f"held-out accuracy {accuracy:.3f}; mean mutual information {s.mutual_information.mean():.4f} nats")


if __name__ == "__main__":
    main(*sys.argv[1:2])
