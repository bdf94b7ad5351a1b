"""Audit truth in /metrics: read from the shared review store at scrape time.

Every replica answers a scrape from the same store, so the series agree across replicas and
survive restarts (per-process counters would reset and split the count). Tallies are cached
for ``ttl_s`` so a scrape costs at most one aggregate query per ``ttl_s`` per process.

Series (per model checksum, ``model_checksum`` label):

demur_audit_decided_cases               audit items a person decided (uniform sample of accepted cases)
demur_audit_agreements                  of those, where the person's label equals the model's prediction
demur_abstentions_decided_cases         abstentions a person decided
demur_abstentions_model_right_cases     of those, where the model's own prediction was right
                                        (what referral would not have saved)

For the model being served (its certificate is in the bundle):

demur_audit_accuracy_lower_bound        exact one-sided Clopper-Pearson bound on accepted accuracy,
                                        at the certificate's confidence (a reading, not an alarm)
demur_certified_accuracy                the target the calibration certified
demur_audit_evidence_nats               log likelihood ratio against the certificate
demur_audit_evidence_threshold_nats     ln(1/alpha): the alert `DemurAuditContradictsCertificate`
                                        fires when the evidence reaches it (serve/core/audit.py)
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass

from prometheus_client.core import GaugeMetricFamily
from prometheus_client.registry import Collector

from demur.serve.core.audit import CertificateTest, AuditTally, accuracy_lower_bound
from demur.serve.errors import DemurError

__all__ = ["AuditCollector", "Certificate"]

log = logging.getLogger("demur.metrics")


@dataclass(frozen=True)
class Certificate:
    """What the served bundle's calibration certified: accepted accuracy >= ``target`` with
    confidence ``confidence``."""

    model_checksum: str
    target: float
    confidence: float


class AuditCollector(Collector):
    """Scrape-time audit series from ``tallies()`` (the store's per-model counts) and
    ``certificate()`` (the live model's certificate, or None when it carries none)."""

    def __init__(self, tallies: Callable[[], Sequence[AuditTally]],
                 certificate: Callable[[], Certificate | None], *, prefix: str = "demur",
                 ttl_s: float = 10.0, clock: Callable[[], float] = time.monotonic) -> None:
        self._tallies = tallies
        self._certificate = certificate
        self._prefix = prefix
        self._ttl_s = float(ttl_s)
        self._clock = clock
        self._lock = threading.Lock()
        self._cached: tuple[float, tuple[AuditTally, ...]] | None = None

    def _read(self) -> tuple[AuditTally, ...] | None:
        with self._lock:
            now = self._clock()
            if self._cached is not None and now - self._cached[0] < self._ttl_s:
                return self._cached[1]
            try:
                rows = tuple(self._tallies())
            except (DemurError, OSError) as exc:  # a scrape must not fail because the store is down
                log.warning("audit tallies unavailable: %s", exc)
                return None
            self._cached = (now, rows)
            return rows

    def collect(self) -> Iterator[GaugeMetricFamily]:
        rows = self._read()
        if rows is None:
            return
        p = self._prefix
        families = {
            "audit_decided": GaugeMetricFamily(f"{p}_audit_decided_cases",
                                               "Audit items (a uniform sample of accepted cases) a person decided.",
                                               labels=["model_checksum"]),
            "audit_agree": GaugeMetricFamily(f"{p}_audit_agreements",
                                             "Decided audit items whose label equals the model's prediction.",
                                             labels=["model_checksum"]),
            "abstain_decided": GaugeMetricFamily(f"{p}_abstentions_decided_cases",
                                                 "Abstentions a person decided.", labels=["model_checksum"]),
            "abstain_model_right": GaugeMetricFamily(f"{p}_abstentions_model_right_cases",
                                                     "Decided abstentions on which the model's own prediction was right.",
                                                     labels=["model_checksum"]),
        }
        for row in rows:
            for key, fam in families.items():
                fam.add_metric([row.model_checksum], float(getattr(row, key)))
        yield from families.values()
        cert = self._certificate()
        if cert is None:
            return
        live = next((r for r in rows if r.model_checksum == cert.model_checksum), AuditTally(cert.model_checksum))
        labels = [cert.model_checksum]
        yield _one(f"{p}_certified_accuracy", "Accepted accuracy the calibration certified.", labels, cert.target)
        bound = accuracy_lower_bound(live.audit_agree, live.audit_decided, cert.confidence)
        if bound is not None:
            yield _one(f"{p}_audit_accuracy_lower_bound",
                       "Exact one-sided Clopper-Pearson lower bound on accepted accuracy from the audit, "
                       "at the certificate's confidence.", labels, bound)
        test = CertificateTest(target=cert.target)
        yield _one(f"{p}_audit_evidence_nats",
                   "Log likelihood ratio of the audit against the certificate (error rate doubled vs certified).",
                   labels, test.evidence(live.audit_agree, live.audit_decided))
        yield _one(f"{p}_audit_evidence_threshold_nats",
                   "ln(1/alpha): audit evidence at or above this contradicts the certificate "
                   "(lifetime false-alarm probability <= alpha).", labels, test.threshold)


def _one(name: str, doc: str, labels: list[str], value: float) -> GaugeMetricFamily:
    fam = GaugeMetricFamily(name, doc, labels=["model_checksum"])
    fam.add_metric(labels, float(value))
    return fam
