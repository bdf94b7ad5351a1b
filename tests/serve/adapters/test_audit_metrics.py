"""The audit series (serve/adapters/audit_metrics.py) as Prometheus exposes them."""

from __future__ import annotations

import math

from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.parser import text_string_to_metric_families

from demur.serve.adapters.audit_metrics import AuditCollector, Certificate
from demur.serve.core.audit import AuditTally
from demur.serve.errors import ReviewStoreUnavailable


def _scrape(registry: CollectorRegistry) -> dict[tuple[str, str], float]:
    out = {}
    for fam in text_string_to_metric_families(generate_latest(registry).decode()):
        for s in fam.samples:
            out[(s.name, s.labels.get("model_checksum", ""))] = s.value
    return out


def test_series_per_model_and_the_live_certificate() -> None:
    rows = [AuditTally("aaa", audit_decided=200, audit_agree=196, abstain_decided=30, abstain_model_right=12),
            AuditTally("bbb", audit_decided=5, audit_agree=5)]
    reg = CollectorRegistry()
    reg.register(AuditCollector(lambda: rows, lambda: Certificate("aaa", target=0.98, confidence=0.9)))
    got = _scrape(reg)
    assert got[("demur_audit_decided_cases", "aaa")] == 200
    assert got[("demur_audit_agreements", "bbb")] == 5
    assert got[("demur_abstentions_model_right_cases", "aaa")] == 12
    assert got[("demur_certified_accuracy", "aaa")] == 0.98
    assert got[("demur_audit_evidence_threshold_nats", "aaa")] == math.log(100)
    assert 0.95 < got[("demur_audit_accuracy_lower_bound", "aaa")] < 0.98
    assert ("demur_certified_accuracy", "bbb") not in got


def test_a_store_outage_leaves_the_scrape_whole_and_the_cache_bounds_queries() -> None:
    calls = []

    def tallies():
        calls.append(1)
        if len(calls) > 1:
            raise ReviewStoreUnavailable("cut")
        return [AuditTally("aaa", 1, 1)]

    t = [0.0]
    reg = CollectorRegistry()
    reg.register(AuditCollector(tallies, lambda: None, ttl_s=10.0, clock=lambda: t[0]))
    assert _scrape(reg)[("demur_audit_decided_cases", "aaa")] == 1
    _scrape(reg)
    assert len(calls) == 1  # cached within ttl
    t[0] = 11.0
    assert ("demur_audit_decided_cases", "aaa") not in _scrape(reg)  # outage: series absent, scrape fine
