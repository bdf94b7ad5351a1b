"""Input and score drift: the reference written into a bundle, and the
statistics that compare recent traffic with it.

Reference (built at export/calibration time, stored under the manifest's
``drift_reference``)::

    {"features": {"edges": [[...], ...],      # per feature, interior quantile cut points
                  "fractions": [[...], ...],  # per feature, training fraction in each bin
                  "bins": 10, "n": 988},
     "score": {"name": "mutual_information", "values": [...], "n": 180}}

Bins are quantile bins chosen on the training inputs: ``edges[j]`` holds the
interior cut points, so bin i of feature j is (edges[i-1], edges[i]].
Features with few distinct values (the digits' pixels are 0..16, many
always 0) get fewer bins because repeated cut points are merged.

PSI (Population Stability Index) = sum_i (p_i - q_i) * ln(p_i / q_i), with a
floor ``PSI_FLOOR`` on every fraction so an empty bin does not give infinity.
Reading (common practice, a rule of thumb, not a test): < 0.1 stable,
0.1-0.25 moderate shift, > 0.25 major shift.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["PSI_FLOOR", "bin_fractions", "feature_reference", "psi", "score_reference"]

PSI_FLOOR = 1e-4
"""Smallest fraction used in PSI, for bins empty on either side (common practice)."""


def feature_reference(x: np.ndarray, bins: int = 10) -> dict[str, Any]:
    """Quantile-bin reference of raw training inputs ``x``: float[N, F]."""
    x = np.asarray(x, dtype=np.float64).reshape(len(x), -1)
    qs = np.linspace(0.0, 1.0, bins + 1)[1:-1]
    edges: list[list[float]] = []
    fractions: list[list[float]] = []
    for j in range(x.shape[1]):
        cuts = np.unique(np.quantile(x[:, j], qs))
        edges.append([float(c) for c in cuts])
        fractions.append([float(f) for f in bin_fractions(x[:, j], cuts)])
    return {"edges": edges, "fractions": fractions, "bins": bins, "n": int(x.shape[0])}


def bin_fractions(values: np.ndarray, cuts: np.ndarray | list[float]) -> np.ndarray:
    """Fraction of ``values`` in each bin (-inf, c0], (c0, c1], ..., (c_last, inf)."""
    cuts = np.asarray(cuts, dtype=np.float64)
    idx = np.searchsorted(cuts, np.asarray(values, dtype=np.float64), side="left")
    counts = np.bincount(idx, minlength=len(cuts) + 1).astype(np.float64)
    total = counts.sum()
    return counts / total if total > 0 else counts


def psi(expected: np.ndarray, actual: np.ndarray, floor: float = PSI_FLOOR) -> float:
    """Population Stability Index between two vectors of bin fractions (nats)."""
    p = np.maximum(np.asarray(actual, dtype=np.float64), floor)
    q = np.maximum(np.asarray(expected, dtype=np.float64), floor)
    return float(np.sum((p - q) * np.log(p / q)))


def score_reference(name: str, values: np.ndarray, keep: int = 2000) -> dict[str, Any]:
    """The held-out distribution of the decision score, kept as up to ``keep`` sorted values."""
    v = np.sort(np.asarray(values, dtype=np.float64).ravel())
    if len(v) > keep:
        v = v[np.linspace(0, len(v) - 1, keep).round().astype(int)]
    return {"name": name, "values": [float(a) for a in v], "n": int(np.asarray(values).size)}
