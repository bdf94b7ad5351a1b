"""The support check: is a case inside the data the model was trained on?

Why a separate check: the epistemic score (mutual information) measures how
much the weight draws disagree, and far from the training data they need not
disagree at all. Measured on the digits demo before this check existed:
digits multiplied by 3 were accepted 84% of the time with p = 1.000 and
MI ~ 1e-7, because every draw saturated on the same class. So every case is
also tested against the training inputs themselves, before it may be accepted:

1. **Per-feature range with a margin.** Raw feature j must lie in
   [low_j - m_j, high_j + m_j], with low/high the training range and
   m_j = ``RANGE_MARGIN`` x scale_j (the feature's floored standardisation
   scale, below). Cheap, and the reason names the feature:
   ``outside_training_data: feature px_r3c4 = 48 above training range 0-16``.
2. **Distance to the training data**: the Euclidean distance, in
   standardised units, from the case to its k-th nearest neighbour
   (k = ``NEIGHBOURS``) among a stored sample of at most ``MAX_SAMPLE``
   standardised training inputs. Chosen over a Mahalanobis distance with a
   Ledoit-Wolf shrunk covariance by measurement on the digits (3 split
   seeds, threshold at the 99% quantile of the calibration split): both
   flagged scaled x3, inverted, rotated, saturated and uniform-noise digits
   (92-100%), but the Mahalanobis distance flagged blank images in none of
   the seeds and the k-NN distance in every seed; the range check alone
   misses uniform noise and blank images.

The distance threshold has a stated false-alarm rate on in-distribution data
(split-conformal, Vovk et al. 2005; Lei et al. 2018): among the n held-out
cases that training never saw and that pass the range check, the threshold
is the ceil((n + 1)(1 - alpha))-th smallest k-NN distance. By
exchangeability a new in-distribution case inside the range is flagged by
the distance with probability at most 1 - k/(n + 1) <= alpha
(``false_alarm_bound``). With too few held-out cases for alpha the largest
distance is used and the bound, 1/(n + 1), is recorded as it is. The range
check's own rate is measured on the same held-out cases and recorded with a
Clopper-Pearson upper bound (``range_flagged``). Held-out cases outside the
range are left out of the distance threshold on purpose: one of them would
otherwise make the threshold infinite on a small held-out set and switch the
distance check off without a word.

Standardisation (``standardisation``) floors every feature's scale, so a
near-constant training feature cannot turn a small change into a huge
z-score: for images (one unit shared by all pixels) the floor is
``IMAGE_SCALE_FLOOR`` x the pooled standard deviation of all pixels; for
named (tabular) features it is ``TABULAR_SCALE_FLOOR`` x the feature's own
training range; a constant feature gets scale 1. On the digits a pixel with
training spread 0.045 had turned inputs x3 into z-scores of about 350.

The record lives in the manifest under ``support`` (an older bundle without
it still loads and serves, unchecked; ``GET /v1/model`` says so). Pure
numpy; the exporter builds the record (``support_record``) and
``demur calibrate`` re-sets its threshold on the calibration split
(``recalibrated``).

Example::

    check = support_from_manifest(bundle.manifest)      # None for an old bundle
    result = check.check(x_raw)                          # x_raw: float[B, *shape]
    result.outside[0], result.reason[0]
"""

from __future__ import annotations

import base64
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from demur.serve.core.projection import Projection, projection_for
from demur.serve.errors import ConfigError, ManifestInvalid

__all__ = [
    "ALPHA",
    "CENTROIDS",
    "IMAGE_SCALE_FLOOR",
    "MAX_SAMPLE",
    "MIN_CLUSTER_ROWS",
    "NEIGHBOURS",
    "RANGE_MARGIN",
    "REASON",
    "TABULAR_SCALE_FLOOR",
    "SupportCheck",
    "SupportResult",
    "conformal_threshold",
    "kmeans_centroids",
    "recalibrated",
    "standardisation",
    "support_from_manifest",
    "support_record",
]

ALPHA = 0.01
"""Default false-alarm rate: at most 1% of in-distribution cases flagged."""

RANGE_MARGIN = 2.0
"""Margin of the range check, in units of the feature's floored scale (our choice; measured on the
digits: 0-0.6% of clean held-out digits outside, scaled x3 / inverted / rotated / saturated all outside)."""

NEIGHBOURS = 5
"""k of the k-nearest-neighbour distance."""

MAX_SAMPLE = 2000
"""Most training rows stored for the distance (a seeded random subsample beyond that)."""

IMAGE_SCALE_FLOOR = 0.3
"""Image scale floor, as a share of the pooled pixel standard deviation (measured on the digits:
0.1 left blank images unflagged by the distance in one seed of three, 0.3 in none)."""

TABULAR_SCALE_FLOOR = 0.05
"""Tabular scale floor, as a share of the feature's training range (our choice, a rule of thumb)."""

CENTROIDS = 256
"""Most k-means centroids stored by ``summary="centroids"`` (our choice; measured in the README's
support-check section against raw rows on the digits' shift table)."""

MIN_CLUSTER_ROWS = 5
"""Fewest training rows a stored centroid averages (our choice: a centroid is never a row)."""

REASON = "outside_training_data"
"""The reason code of a support abstention (the metric label too)."""

_CONSTANT = 1e-12

_ROUNDING = 1e-5
"""Past-the-bound distance (scale units) below which a standardised float32 value counts as on the
bound: float32 standardisation moves a value by ~1e-7 relative, far less than this."""


def standardisation(x: np.ndarray, *, shared_units: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Per-feature (center, scale) of training inputs ``x``: float[N, F] -> float64[F], float64[F].

    center = the mean; scale = the standard deviation floored (see the module docstring):
    ``shared_units=True`` (images) floors at ``IMAGE_SCALE_FLOOR`` x the pooled std of every
    value, otherwise at ``TABULAR_SCALE_FLOOR`` x the feature's range; constant features get 1.
    x_std = (x - center) / scale.
    """
    x = np.asarray(x, dtype=np.float64)
    x = x.reshape(len(x), -1)
    if len(x) < 2 or not np.all(np.isfinite(x)):
        raise ConfigError(f"standardisation needs >= 2 rows of finite numbers; got {len(x)} rows", field="x")
    center = x.mean(axis=0)
    std = x.std(axis=0)
    if shared_units:
        floor = np.full_like(std, IMAGE_SCALE_FLOOR * float(x.std()))
    else:
        floor = TABULAR_SCALE_FLOOR * (x.max(axis=0) - x.min(axis=0))
    scale = np.maximum(std, floor)
    return center, np.where(scale < _CONSTANT, 1.0, scale)


def conformal_threshold(scores: np.ndarray, alpha: float) -> tuple[float, float]:
    """(threshold, false-alarm bound): the ceil((n+1)(1-alpha))-th smallest s_(k) of the n held-out
    ``scores`` and 1 - k/(n+1), the bound on P(new in-distribution score > threshold).
    With too few scores for ``alpha`` the largest is used (bound 1/(n+1)). The threshold is
    written midway between s_(k) and the next larger score (0.1% above s_(k) when there is
    none), never on a held-out case's own distance: a distance recomputed in another batch
    (float32 inputs, BLAS blocking) differs in its last bits and must not change sides."""
    if not 0.0 < alpha < 1.0:
        raise ConfigError(f"alpha must be in (0, 1); got {alpha}", field="alpha")
    s = np.sort(np.asarray(scores, dtype=np.float64).ravel())
    n = len(s)
    if n < 1:
        raise ConfigError("the support threshold needs held-out cases; got none", field="x_heldout")
    k = min(n, math.ceil((n + 1) * (1.0 - alpha) - 1e-12))
    kth = float(s[k - 1])
    above = s[s > kth]
    threshold = kth + 0.5 * (float(above[0]) - kth) if len(above) and np.isfinite(above[0]) else kth * 1.001 + 1e-12
    return threshold, 1.0 - k / (n + 1)


@dataclass(frozen=True)
class SupportResult:
    """Per case: ``outside`` bool[B], ``distance`` float64[B] (standardised units; inf when the
    range check fails first), ``reason`` (a readable line, or None inside)."""

    outside: np.ndarray
    distance: np.ndarray
    reason: list[str | None]


@dataclass(frozen=True)
class SupportCheck:
    """The manifest's support record, ready to test cases. ``sample``: float32[N, F] standardised
    training inputs; ``threshold`` on the k-NN distance; ``low/high/margin`` raw units.

    Per request the check costs one [B, F + 1] x [F + 1, N] float32 matrix product and a
    partial sort of a few candidates per case (``distance``): the sample's squared norms, its
    block layout and the range bounds in standardised units are computed once, here, and the
    sample is never copied per call. Pass the graph's standardised input (``x_std``, the
    engine's) so the case is standardised once per request."""

    names: tuple[str, ...]
    low: np.ndarray
    high: np.ndarray
    margin: np.ndarray
    center: np.ndarray
    scale: np.ndarray
    sample: np.ndarray
    neighbours: int
    threshold: float
    record: dict[str, Any]
    projection: Projection | None = None
    """Above ``PROJECT_ABOVE`` features: the distance is measured on ``projection.apply(z)`` and
    ``sample`` holds the projected rows (serve/core/projection.py); the range check stays per feature."""
    _pre: dict[str, Any] = field(default_factory=dict, init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        sample = np.ascontiguousarray(self.sample, dtype=np.float32)
        object.__setattr__(self, "sample", sample)
        n, f = sample.shape
        width = _block_width(n, min(self.neighbours, n))
        # [F + 1, W * nb]: column i holds (-2 s_i, |s_i|^2), so [z, 1] @ it = |s_i|^2 - 2 z.s_i in
        # one product; the columns past N (padding to whole blocks) get the largest float32, at
        # or past every finite distance (not inf: BLAS kernels may then raise invalid-value flags)
        gram = np.zeros((f + 1, width * -(-n // width)), dtype=np.float32)
        gram[:f, :n] = -2.0 * sample.T
        gram[f, :n] = np.einsum("ij,ij->i", sample, sample)
        gram[f, n:] = np.finfo(np.float32).max
        self._pre.update(
            gram=gram, width=width,
            center=self.center.astype(np.float32).ravel(), scale=self.scale.astype(np.float32).ravel(),
            lo=(((self.low - self.margin) - self.center) / self.scale).astype(np.float32),
            hi=(((self.high + self.margin) - self.center) / self.scale).astype(np.float32),
        )

    def standardised(self, x_raw: np.ndarray) -> np.ndarray:
        """float32[B, F]: (x - center) / scale, in float32 (the engine's standardisation)."""
        x = np.asarray(x_raw, dtype=np.float32).reshape(len(x_raw), -1)
        with np.errstate(over="ignore"):   # inf past float32: scores() puts such a case outside the support
            return (x - self._pre["center"]) / self._pre["scale"]

    def _z(self, x_raw: np.ndarray, x_std: np.ndarray | None) -> np.ndarray:
        if x_std is None:
            return self.standardised(x_raw)
        return np.asarray(x_std, dtype=np.float32).reshape(len(x_std), -1)

    def distance(self, x_raw: np.ndarray, x_std: np.ndarray | None = None) -> np.ndarray:
        """k-NN distance of each case to the training sample, float64[B] (standardised units);
        ``x_std``: the same cases already standardised (skips standardising them again)."""
        z = self._z(x_raw, x_std)
        if self.projection is not None:
            z = self.projection.apply(z)
        b, f = z.shape
        k = min(self.neighbours, self.sample.shape[0])
        ones = np.empty((b, f + 1), dtype=np.float32)
        ones[:, :f], ones[:, f] = z, 1.0
        g = ones @ self._pre["gram"]                           # [B, W * nb]: d^2 - |z|^2
        width: int = self._pre["width"]
        if width > 1 and b > _DIRECT_ROWS:
            # The k nearest lie in the k blocks with the smallest minima (a block left out has
            # its minimum, and so every member, at or above k chosen blocks' minima, which are
            # k distinct values), so the k-th smallest of those blocks' W * k values is the k-th
            # smallest of all N: the partition reads W * k values per case instead of N.
            # Block j holds columns j, j + nb, ...: its minimum is W - 1 whole-row minima.
            blocks = g.reshape(b, width, -1)
            near = np.argpartition(blocks.min(axis=1), k - 1, axis=1)[:, :k]  # [B, k]
            g = np.take_along_axis(blocks, near[:, None, :], axis=2).reshape(b, width * k)
        with np.errstate(invalid="ignore", over="ignore"):  # a case past float32 gets NaN here; scores() makes it inf
            kth = np.partition(g, k - 1, axis=1)[:, k - 1] + np.einsum("ij,ij->i", z, z)
        return np.sqrt(np.maximum(kth, 0.0)).astype(np.float64)

    def scores(self, x_raw: np.ndarray, x_std: np.ndarray | None = None) -> np.ndarray:
        """The nonconformity score: the k-NN distance, +inf where the range check fails."""
        z = self._z(x_raw, x_std)
        d = self.distance(x_raw, z)
        return np.where(self._excess(z).max(axis=1, initial=0.0) > 0, np.inf, d)

    def _excess(self, z: np.ndarray) -> np.ndarray:
        """How far each standardised feature lies past its range plus margin, in scale units (0 inside;
        a float32 rounding step at the bound counts as inside)."""
        past = np.maximum(self._pre["lo"] - z, z - self._pre["hi"])
        return np.where(past > _ROUNDING, past, 0.0)

    def check(self, x_raw: np.ndarray, x_std: np.ndarray | None = None) -> SupportResult:
        """Test every case of ``x_raw`` (float[B, *shape], raw units; ``x_std`` the same cases
        standardised, as the engine fed them to the graph)."""
        x = np.asarray(x_raw).reshape(len(x_raw), -1)
        z = self._z(x_raw, x_std)
        excess = self._excess(z)
        worst = excess.argmax(axis=1) if x.shape[1] else np.zeros(len(x), dtype=np.int64)
        ranged = excess[np.arange(len(x)), worst] > 0 if x.shape[1] else np.zeros(len(x), dtype=bool)
        dist = self.distance(x_raw, z)
        far = dist > self.threshold
        reasons: list[str | None] = [None] * len(x)
        for i in np.flatnonzero(ranged | far).tolist():  # only the flagged cases cost Python work
            if ranged[i]:
                j = int(worst[i])
                value = float(x[i, j])
                side = "above" if value > self.high[j] else "below"
                reasons[i] = (f"{REASON}: feature {self.names[j]} = {value:.4g} {side} training range "
                              f"{self.low[j]:.4g}-{self.high[j]:.4g}")
            else:
                reasons[i] = f"{REASON}: distance to training data {dist[i]:.4g} > {self.threshold:.4g}"
        return SupportResult(outside=ranged | far, distance=np.where(ranged, np.inf, dist), reason=reasons)

    def describe(self) -> dict[str, Any]:
        """What ``GET /v1/model`` shows (the record without the stored sample)."""
        return {"checked": True, **{k: v for k, v in self.record.items() if k not in ("sample", "margin")}}


_DIRECT_ROWS = 128
"""Up to this many cases ``distance`` partitions all N distances of each case: the preselection's
extra numpy calls cost more than they save. Measured on the bench bundle's 1,000-row sample (one
BLAS thread, microseconds per call, preselection / all N): B = 1 26 / 14, B = 64 142 / 130,
B = 128 262 / 255, B = 256 523 / 537, B = 1,024 2,146 / 2,751."""


def _block_width(n: int, k: int) -> int:
    """Rows per block of ``distance``'s preselection for a sample of ``n`` rows and k neighbours:
    about sqrt(n / 10) (measured on the digits' 989-row sample at B = 1,024: 3.4 ms per call
    against 8.4 ms for the partition of all n), at least 4 k blocks; 1 (no preselection) for
    small samples."""
    width = int(math.sqrt(n / 10.0))
    return width if width >= 2 and n // width >= 4 * k else 1


def kmeans_centroids(z: np.ndarray, k: int, *, min_rows: int = MIN_CLUSTER_ROWS, seed: int = 0,
                     iterations: int = 30) -> np.ndarray:
    """Centroids float32[m, F] of the clusters of at least ``min_rows`` rows among the k that
    Lloyd's k-means finds in ``z`` float[N, F] (k-means++ seeding, Arthur & Vassilvitskii 2007);
    m <= k. Each centroid is the mean of ``min_rows`` or more rows, never one row itself."""
    z = np.asarray(z, dtype=np.float64)
    rng = np.random.default_rng(seed)
    k = max(1, min(int(k), len(z) // max(1, min_rows)))
    sq = np.einsum("ij,ij->i", z, z)
    chosen = [int(rng.integers(len(z)))]
    d2 = np.maximum(sq - 2.0 * z @ z[chosen[0]] + sq[chosen[0]], 0.0)
    for _ in range(1, k):
        i = int(rng.choice(len(z), p=d2 / d2.sum())) if d2.sum() > 0 else int(rng.integers(len(z)))
        chosen.append(i)
        d2 = np.minimum(d2, np.maximum(sq - 2.0 * z @ z[i] + sq[i], 0.0))
    centres = z[chosen].copy()
    labels = np.full(len(z), -1)
    for _ in range(iterations):
        new = np.argmin(sq[:, None] - 2.0 * z @ centres.T + np.einsum("ij,ij->i", centres, centres)[None], axis=1)
        if np.array_equal(new, labels):
            break
        labels = new
        counts = np.bincount(labels, minlength=len(centres))
        sums = np.zeros_like(centres)
        np.add.at(sums, labels, z)
        filled = counts > 0
        centres[filled] = sums[filled] / counts[filled, None]
    counts = np.bincount(labels, minlength=len(centres))
    return centres[counts >= min_rows].astype(np.float32)


def support_record(
    x_train: np.ndarray,
    x_heldout: np.ndarray,
    inputs: dict[str, Any],
    *,
    alpha: float = ALPHA,
    neighbours: int = NEIGHBOURS,
    max_sample: int = MAX_SAMPLE,
    seed: int = 0,
    summary: str = "rows",
) -> dict[str, Any]:
    """The manifest's ``support`` section: fit on raw ``x_train`` float[N, F], threshold on raw
    held-out ``x_heldout`` float[M, F] that training never saw. ``inputs`` is the input spec
    (names, center, scale, low, high; the same standardisation the model uses).

    ``summary``: what is stored of the training rows. ``"rows"``: up to ``max_sample``
    standardised rows (with ``inputs.center`` and ``inputs.scale`` they give back the raw rows),
    the distance is to the ``neighbours``-th nearest; ``"centroids"``: up to ``CENTROIDS``
    k-means centroids, each the mean of at least ``MIN_CLUSTER_ROWS`` standardised rows, the
    distance is to the nearest. The split-conformal false-alarm bound holds for either (it
    needs only a score fixed before the held-out rows are seen)."""
    if summary not in ("rows", "centroids"):
        raise ConfigError(f"summary must be 'rows' or 'centroids'; got {summary!r}", field="support")
    x = np.asarray(x_train).reshape(len(x_train), -1)   # no float64 copy: at 3x224x224 that is 2.4 GB
    center = np.asarray(inputs["center"], dtype=np.float64)
    scale = np.asarray(inputs["scale"], dtype=np.float64)
    if x.shape[1] != center.size:
        raise ConfigError(f"x_train has {x.shape[1]} features; the input spec has {center.size}", field="x_train")
    if len(x) > max_sample:
        x = x[np.sort(np.random.default_rng(seed).choice(len(x), max_sample, replace=False))]
    projection = projection_for(int(center.size), seed=seed)
    rows = []
    for start in range(0, len(x), 256):   # standardised (and projected) in chunks, float32
        part = ((np.asarray(x[start:start + 256], dtype=np.float64) - center) / scale).astype(np.float32)
        rows.append(projection.apply(part) if projection is not None else part)
    sample = np.concatenate(rows) if rows else np.empty((0, center.size), dtype=np.float32)
    if summary == "centroids":
        sample = kmeans_centroids(sample, CENTROIDS, seed=seed)
        neighbours = 1
        stored = {"kind": "centroids", "count": int(len(sample)), "min_rows_each": MIN_CLUSTER_ROWS,
                  "of_rows": int(len(x)),
                  "note": f"k-means centroids of standardised training rows, each the mean of at least "
                          f"{MIN_CLUSTER_ROWS} rows: no training row is stored, but a centroid shows what a group "
                          "of training inputs looks like (no formal privacy guarantee)"}
    else:
        stored = {"kind": "rows", "count": int(len(sample)),
                  "note": "standardised training rows: with inputs.center and inputs.scale they give back the raw "
                          "training rows"}
    record: dict[str, Any] = {
        "method": f"range check (margin {RANGE_MARGIN:g} scale units) and {neighbours}-nearest-"
                  f"{'centroid' if summary == 'centroids' else 'neighbour'} distance in standardised units"
                  f"{' after a sparse random projection' if projection is not None else ''}; "
                  "split-conformal threshold",
        "stored": stored,
        "neighbours": int(neighbours),
        "range_margin": RANGE_MARGIN,
        "margin": [float(v) for v in RANGE_MARGIN * scale],
        "low": [float(v) for v in inputs["low"]],
        "high": [float(v) for v in inputs["high"]],
        "sample_rows": int(len(sample)),
        "sample": {"dtype": "<f4", "shape": list(sample.shape),
                   "base64": base64.b64encode(sample.astype("<f4").tobytes()).decode("ascii")},
        "threshold": 0.0,
    }
    if projection is not None:
        record["projection"] = projection.record()
    return recalibrated(record, inputs, x_heldout, alpha=alpha, split="validation")


def recalibrated(record: dict[str, Any], inputs: dict[str, Any], x_heldout: np.ndarray, *,
                 alpha: float = ALPHA, split: str = "calibration") -> dict[str, Any]:
    """A copy of ``record`` with its threshold set on held-out raw ``x_heldout`` at level ``alpha``."""
    check = _from_record(record, inputs)
    scores = check.scores(np.asarray(x_heldout, dtype=np.float64))
    inside = scores[np.isfinite(scores)]
    n, m = int(len(scores)), int(len(scores) - len(inside))
    if len(inside) == 0:
        raise ConfigError(f"all {n} held-out {split} cases fail the range check: they do not look like the "
                          "training data (wrong columns or units?)", field="x_heldout")
    # The distance threshold is set on the held-out cases inside the range: one held-out case
    # outside it (an infinite score) must not switch the distance check off when n is small.
    threshold, bound = conformal_threshold(inside, alpha)
    k = min(len(inside), math.ceil((len(inside) + 1) * (1.0 - alpha) - 1e-12))
    out = dict(record)
    out.update(
        threshold=threshold,
        alpha=float(alpha),
        false_alarm_bound=bound,
        range_flagged={"n": n, "flagged": m, "upper_95": _upper_95(m, n)},
        heldout={"split": split, "n": n, "flagged": int(m + np.sum(inside > threshold)), "outside_range": m},
        basis=f"split-conformal on the {len(inside)} held-out {split} cases inside the training range: the "
              f"{k}-th smallest distance; at most {bound:.2%} of in-distribution cases inside the range are "
              f"flagged by the distance. The range check flagged {m} of {n} held-out cases (at most "
              f"{_upper_95(m, n):.2%} of the population at 95% confidence, Clopper-Pearson)",
    )
    return out


def _upper_95(m: int, n: int) -> float:
    """One-sided 95% Clopper-Pearson upper bound on a rate seen m times in n (Clopper & Pearson 1934)."""
    from scipy.stats import beta

    return 1.0 if m >= n else float(beta.ppf(0.95, m + 1, n - m))


def _from_record(record: dict[str, Any], inputs: Any) -> SupportCheck:
    get = (lambda k: inputs[k]) if isinstance(inputs, dict) else (lambda k: getattr(inputs, k))
    f = len(get("names"))
    try:
        packed = record["sample"]
        sample = np.frombuffer(base64.b64decode(packed["base64"], validate=True), dtype="<f4")
        projection = _projection(record.get("projection"), f)
        sample = sample.reshape(-1, projection.dims if projection is not None else f).astype(np.float32)
        vec = {k: np.asarray(record[k], dtype=np.float64) for k in ("low", "high", "margin")}
        threshold = float(record["threshold"])
        neighbours = int(record.get("neighbours", NEIGHBOURS))
    except (KeyError, TypeError, ValueError) as exc:  # binascii.Error is a ValueError
        raise ManifestInvalid(f"manifest 'support' is malformed ({type(exc).__name__}: {exc}); re-export the "
                              "bundle", field="support") from exc
    if any(v.shape != (f,) for v in vec.values()) or len(sample) < 1 or neighbours < 1:
        raise ManifestInvalid(f"manifest 'support' must hold {f} low/high/margin entries and a non-empty "
                              f"sample of {f}-feature rows", field="support")
    return SupportCheck(
        names=tuple(str(n) for n in get("names")), low=vec["low"], high=vec["high"], margin=vec["margin"],
        center=np.asarray(get("center"), dtype=np.float64), scale=np.asarray(get("scale"), dtype=np.float64),
        sample=sample, neighbours=neighbours, threshold=threshold, record=record, projection=projection,
    )


def _projection(record: Any, features: int) -> Projection | None:
    """The projection a support record names (None if it names none); its R is rebuilt from the seed."""
    if record is None:
        return None
    if not isinstance(record, dict) or record.get("kind") != "very_sparse_random" or int(record["features"]) != features:
        raise ValueError(f"projection must be a very_sparse_random record for {features} features; got {record!r:.200}")
    dims, seed = int(record["dims"]), int(record["seed"])
    if not 1 <= dims <= 65536:
        raise ValueError(f"projection dims must be in 1..65536; got {dims}")
    return Projection.build(features, dims, seed)


def support_from_manifest(manifest: Any) -> SupportCheck | None:
    """The bundle's support check, or None for a bundle exported without one."""
    section = getattr(manifest, "support", None)  # the typed section, parsed once at load
    return _from_record(section.record, manifest.inputs) if section is not None else None
