"""The audit maths (serve/core/audit.py) against outside references."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import binomtest

from demur.serve.core.audit import CertificateTest, accuracy_lower_bound


@pytest.mark.parametrize(("agree", "n", "confidence"), [(1, 1, 0.95), (97, 100, 0.95), (190, 200, 0.9), (3, 40, 0.99)])
def test_lower_bound_is_scipys_one_sided_clopper_pearson(agree: int, n: int, confidence: float) -> None:
    """Source: scipy.stats.binomtest(..., alternative="greater").proportion_ci(method="exact"),
    the one-sided Clopper-Pearson (1934) limit."""
    ref = binomtest(agree, n, alternative="greater").proportion_ci(confidence_level=confidence, method="exact").low
    assert accuracy_lower_bound(agree, n, confidence) == pytest.approx(ref, rel=1e-9, abs=1e-12)


def test_lower_bound_edges() -> None:
    """Worked example (closed form, Clopper-Pearson): with all n right the lower bound is
    (1 - confidence) ** (1 / n); none right gives 0; no audits give no bound."""
    assert accuracy_lower_bound(50, 50, 0.95) == pytest.approx(0.05 ** (1 / 50))
    assert accuracy_lower_bound(0, 10, 0.95) == 0.0
    assert accuracy_lower_bound(0, 0, 0.95) is None
    with pytest.raises(ValueError):
        accuracy_lower_bound(5, 4, 0.95)


def test_evidence_is_walds_log_likelihood_ratio() -> None:
    """Wald (1945), the binomial SPRT: k successes in n give
    k ln((1-e1)/(1-e0)) + (n-k) ln(e1/e0); worked by hand for target 0.99, ratio 2."""
    test = CertificateTest(target=0.99, alpha=0.01, error_ratio=2.0)
    by_hand = 95 * math.log(0.98 / 0.99) + 5 * math.log(0.02 / 0.01)
    assert test.evidence(95, 100) == pytest.approx(by_hand)
    assert test.threshold == pytest.approx(math.log(100))
    assert not test.contradicts(100, 100)
    assert test.contradicts(90, 100)  # 10% wrong against a certified 1%


def test_false_alarm_rate_stays_below_alpha_when_the_certificate_holds() -> None:
    """Ville's inequality (1939): under H0 (accuracy exactly the target) the probability that the
    likelihood ratio ever reaches 1/alpha is at most alpha. Simulation, 4,000 audit streams of
    2,000 items each, checked after every item (a scrape after every audit, the worst case)."""
    rng = np.random.default_rng(7)
    test = CertificateTest(target=0.98, alpha=0.05)
    right = rng.random((4000, 2000)) < 0.98
    e0, e1 = 0.02, 0.04
    step = np.where(right, math.log((1 - e1) / (1 - e0)), math.log(e1 / e0))
    crossed = (np.cumsum(step, axis=1) >= test.threshold).any(axis=1)
    assert crossed.mean() <= 0.05 + 3 * math.sqrt(0.05 * 0.95 / 4000)


def test_power_when_the_error_rate_doubles() -> None:
    """The same simulation with the error rate at twice the certified one: the alarm fires in most
    streams within 2,000 audits (power, not a guarantee: a property of this test, checked here)."""
    rng = np.random.default_rng(8)
    test = CertificateTest(target=0.98, alpha=0.05)
    right = rng.random((1000, 2000)) < 0.96
    agree = np.cumsum(right, axis=1)
    n = np.arange(1, 2001)
    evidence = agree * math.log(0.96 / 0.98) + (n - agree) * math.log(2.0)
    assert (evidence >= test.threshold).any(axis=1).mean() > 0.9


def test_refuses_meaningless_settings() -> None:
    with pytest.raises(ValueError):
        CertificateTest(target=1.0)
    with pytest.raises(ValueError):
        CertificateTest(target=0.6, error_ratio=3.0)
