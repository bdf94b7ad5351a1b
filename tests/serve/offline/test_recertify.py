"""Recertification from reviewed cases (serve/offline/recertify.py): a simulation with known truth.

The population design (as tests/serve/offline/test_calibration.py uses for calibrate): a large
population with a known score law and a known chance of error given the score; the server's
rule refers every case above t0 (all queued, inclusion 1) and audits each accepted case with
probability f. Truth is computed on the population; each reviewed sample is drawn from it.
"""

from __future__ import annotations

import numpy as np
import pytest

from demur.serve.offline.recertify import (
    RecertifyError,
    naive_estimates,
    recertify,
    weighted_abstain_rate,
)

T0 = 0.6          # served threshold
F = 0.05          # audit fraction


def _population(rng: np.random.Generator, n: int = 200_000) -> tuple[np.ndarray, np.ndarray]:
    score = rng.random(n)
    correct = rng.random(n) > 0.25 * score ** 3  # error grows with the score: 0 at 0, 25% at 1
    return score, correct


def _reviewed(rng: np.random.Generator, score: np.ndarray, correct: np.ndarray, f: float = F):
    refer = score > T0
    audit = ~refer & (rng.random(len(score)) < f)
    keep = refer | audit
    return np.where(audit[keep], "audit", "abstain"), score[keep], correct[keep]


def test_naive_pooling_is_biased_and_the_weighted_method_is_not() -> None:
    """Over 40 reviewed samples: the naive abstention rate at the served threshold is far from the
    truth (abstentions over-represented by 1/f); the Horvitz-Thompson weighted one is unbiased
    (mean within 3 standard errors of the truth). Truth: the population's share above t0."""
    rng = np.random.default_rng(11)
    score, correct = _population(rng)
    truth = float(np.mean(score > T0))
    naive, weighted = [], []
    for _ in range(40):
        kind, s, c = _reviewed(rng, score, correct)
        naive.append(naive_estimates(s, c, T0)["abstain_rate"])
        weighted.append(weighted_abstain_rate(kind, s, T0, T0, F))
    weighted_a = np.array(weighted)
    assert abs(np.mean(naive) - truth) > 0.3  # ~0.89 against 0.40
    assert abs(weighted_a.mean() - truth) < 3 * weighted_a.std(ddof=1) / np.sqrt(len(weighted_a)) + 1e-3


def test_naive_accuracy_above_the_served_threshold_is_biased() -> None:
    """Accepting more than the served rule (t = 0.8 > t0): pooling counts each referred case as
    much as each audited one, so the accepted accuracy it reports is far below the truth."""
    rng = np.random.default_rng(12)
    score, correct = _population(rng)
    truth = float(np.mean(correct[score <= 0.8]))
    kind, s, c = _reviewed(rng, score, correct)
    assert truth - naive_estimates(s, c, 0.8)["accepted_accuracy"] > 0.01


def test_certificate_from_audit_items_holds_at_its_level() -> None:
    """The guarantee, by the population design: over 200 reviewed samples, the population's
    accepted accuracy at the recertified threshold falls below the target in at most delta of
    them (plus 3 binomial standard errors). Target 0.97 at delta 0.1."""
    rng = np.random.default_rng(13)
    score, correct = _population(rng)
    order = np.argsort(score)
    cum_correct = np.cumsum(correct[order])
    srt = score[order]
    target, delta, misses, runs = 0.97, 0.1, 0, 200
    for _ in range(runs):
        kind, s, c = _reviewed(rng, score, correct, f=0.1)
        rec = recertify(kind, s, c, served_threshold=T0, audit_fraction=0.1, target_accuracy=target, delta=delta)
        assert rec.choice.threshold <= T0
        k = int(np.searchsorted(srt, rec.choice.threshold, side="right"))
        misses += cum_correct[k - 1] / k < target
    assert misses / runs <= delta + 3 * np.sqrt(delta * (1 - delta) / runs)


def test_refusals_say_why() -> None:
    with pytest.raises(RecertifyError, match="audit"):
        recertify(np.array(["abstain"] * 5), np.linspace(0.7, 0.9, 5), np.ones(5, bool), served_threshold=T0,
                  audit_fraction=F, target_accuracy=0.9, delta=0.1)
    with pytest.raises(RecertifyError, match="above the served threshold"):
        recertify(np.array(["audit"] * 3), np.array([0.1, 0.2, 0.9]), np.ones(3, bool), served_threshold=T0,
                  audit_fraction=F, target_accuracy=0.5, delta=0.5)
    with pytest.raises(RecertifyError, match="kinds"):
        weighted_abstain_rate(np.array(["other"]), np.array([0.1]), 0.5, T0, F)


def test_too_few_audit_items_are_refused_with_the_count_needed() -> None:
    """One decided audit item once reached the threshold search and came back as "need >= 2 scores
    ... got 1 scores, 1 flags"; now the refusal counts the audit items and says how many the target
    needs (the same minimum_rows calibrate states, exact Clopper-Pearson: scipy.stats.beta)."""
    from demur.serve.errors import CalibrationInfeasible
    from demur.serve.offline.calibration import minimum_rows

    need = minimum_rows(0.9, 0.1)
    with pytest.raises(CalibrationInfeasible, match=f"1 decided audit item.*needs at least {need}") as info:
        recertify(np.array(["audit", "abstain", "abstain"]), np.array([0.1, 0.8, 0.9]), np.ones(3, bool),
                  served_threshold=T0, audit_fraction=F, target_accuracy=0.9, delta=0.1)
    assert info.value.field == "data" and "audit_fraction" in str(info.value)
