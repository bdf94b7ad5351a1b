"""Audit truth: does live traffic still bear out the accepted-accuracy certificate?

calibrate certifies, on the user's held-out file, that accepted predictions are right at
least ``target`` of the time (with confidence ``1 - delta``). The audit (a uniform sample of
*accepted* cases sent to people, ``audit_fraction``) is the one direct measurement of that
claim on live traffic; drift alerts watch a proxy. This module turns the store's tallies of
decided audit items into two numbers a monitoring system can act on:

- **An exact one-sided lower bound** on accepted accuracy (Clopper-Pearson 1934): the
  ``confidence`` lower limit of the binomial proportion ``agree / decided``. It is a
  snapshot for people to read, not an alarm: checked at every scrape it would fire falsely
  far more often than its level says.
- **A sequential test of the certificate** (Wald 1945's likelihood ratio, monitored
  open-ended): H0 "the accepted error rate is at most the certified ``1 - target``" against
  H1 "it is ``error_ratio`` times that". The log likelihood ratio of ``agree`` agreements in
  ``decided`` audits is ``agree * ln(p1/p0) + (decided - agree) * ln((1-p1)/(1-p0))``. Under
  any accuracy >= target the ratio is a non-negative supermartingale, so by Ville's
  inequality (1939) the chance it *ever* reaches ``1/alpha`` is at most ``alpha``, however
  often Prometheus evaluates it. The alert fires when the log ratio reaches ``ln(1/alpha)``:
  a false alarm on a model that keeps its certificate has probability at most ``alpha``
  over the model's whole life. The test has power against error rates near ``error_ratio``
  times the certified one; the audit count it needs grows as the certified error shrinks.

Abstentions people decide are a biased sample (the model chose to refer them), so they never
enter the certificate test; their "model would have been right" share is reported as what
referral saves.

Pure numpy/scipy: tested against scipy.stats.binomtest and a simulation of the false-alarm
rate (tests/serve/core/test_audit.py).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

__all__ = ["AUDIT_ALPHA", "AUDIT_ERROR_RATIO", "AuditTally", "CertificateTest", "accuracy_lower_bound"]

AUDIT_ALPHA = 0.01
"""Lifetime false-alarm probability of the certificate alert (Ville's inequality)."""
AUDIT_ERROR_RATIO = 2.0
"""The alternative the test is tuned to: the accepted error rate at twice the certified one."""


@dataclass(frozen=True)
class AuditTally:
    """Decided review items of one model (by bundle checksum), read from the shared store.

    ``audit_decided``/``audit_agree``: audit items (uniform sample of accepted cases) a person
    labelled, and how many of those labels equal the model's prediction.
    ``abstain_decided``/``abstain_model_right``: the same for abstentions: how often the model's
    own prediction would have been right on the cases it referred.
    """

    model_checksum: str
    audit_decided: int = 0
    audit_agree: int = 0
    abstain_decided: int = 0
    abstain_model_right: int = 0


def accuracy_lower_bound(agree: int, n: int, confidence: float) -> float | None:
    """Exact one-sided Clopper-Pearson lower bound on a proportion, or None when n = 0.

    The largest p with P(Binomial(n, p) >= agree) <= 1 - confidence, i.e. the
    ``1 - confidence`` quantile of Beta(agree, n - agree + 1); 0 when agree = 0.
    """
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must be in (0, 1); got {confidence}")
    if n < 0 or not 0 <= agree <= n:
        raise ValueError(f"need 0 <= agree <= n; got agree={agree}, n={n}")
    if n == 0:
        return None
    if agree == 0:
        return 0.0
    from scipy.stats import beta

    return float(beta.ppf(1.0 - confidence, agree, n - agree + 1))


@dataclass(frozen=True)
class CertificateTest:
    """Open-ended sequential test of "accepted accuracy >= target" (see the module docstring).

    Example::

        test = CertificateTest(target=0.995)
        test.evidence(agree=180, decided=190)   # log likelihood ratio, nats
        test.contradicts(agree=180, decided=190) # True once evidence >= ln(1/alpha)
    """

    target: float
    alpha: float = AUDIT_ALPHA
    error_ratio: float = AUDIT_ERROR_RATIO

    def __post_init__(self) -> None:
        if not 0.0 < self.target < 1.0:
            raise ValueError(f"target must be in (0, 1); got {self.target}")
        if not 0.0 < self.alpha < 1.0:
            raise ValueError(f"alpha must be in (0, 1); got {self.alpha}")
        if not self.error_ratio > 1.0 or (1.0 - self.target) * self.error_ratio >= 1.0:
            raise ValueError(f"error_ratio must be > 1 with (1 - target) * error_ratio < 1; got {self.error_ratio}")

    @property
    def threshold(self) -> float:
        """ln(1/alpha): the log likelihood ratio at which the alert fires."""
        return math.log(1.0 / self.alpha)

    def evidence(self, agree: int, decided: int) -> float:
        """Log likelihood ratio (nats) of H1 (error rate ``error_ratio * (1 - target)``) over
        H0 (error rate ``1 - target``) for ``agree`` right of ``decided`` audited cases."""
        if decided < 0 or not 0 <= agree <= decided:
            raise ValueError(f"need 0 <= agree <= decided; got agree={agree}, decided={decided}")
        e0 = 1.0 - self.target
        e1 = e0 * self.error_ratio
        wrong = decided - agree
        return agree * math.log((1.0 - e1) / (1.0 - e0)) + wrong * math.log(e1 / e0)

    def contradicts(self, agree: int, decided: int) -> bool:
        """True when the audit contradicts the certificate at lifetime error rate ``alpha``."""
        return self.evidence(agree, decided) >= self.threshold
