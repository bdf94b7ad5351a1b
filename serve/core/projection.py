"""A fixed sparse random projection: how the support check measures distance on large inputs.

Why: the support check's k-NN distance reads a stored sample of standardised training rows
(serve/core/support.py). At 3x224x224 a row is 150,528 numbers, so the default 2,000-row sample
would be 1.2 GB of float32 in the manifest and about 300M multiply-adds per case. Above
``PROJECT_ABOVE`` features the check therefore works in a ``dims``-dimensional image of the
standardised case, ``y = z @ R``, and stores the sample projected (2,000 x 512 float32: 4 MB).

R is the "very sparse random projection" of Li, Hastie & Church (KDD 2006): each of the
``dims`` columns adds ``k = ceil(sqrt(F))`` randomly chosen features with random signs, scaled
by ``sqrt(F / (dims * k))`` so that E[|z R|^2] = |z|^2 (Johnson-Lindenstrauss: pairwise distances
are kept within a small relative error with high probability; Achlioptas 2003 for sparse signs).
Per case it costs dims x k multiply-adds (512 x 388 at 150,528 features), not F x N.

The projection is part of the score, a fixed function of the case given the record (its seed,
F and dims), so the split-conformal threshold set on projected held-out distances keeps its
stated false-alarm bound (serve/core/support.py); what the projection changes is only how well
the distance separates far-off cases, measured in tests/serve/core/test_projection.py.
R is rebuilt from the seed at load (``Projection.build``), never stored.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["PROJECT_ABOVE", "PROJECTION_DIMS", "Projection", "projection_for"]

PROJECT_ABOVE = 1024
"""Inputs with more features than this (a 32x32 grey image has 1,024) get a projected support
check; at or below it the exact distance costs at most 2,000 x 1,024 multiply-adds per case. A
3x32x32 colour image (3,072) pays 512 x 56 for the projection and 2,000 x 512 for the distance
instead of 2,000 x 3,072."""

PROJECTION_DIMS = 512
"""Dimensions of the projected space (Johnson-Lindenstrauss: relative distance error about
sqrt(8 ln n / dims), ~0.17 for n = 2,000 stored rows; in practice much smaller, see the tests)."""


@dataclass(frozen=True)
class Projection:
    """The sparse matrix R [F, dims] as per-column feature indices and signed weights.

    ``cols``: int64[dims, k] feature indices; ``weights``: float32[dims, k] (+-c)."""

    features: int
    dims: int
    seed: int
    cols: np.ndarray
    weights: np.ndarray

    @classmethod
    def build(cls, features: int, dims: int, seed: int) -> Projection:
        """R for ``features`` inputs, rebuilt identically from ``seed`` (numpy's PCG64 stream)."""
        k = max(1, math.ceil(math.sqrt(features)))
        rng = np.random.Generator(np.random.PCG64(seed))
        cols = rng.integers(0, features, size=(dims, k), dtype=np.int64)
        signs = rng.integers(0, 2, size=(dims, k), dtype=np.int8).astype(np.float32) * 2.0 - 1.0
        weights = (signs * np.float32(math.sqrt(features / (dims * k)))).astype(np.float32)
        return cls(features=int(features), dims=int(dims), seed=int(seed), cols=cols, weights=weights)

    def apply(self, z: np.ndarray) -> np.ndarray:
        """float32[B, F] standardised cases -> float32[B, dims]; chunked so a large batch gathers
        at most about 16M numbers at a time."""
        z = np.asarray(z, dtype=np.float32).reshape(len(z), -1)
        out = np.empty((len(z), self.dims), dtype=np.float32)
        step = max(1, (1 << 24) // max(1, self.cols.size))
        with np.errstate(over="ignore", invalid="ignore"):   # an inf case stays non-finite: the range check flags it
            for start in range(0, len(z), step):
                part = z[start:start + step]
                np.einsum("bdk,dk->bd", part[:, self.cols], self.weights, out=out[start:start + step])
        return out

    def record(self) -> dict[str, object]:
        """What the manifest's support section stores to rebuild R (``projection_record``)."""
        return {"kind": "very_sparse_random", "features": self.features, "dims": self.dims, "seed": self.seed,
                "per_column": int(self.cols.shape[1]),
                "method": "Li, Hastie & Church 2006: each column sums ceil(sqrt(F)) random features with random "
                          "signs, scaled so that squared distances are kept in expectation"}


def projection_for(features: int, seed: int = 0, dims: int = PROJECTION_DIMS) -> Projection | None:
    """The projection an input of ``features`` features gets: None at or below ``PROJECT_ABOVE``."""
    return Projection.build(features, dims, seed) if features > PROJECT_ABOVE else None
