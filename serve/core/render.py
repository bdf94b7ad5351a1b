"""Response bodies: summaries and decisions -> the JSON-ready dicts the API returns.

Kept apart from ``app.py`` so the payload shapes live in one place, next to
``openapi.json`` which documents them. Arrays are converted with one
``tolist()`` each (C level); the only Python loop is over cases, to build one
dict per case.

Result of one case (``POST /v1/predict``)::

    classification                          regression
    case_id       client id or null         same
    decision      "accept" | "abstain"      same
    prediction    label string              mixture mean (target units)
    mean          [K] mean probabilities    mixture mean (target units)
    interval      {level, lower[K], upper[K]}  {level, lower, upper, method}
                  per-class quantiles of       quantiles of the Gaussian mixture
                  the per-draw probabilities   (or the conformal interval)
    uncertainty   {mutual_information, predictive_entropy, expected_entropy, unit: "nats"}
                  regression: mutual_information is the moment-matched upper
                  bound on I(y; weights) and predictive_entropy the entropy of
                  the moment-matched Gaussian (see serve/core/summary.py); plus
                  variance {epistemic, aleatoric, total} in target units squared
    score         {name, value}
    threshold     the threshold compared with score.value
    reason        one line: "mutual_information 0.412 nats > threshold 0.150"
"""

from __future__ import annotations

from typing import Any

import numpy as np

from demur.serve.core.decision import DecisionRule, Verdicts
from demur.serve.core.summary import ClassificationSummary, RegressionSummary, Summary

__all__ = ["model_ref", "results"]


def model_ref(name: str, version: str, checksum: str) -> dict[str, str]:
    """The ``model`` object every predict response carries."""
    return {"name": name, "version": version, "checksum": checksum}


def results(
    summary: Summary,
    decisions: Verdicts,
    rule: DecisionRule,
    labels: tuple[str, ...],
    case_ids: list[str | None],
) -> list[dict[str, Any]]:
    """One result dict per case, in request order."""
    verdict = np.where(decisions.abstain, "abstain", "accept").tolist()
    scores = decisions.score.tolist()
    common = zip(case_ids, verdict, scores, decisions.reason,
                 summary.mutual_information.tolist(), summary.predictive_entropy.tolist(),
                 summary.expected_entropy.tolist())
    if isinstance(summary, ClassificationSummary):
        return _classification(summary, rule, labels, common)
    if isinstance(summary, RegressionSummary):
        return _regression(summary, rule, common)
    raise TypeError(f"summary must be a classification or regression summary; got {type(summary).__name__}")


def _base(rule: DecisionRule, cid: Any, verdict: str, score: float, reason: str,
          mi: float, pe: float, ee: float, unit: str) -> dict[str, Any]:
    return {
        "case_id": cid,
        "decision": verdict,
        "prediction": None,
        "mean": None,
        "interval": None,
        "uncertainty": {
            "mutual_information": mi,
            "predictive_entropy": pe,
            "expected_entropy": ee,
            "unit": unit,
        },
        "score": {"name": rule.score, "value": score},
        "threshold": rule.threshold,
        "reason": reason,
    }


def _classification(s: ClassificationSummary, rule: DecisionRule, labels: tuple[str, ...],
                    common: Any) -> list[dict[str, Any]]:
    names = np.asarray(labels, dtype=object)[s.prediction].tolist()
    out = []
    for (cid, verdict, score, reason, mi, pe, ee), label, mean, lo, hi in zip(
        common, names, s.mean_probs.tolist(), s.lower.tolist(), s.upper.tolist()
    ):
        item = _base(rule, cid, verdict, score, reason, mi, pe, ee, s.unit)
        item["prediction"] = label
        item["mean"] = mean
        item["interval"] = {"level": s.level, "lower": lo, "upper": hi}
        out.append(item)
    return out


def _regression(s: RegressionSummary, rule: DecisionRule, common: Any) -> list[dict[str, Any]]:
    out = []
    for (cid, verdict, score, reason, mi, pe, ee), mean, lo, hi, ev, av, tv in zip(
        common, s.mean.tolist(), s.lower.tolist(), s.upper.tolist(),
        s.epistemic_var.tolist(), s.aleatoric_var.tolist(), s.total_var.tolist(),
    ):
        item = _base(rule, cid, verdict, score, reason, mi, pe, ee, s.unit)
        item["prediction"] = mean
        item["mean"] = mean
        item["interval"] = {"level": s.level, "lower": lo, "upper": hi, "method": s.interval_method}
        item["variance"] = {"epistemic": ev, "aleatoric": av, "total": tv}
        out.append(item)
    return out
