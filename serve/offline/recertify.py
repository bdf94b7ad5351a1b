"""Recertify a served rule from the cases people reviewed, using only what was sampled at random.

The review queue holds two kinds of decided case, and they are not alike:

- **audit** items: each *accepted* case was sent to a person with probability
  ``audit_fraction``, fixed by a hash of (model checksum, case id) and so unrelated to how
  hard the case is. Decided audit items are a uniform random sample of the accepted traffic.
- **abstain** items: the model chose them. Every abstention is queued (inclusion 1; the
  server counts those it could not queue, ``demur_review_not_queued_total``), so they are a
  census of the referred traffic, and a heavily biased sample of traffic as a whole: the
  hardest cases, over-represented by a factor ``1 / audit_fraction`` against accepted ones.

Method, and why:

1. **Accuracy of accepted cases** is certified from audit items alone. Restricted to
   ``score <= t`` for any ``t`` at or below the served threshold ``t0``, audit items are a
   uniform sample of the cases the rule "abstain iff score > t" would accept, so the same
   Learn-then-Test selection with exact Clopper-Pearson bounds that ``demur calibrate`` runs
   on a held-out file (``demur.serve.offline.calibration.select_for_accuracy``) applies
   unchanged, with its guarantee. Thresholds above ``t0`` (accepting cases the model now
   refers) are not certified from reviewed data: in ``(t0, t]`` there are only abstentions,
   a census with no random inclusion to build an exact bound on; a fresh labelled held-out
   file does that.
2. **The abstention rate** at a threshold ``t <= t0`` is estimated with inclusion weights
   (Horvitz & Thompson 1952): each abstain item counts 1, each audit item
   ``1 / audit_fraction``. Unweighted, the abstentions would dominate.
3. The naive alternative, pooling audit and abstain items as if they were one random
   held-out file, is biased: abstentions are over-represented, so its abstention rate is far
   too high and its accepted-accuracy figures at thresholds above ``t0`` mix a census with a
   sample. ``naive_estimates`` computes it so the simulation in
   tests/serve/offline/test_recertify.py can show the bias against known truth.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from demur.serve.errors import CalibrationInfeasible
from demur.serve.offline.calibration import (
    DEFAULT_MAX_ABSTAIN,
    ThresholdChoice,
    minimum_rows,
    select_for_accuracy,
)

__all__ = ["Recertification", "RecertifyError", "naive_estimates", "recertify", "weighted_abstain_rate"]


class RecertifyError(ValueError):
    """The reviewed cases cannot recertify the rule (too few audits, no audit fraction, ...)."""


@dataclass(frozen=True)
class Recertification:
    """The threshold certified from audit items, and the abstention rate it implies.

    ``choice``: the Learn-then-Test choice over audit items (threshold <= ``served_threshold``).
    ``abstain_rate``: the weighted estimate of the traffic share the chosen threshold refers.
    ``n_audit`` / ``n_abstain``: decided items of each kind used.
    """

    choice: ThresholdChoice
    served_threshold: float
    abstain_rate: float
    n_audit: int
    n_abstain: int
    audit_fraction: float


def _split(kind: np.ndarray, score: np.ndarray, correct: np.ndarray) -> tuple[np.ndarray, ...]:
    kind = np.asarray(kind).astype(str)
    score = np.asarray(score, dtype=np.float64)
    correct = np.asarray(correct, dtype=bool)
    if not (kind.shape == score.shape == correct.shape) or kind.ndim != 1:
        raise RecertifyError(f"kind, score and correct must be 1-d of one length; got {kind.shape}, "
                             f"{score.shape}, {correct.shape}")
    unknown = sorted(set(kind.tolist()) - {"audit", "abstain"})
    if unknown:
        raise RecertifyError(f"review item kinds must be 'audit' or 'abstain'; got {unknown}")
    audit = kind == "audit"
    return audit, score, correct


def weighted_abstain_rate(kind: np.ndarray, score: np.ndarray, threshold: float, served_threshold: float,
                          audit_fraction: float) -> float:
    """Horvitz-Thompson estimate of the share of traffic with score > ``threshold`` (<= served).

    Abstain items weigh 1 (a census of the referred traffic); audit items weigh
    ``1 / audit_fraction`` (a uniform sample of the accepted traffic).
    """
    if not 0.0 < audit_fraction <= 1.0:
        raise RecertifyError(f"audit_fraction must be in (0, 1]; got {audit_fraction}")
    if threshold > served_threshold:
        raise RecertifyError("reviewed cases estimate rates only at or below the served threshold")
    audit, score, _ = _split(kind, score, np.zeros(len(score), dtype=bool))
    w = np.where(audit, 1.0 / audit_fraction, 1.0)
    refer = ~audit | (score > threshold)
    return float(np.sum(w[refer]) / np.sum(w)) if len(w) else float("nan")


def recertify(kind: np.ndarray, score: np.ndarray, correct: np.ndarray, *, served_threshold: float,
              audit_fraction: float, target_accuracy: float, delta: float,
              max_abstain: float = DEFAULT_MAX_ABSTAIN) -> Recertification:
    """Certify ``target_accuracy`` (confidence ``1 - delta``) from decided audit items.

    ``kind``: str[N] "audit" | "abstain"; ``score``: float[N], the served score recomputed
    with the bundle; ``correct``: bool[N], the model's prediction equals the person's label.
    ``max_abstain``: the largest share of the currently accepted traffic the new threshold may
    refer on top of today's abstentions (the grid of candidates, as in calibrate).
    Raises ``CalibrationInfeasible`` (from the selection) when no threshold is certified and
    ``RecertifyError`` when the data cannot be used.
    """
    audit, score, correct = _split(kind, score, correct)
    if not audit.any():
        raise RecertifyError("no decided audit items: only audit items (a random sample of accepted cases) can "
                             "certify accuracy; set audit_fraction > 0 and let people decide some")
    a_score, a_correct = score[audit], correct[audit]
    need = minimum_rows(target_accuracy, delta, max_abstain=max_abstain)
    if len(a_score) < max(need, 2):
        raise CalibrationInfeasible(
            f"{len(a_score)} decided audit item(s) for this model; accepted-case accuracy {target_accuracy:.4g} with "
            f"confidence {1 - delta:.4g} needs at least {max(need, 2)} even if every one is right. Audit items are "
            f"a share audit_fraction ({audit_fraction:g}) of the "
            "accepted cases: let people decide more of them (or raise audit_fraction), lower the target or the "
            "confidence, or calibrate on a fresh labelled file", field="data")
    if np.any(a_score > served_threshold):
        # an audit item scored above the served threshold was accepted under another rule
        raise RecertifyError(f"{int(np.sum(a_score > served_threshold))} audit items score above the served "
                             f"threshold {served_threshold}: they were accepted by another rule or model; "
                             "recertify with the items of this bundle only (model_checksum)")
    choice = select_for_accuracy(a_score, a_correct, target_accuracy=target_accuracy, delta=delta,
                                 max_abstain=max_abstain)
    threshold = min(float(choice.threshold), float(served_threshold))
    rate = weighted_abstain_rate(np.where(audit, "audit", "abstain"), score, threshold, served_threshold,
                                 audit_fraction)
    return Recertification(choice=choice, served_threshold=float(served_threshold), abstain_rate=rate,
                           n_audit=int(audit.sum()), n_abstain=int((~audit).sum()),
                           audit_fraction=float(audit_fraction))


def naive_estimates(score: np.ndarray, correct: np.ndarray, threshold: float) -> dict[str, float]:
    """What pooling every reviewed case as one random file would report at ``threshold``:
    the unweighted abstention rate and accuracy of cases scoring <= threshold. Biased; kept
    only to show it (module docstring, point 3)."""
    score = np.asarray(score, dtype=np.float64)
    correct = np.asarray(correct, dtype=bool)
    keep = score <= threshold
    return {"abstain_rate": float(np.mean(~keep)),
            "accepted_accuracy": float(np.mean(correct[keep])) if keep.any() else float("nan")}
