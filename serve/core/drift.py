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

Score drift is the two-sample Kolmogorov-Smirnov statistic of the recent
decision scores against ``score.values`` (the held-out scores at
calibration time); ``ks_statistic`` equals ``scipy.stats.ks_2samp``'s
statistic and is numpy only, so the runtime needs no scipy.

``DriftMonitor`` keeps the recent window as ring buffers, one per server
process (see serve/adapters/metrics.py for how several workers' windows are shown).
"""

from __future__ import annotations

import math
import threading
from collections.abc import Mapping
from typing import Any

import numpy as np
from scipy.stats import kstwobign

from demur.serve.errors import ConfigError

__all__ = [
    "DRIFT_MAX_FEATURES",
    "KS_ALPHA",
    "PSI_FLOOR",
    "DriftMonitor",
    "bin_fractions",
    "feature_reference",
    "ks_statistic",
    "psi",
    "score_reference",
]

PSI_FLOOR = 1e-4
"""Smallest fraction used in PSI, for bins empty on either side (common practice)."""

DRIFT_MAX_FEATURES = 256
"""Inputs with more features than this (images past 16x16, tables of more than 256 columns) are
monitored on a fixed random subset of this many features (``features.indices`` in the
reference): per-feature bins of every pixel of a 3x224x224 image would keep 150,528 counters per
case in the window (150 MB per worker at 500 cases), cost about 7 ms per case and publish
150,528 Prometheus series. A shift that moves the input distribution moves the sampled
features' too; which ones is fixed at export, by seed."""

KS_ALPHA = 0.001
"""Level of the KS critical value the score-drift alert compares with: 1 false alarm in 1000 windows."""


def feature_reference(x: np.ndarray, bins: int = 10, *, max_features: int = DRIFT_MAX_FEATURES,
                      seed: int = 0) -> dict[str, Any]:
    """Quantile-bin reference of raw training inputs ``x``: float[N, F]; past ``max_features``
    features, of a random subset of that many (sorted ``indices``, chosen by ``seed``)."""
    x = np.asarray(x).reshape(len(x), -1)
    indices = None
    if x.shape[1] > max_features:
        indices = np.sort(np.random.default_rng(seed).choice(x.shape[1], max_features, replace=False))
        x = x[:, indices]
    x = np.asarray(x, dtype=np.float64)
    qs = np.linspace(0.0, 1.0, bins + 1)[1:-1]
    edges: list[list[float]] = []
    fractions: list[list[float]] = []
    for j in range(x.shape[1]):
        cuts = np.unique(np.quantile(x[:, j], qs))
        edges.append([float(c) for c in cuts])
        fractions.append([float(f) for f in bin_fractions(x[:, j], cuts)])
    ref: dict[str, Any] = {"edges": edges, "fractions": fractions, "bins": bins, "n": int(x.shape[0])}
    if indices is not None:
        ref["indices"] = [int(i) for i in indices]
    return ref


def bin_fractions(values: np.ndarray, cuts: np.ndarray | list[float]) -> np.ndarray:
    """Fraction of ``values`` in each bin (-inf, c0], (c0, c1], ..., (c_last, inf)."""
    cuts = np.asarray(cuts, dtype=np.float64)
    idx = np.searchsorted(cuts, np.asarray(values, dtype=np.float64), side="left")
    counts = np.bincount(idx, minlength=len(cuts) + 1).astype(np.float64)
    total = counts.sum()
    return counts / total if total > 0 else counts


def psi(expected: np.ndarray, actual: np.ndarray, floor: float = PSI_FLOOR) -> Any:
    """Population Stability Index between bin fractions (nats), over the last axis:
    vectors give a float, ``[F, bins]`` arrays one value per feature. Fractions below
    ``floor`` count as ``floor`` (an empty bin would make the index infinite)."""
    p = np.maximum(np.asarray(actual, dtype=np.float64), floor)
    q = np.maximum(np.asarray(expected, dtype=np.float64), floor)
    out = np.sum((p - q) * np.log(p / q), axis=-1)
    return float(out) if out.ndim == 0 else out


def score_reference(name: str, values: np.ndarray, keep: int = 2000) -> dict[str, Any]:
    """The held-out distribution of the decision score, kept as up to ``keep`` sorted values."""
    v = np.sort(np.asarray(values, dtype=np.float64).ravel())
    if len(v) > keep:
        v = v[np.linspace(0, len(v) - 1, keep).round().astype(int)]
    return {"name": name, "values": [float(a) for a in v], "n": int(np.asarray(values).size)}


def ks_statistic(a: np.ndarray, b: np.ndarray) -> float:
    """Two-sample Kolmogorov-Smirnov statistic D = sup_x |F_a(x) - F_b(x)|.

    The same computation as ``scipy.stats.ks_2samp(a, b).statistic``: both
    empirical CDFs evaluated at every pooled sample point, right-continuous.
    Returns ``nan`` when either sample is empty.
    """
    a = np.sort(np.asarray(a, dtype=np.float64).ravel())
    b = np.sort(np.asarray(b, dtype=np.float64).ravel())
    if a.size == 0 or b.size == 0:
        return float("nan")
    pooled = np.concatenate([a, b])
    cdf_a = np.searchsorted(a, pooled, side="right") / a.size
    cdf_b = np.searchsorted(b, pooled, side="right") / b.size
    return float(np.max(np.abs(cdf_a - cdf_b)))


class DriftMonitor:
    """Recent traffic against a bundle's ``drift_reference``, in fixed-size ring buffers.

    The window holds the last ``window`` cases (count-based, not time-based).
    Each observed case is binned once, on arrival, into the reference's
    quantile bins, and per-feature bin counts are kept up to date as cases
    enter and leave the window; so ``feature_psi`` is O(F x bins) at any
    moment, never a histogram pass over the window. Decision scores are kept
    raw (KS needs the values). Thread-safe: one lock around the buffers.

    ``reference`` is the manifest's ``drift_reference`` (see the module
    docstring); either part may be missing: without ``features``,
    ``feature_psi`` returns an empty array; without ``score``, ``score_ks``
    returns ``nan``.

    Example::

        mon = DriftMonitor(bundle.manifest.drift_reference, window=500)
        mon.observe(x_raw, decisions.score)      # float[B, F], float[B]
        mon.feature_psi().max(), mon.score_ks()
    """

    def __init__(self, reference: Mapping[str, Any], window: int) -> None:
        if int(window) < 1:
            raise ConfigError(f"drift window must be at least 1 case; got {window}", field="drift_window")
        self.window = int(window)
        feats = dict(reference.get("features") or {})
        edges = [np.asarray(e, dtype=np.float64) for e in feats.get("edges", [])]
        self.n_features = len(edges)
        indices = feats.get("indices")
        self.indices = None if indices is None else np.asarray(indices, dtype=np.int64)
        """The input features monitored (``DRIFT_MAX_FEATURES``); None: all of them, in order."""
        if self.indices is not None and (self.indices.shape != (self.n_features,) or (self.indices < 0).any()):
            raise ConfigError(f"drift_reference.features.indices must hold {self.n_features} feature indices",
                              field="drift_reference.features.indices")
        width = max((len(e) for e in edges), default=0)
        # cut points padded with +inf (never below a value), reference fractions padded with 0
        self._cuts = np.full((self.n_features, width), np.inf)
        self._expected = np.zeros((self.n_features, width + 1))
        for j, (cut, frac) in enumerate(zip(edges, feats.get("fractions", []))):
            if len(frac) != len(cut) + 1:
                raise ConfigError(
                    f"drift_reference.features.fractions[{j}] must have {len(cut) + 1} entries "
                    f"(one more than its edges); got {len(frac)}",
                    field=f"drift_reference.features.fractions[{j}]",
                )
            self._cuts[j, : len(cut)] = cut
            self._expected[j, : len(frac)] = frac
        self._bins = np.zeros((self.window, self.n_features), dtype=np.int16)
        self._counts = np.zeros((self.n_features, width + 1), dtype=np.int64)
        self._offsets = np.arange(self.n_features) * (width + 1)
        score = dict(reference.get("score") or {})
        self.score_name: str | None = score.get("name")
        self._score_ref = np.sort(np.asarray(score.get("values", []), dtype=np.float64))
        self._scores = np.zeros(self.window)
        self._next = 0  # ring position of the next case
        self._filled = 0  # cases in the window (<= window)
        self._lock = threading.Lock()

    @property
    def filled(self) -> int:
        """How many cases the window holds now (grows to ``window``)."""
        return self._filled

    def observe(self, x_raw: np.ndarray, scores: np.ndarray) -> None:
        """Add a batch: raw (unstandardised) inputs float[B, F], decision scores float[B]."""
        x = np.asarray(x_raw)   # float64 only for the monitored features (below)
        s = np.asarray(scores, dtype=np.float64).ravel()
        if x.shape[0] == 0 and s.size == 0:
            return
        x = x.reshape(x.shape[0], -1)
        if s.shape[0] != x.shape[0]:
            raise ValueError(f"drift: {x.shape[0]} cases but {s.shape[0]} scores")
        if self.indices is not None and self.n_features:
            if x.shape[1] <= int(self.indices.max()):
                raise ValueError(f"drift: cases have {x.shape[1]} features; the reference monitors feature "
                                 f"{int(self.indices.max())}")
            x = x[:, self.indices]
        elif self.n_features and x.shape[1] != self.n_features:
            raise ValueError(f"drift: cases have {x.shape[1]} features; the reference has {self.n_features}")
        x = np.asarray(x, dtype=np.float64)
        if x.shape[0] > self.window:  # only the newest `window` cases can stay
            x, s = x[-self.window :], s[-self.window :]
        b = x.shape[0]
        if b == 0:
            return
        # bin index = number of cut points strictly below the value: bin i is (c[i-1], c[i]]
        bins = (self._cuts[None, :, :] < x[:, :, None]).sum(axis=2).astype(np.int16) if self.n_features else None
        with self._lock:
            pos = (self._next + np.arange(b)) % self.window
            if self.n_features:
                # slots 0..filled-1 hold data until the ring is full; those among pos are evicted
                occupied = pos[pos < self._filled]
                if occupied.size:
                    self._subtract(self._bins[occupied])
                self._bins[pos] = bins
                self._add(bins)
            self._scores[pos] = s
            self._next = int((self._next + b) % self.window)
            self._filled = min(self._filled + b, self.window)

    def _add(self, bins: np.ndarray) -> None:
        flat = (bins + self._offsets[None, :]).ravel()
        self._counts += np.bincount(flat, minlength=self._counts.size).reshape(self._counts.shape)

    def _subtract(self, bins: np.ndarray) -> None:
        flat = (bins + self._offsets[None, :]).ravel()
        self._counts -= np.bincount(flat, minlength=self._counts.size).reshape(self._counts.shape)

    def feature_psi(self, floor: float = PSI_FLOOR) -> np.ndarray:
        """PSI of each feature, recent window against the reference: float[F] (0 when empty)."""
        with self._lock:
            counts = self._counts.astype(np.float64)
            n = self._filled
        if n == 0 or self.n_features == 0:
            return np.zeros(self.n_features)
        return psi(self._expected, counts / n, floor)  # padded bins have p = q = floor: they add 0

    def score_ks(self) -> float:
        """KS statistic of recent decision scores against the reference scores (``nan`` if either is empty)."""
        with self._lock:
            recent = self._scores[: self._filled].copy()
        return ks_statistic(recent, self._score_ref)

    def score_ks_critical(self, alpha: float = KS_ALPHA) -> float:
        """Large-sample critical value of the two-sample KS statistic at level ``alpha``.

        c(alpha) * sqrt((n + m) / (n * m)), c(alpha) the upper-alpha quantile of the
        Kolmogorov distribution (``scipy.stats.kstwobign.isf``), n the window's cases and m
        the reference scores. Ties in the scores make the test conservative. ``nan`` when
        either side is empty.
        """
        n, m = self._filled, self._score_ref.size
        if n == 0 or m == 0:
            return float("nan")
        return float(kstwobign.isf(alpha) * math.sqrt((n + m) / (n * m)))
