"""Held-out metrics: how good the served predictions are, on labelled rows (no threshold choice here).

Pure numpy + scipy. The threshold and its guarantee live in
``demur.serve.offline.calibration``; this module only measures.

Held-out metrics
----------------
accuracy; NLL (mean -ln p_y, nats); Brier score (Brier 1950: mean over cases
of Σ_k (p_k - 1[y = k])^2, range [0, 2]; halved for two classes, as
sklearn.metrics.brier_score_loss does); ECE with 15 equal-width bins on the
max-probability confidence, bins ((m-1)/M, m/M] (Guo, Pleiss, Sun & Weinberger
2017, eq. 3); the risk-coverage curve and AURC (its mean risk over the n
coverage steps, cases ordered by increasing score, ties in input order;
Geifman, Uziel & El-Yaniv 2019); accuracy at referral rates 0, 5, 10, 20, 30,
50 % (the round(r n) highest-score cases referred). Regression: coverage,
mean interval width, RMSE, MAE.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = [
    "ECE_BINS",
    "REFERRAL_RATES",
    "accuracy_at_referral",
    "aurc",
    "brier_score",
    "classification_metrics",
    "expected_calibration_error",
    "negative_log_likelihood",
    "regression_metrics",
    "reliability_bins",
    "risk_coverage",
]

ECE_BINS = 15
"""Equal-width confidence bins for ECE (Guo et al. 2017 use 15)."""

REFERRAL_RATES = (0.0, 0.05, 0.10, 0.20, 0.30, 0.50)
"""Shares of cases sent to people at which accepted-case accuracy is reported."""


def _labels(probs: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    p = np.asarray(probs, dtype=np.float64)
    t = np.asarray(y).astype(np.int64).ravel()
    if p.ndim != 2 or p.shape[0] != t.shape[0]:
        raise ValueError(f"probs must be [N, K] and y [N]; got {list(p.shape)} and {list(t.shape)}")
    if t.size and (t.min() < 0 or t.max() >= p.shape[1]):
        raise ValueError(f"labels must be class indices in 0..{p.shape[1] - 1}")
    return p, t


def negative_log_likelihood(probs: np.ndarray, y: np.ndarray) -> float:
    """Mean -ln p_y in nats (probabilities floored at float64 eps, as sklearn.metrics.log_loss clips)."""
    p, t = _labels(probs, y)
    eps = np.finfo(np.float64).eps
    return float(-np.mean(np.log(np.clip(p[np.arange(len(t)), t], eps, 1.0))))


def brier_score(probs: np.ndarray, y: np.ndarray) -> float:
    """Brier (1950) score: mean over cases of Σ_k (p_k - 1[y=k])^2; halved when K = 2."""
    p, t = _labels(probs, y)
    onehot = np.zeros_like(p)
    onehot[np.arange(len(t)), t] = 1.0
    b = float(np.mean(np.sum((p - onehot) ** 2, axis=1)))
    return b / 2.0 if p.shape[1] == 2 else b


def reliability_bins(probs: np.ndarray, y: np.ndarray, bins: int = ECE_BINS) -> dict[str, np.ndarray]:
    """Per-bin count, mean confidence and accuracy; bin m holds confidences in ((m-1)/M, m/M]."""
    p, t = _labels(probs, y)
    conf = p.max(axis=1)
    correct = (p.argmax(axis=1) == t).astype(np.float64)
    idx = np.clip(np.ceil(conf * bins).astype(np.int64) - 1, 0, bins - 1)
    count = np.bincount(idx, minlength=bins).astype(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_conf = np.bincount(idx, weights=conf, minlength=bins) / count
        acc = np.bincount(idx, weights=correct, minlength=bins) / count
    return {"edges": np.linspace(0.0, 1.0, bins + 1), "count": count, "confidence": mean_conf, "accuracy": acc}


def expected_calibration_error(probs: np.ndarray, y: np.ndarray, bins: int = ECE_BINS) -> float:
    """ECE = Σ_m (|B_m| / n) |acc(B_m) - conf(B_m)| (Guo et al. 2017, eq. 3), equal-width bins."""
    r = reliability_bins(probs, y, bins)
    n = r["count"].sum()
    filled = r["count"] > 0
    gap = np.abs(r["accuracy"][filled] - r["confidence"][filled])
    return float(np.sum(r["count"][filled] / n * gap)) if n else 0.0


def risk_coverage(scores: np.ndarray, correct: np.ndarray) -> dict[str, np.ndarray]:
    """Cases ordered by increasing score (most sure first); for i = 1..n the coverage i/n,
    the risk (error rate) of the first i, and the score of the i-th (accept if score <= it)."""
    s = np.asarray(scores, dtype=np.float64).ravel()
    c = np.asarray(correct, dtype=bool).ravel()
    order = np.argsort(s, kind="stable")
    errors = np.cumsum(~c[order])
    i = np.arange(1, len(s) + 1)
    return {"coverage": i / len(s), "risk": errors / i, "score": s[order]}


def aurc(scores: np.ndarray, correct: np.ndarray) -> float:
    """Area under the risk-coverage curve: the mean of the risk over the n coverage steps."""
    return float(np.mean(risk_coverage(scores, correct)["risk"]))


def accuracy_at_referral(scores: np.ndarray, correct: np.ndarray,
                         rates: tuple[float, ...] = REFERRAL_RATES) -> dict[str, float]:
    """Accuracy on the cases kept when the round(r n) highest-score cases go to people."""
    rc = risk_coverage(scores, correct)
    n = len(rc["risk"])
    out = {}
    for r in rates:
        keep = n - int(round(r * n))
        out[f"{r:.2f}"] = float(1.0 - rc["risk"][keep - 1]) if keep > 0 else float("nan")
    return out


def classification_metrics(probs: np.ndarray, y: np.ndarray, scores: np.ndarray,
                           threshold: float | None = None) -> dict[str, Any]:
    """All held-out classification figures as plain floats (JSON-ready)."""
    p, t = _labels(probs, y)
    correct = p.argmax(axis=1) == t
    out: dict[str, Any] = {
        "n": int(len(t)),
        "accuracy": float(correct.mean()),
        "nll": negative_log_likelihood(p, t),
        "brier": brier_score(p, t),
        "ece": expected_calibration_error(p, t),
        "aurc": aurc(scores, correct),
        "accuracy_at_referral": accuracy_at_referral(scores, correct),
        "score_mean_correct": float(np.mean(scores[correct])) if correct.any() else None,
        "score_mean_wrong": float(np.mean(scores[~correct])) if (~correct).any() else None,
    }
    if threshold is not None:
        accepted = np.asarray(scores) <= threshold
        out["at_threshold"] = {
            "threshold": float(threshold),
            "abstain_rate": float(1.0 - accepted.mean()),
            "accepted": int(accepted.sum()),
            "accuracy_accepted": float(correct[accepted].mean()) if accepted.any() else None,
        }
    return out


def regression_metrics(y: np.ndarray, mean: np.ndarray, lower: np.ndarray, upper: np.ndarray,
                       scores: np.ndarray | None = None, threshold: float | None = None) -> dict[str, Any]:
    """Coverage of [lower, upper], mean interval width, RMSE and MAE (target units)."""
    y = np.asarray(y, dtype=np.float64).ravel()
    inside = (y >= lower) & (y <= upper)
    err = y - mean
    out: dict[str, Any] = {
        "n": int(len(y)),
        "coverage": float(inside.mean()),
        "mean_interval_width": float(np.mean(upper - lower)),
        "rmse": float(np.sqrt(np.mean(err**2))),
        "mae": float(np.mean(np.abs(err))),
    }
    if scores is not None and threshold is not None:
        accepted = np.asarray(scores) <= threshold
        out["at_threshold"] = {
            "threshold": float(threshold),
            "abstain_rate": float(1.0 - accepted.mean()),
            "accepted": int(accepted.sum()),
            "coverage_accepted": float(inside[accepted].mean()) if accepted.any() else None,
            "rmse_accepted": float(np.sqrt(np.mean(err[accepted] ** 2))) if accepted.any() else None,
        }
    return out
