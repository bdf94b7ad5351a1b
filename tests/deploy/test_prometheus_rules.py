"""deploy/prometheus/: the scrape config and alert rules, checked with Prometheus' own promtool.

References: ``promtool check config`` / ``promtool check rules`` (syntax and
PromQL validity) and ``promtool test rules`` on the synthetic series in
deploy/prometheus/tests/demur-alerts.test.yml, where every alert is shown
firing on one instance and not firing on others (Debian's ``prometheus``
package; CI installs it through deploy/system-deps.sh). The metric names the
rules use are checked against a live exposition of serve/adapters/metrics.py.
"""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path
from typing import Any

import pytest
import yaml
from prometheus_client.parser import text_string_to_metric_families

pytestmark = pytest.mark.prometheus

PROM_DIR = Path(__file__).resolve().parents[2] / "deploy" / "prometheus"
RULES = sorted((PROM_DIR / "rules").glob("*.yml"))
ALERTS = PROM_DIR / "rules" / "demur-alerts.yml"
RULE_TESTS = sorted((PROM_DIR / "tests").glob("*.test.yml"))


def promtool() -> str:
    path = shutil.which("promtool")
    if path is None:
        pytest.skip("promtool NOT FOUND: install Debian's 'prometheus' package (deploy/system-deps.sh); "
                    "the alert rules are untested without it")
    return path


def run(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([promtool(), *args], capture_output=True, text=True, timeout=120, cwd=PROM_DIR)


def test_check_config() -> None:
    result = run("check", "config", "prometheus.yml")
    assert result.returncode == 0, result.stdout + result.stderr


def test_check_rules() -> None:
    assert RULES
    result = run("check", "rules", *map(str, RULES))
    assert result.returncode == 0, result.stdout + result.stderr


def test_rule_unit_tests() -> None:
    assert RULE_TESTS
    result = run("test", "rules", *map(str, RULE_TESTS))
    assert result.returncode == 0, result.stdout + result.stderr
    assert "SUCCESS" in result.stdout


def test_every_alert_is_tested_firing_and_not_firing() -> None:
    alerts = [r["alert"] for g in yaml.safe_load(ALERTS.read_text())["groups"] for r in g["rules"] if "alert" in r]
    fired: set[str] = set()
    quiet: set[str] = set()
    for path in RULE_TESTS:
        for test in yaml.safe_load(path.read_text())["tests"]:
            for case in test.get("alert_rule_test", []):
                exp = case.get("exp_alerts") or []
                (fired if exp else quiet).add(case["alertname"])
                # the instances that must stay quiet are absent from the expected alerts
                if exp:
                    assert all("a" in (a["exp_labels"].get("instance"), a["exp_labels"].get("model_checksum")) for a in exp)
                    quiet.add(case["alertname"])  # b/c series in the same group are expected not to fire
    assert set(alerts) <= fired, f"alerts never shown firing: {set(alerts) - fired}"
    assert set(alerts) <= quiet


def test_rules_name_only_metrics_the_server_exports(tiny_bundle_factory: Any, copy_bundle: Any) -> None:
    # every demur_* name in an alert expression must exist in serve/adapters/metrics.py's exposition,
    # for a bundle whose calibration certified an accuracy (the audit series need a certificate)
    import json

    from prometheus_client import CollectorRegistry

    from demur.serve.web.app import create_app
    from demur.serve.config import ServeConfig
    from demur.serve.adapters.engine import Engine
    from demur.serve.adapters.metrics import Metrics
    from demur.serve.core.audit import AuditTally
    from demur.serve.core.bundle import load_bundle, write_manifest

    path = copy_bundle(tiny_bundle_factory(task="classification", kind="stacked", draws=8))
    raw = json.loads((path / "manifest.json").read_text())
    raw["decision"]["calibration"] = {"method": "fixed_sequence", "target": {"accuracy": 0.9, "max_abstain": 0.3},
                                      "delta": 0.1, "bound": {"accuracy_lower": 0.91}}
    write_manifest(path, raw)
    bundle = load_bundle(path)
    config = ServeConfig(bundle=str(bundle.path), seed=0)

    class Store:
        def audit_tallies(self) -> list[AuditTally]:
            return [AuditTally(bundle.checksum, audit_decided=10, audit_agree=9)]

    class Review:
        max_pending = 50_000
        store = Store()

        def queue_depths(self) -> dict[str, int]:
            return {"pending": 0}

    metrics = Metrics(config, registry=CollectorRegistry(), review=Review())
    client = create_app(config, engine=Engine(bundle, seed=0), metrics=metrics).test_client()
    client.post("/v1/predict", json={"cases": [[0.0] * 64]})
    metrics.review_enqueue_failed(1)
    exported = {s.name for f in text_string_to_metric_families(client.get("/metrics").get_data(as_text=True))
                for s in f.samples}
    exprs = " ".join(r["expr"] for g in yaml.safe_load(ALERTS.read_text())["groups"] for r in g["rules"])
    used = set(re.findall(r"\bdemur_[a-z_]+\b", exprs))
    assert used and used <= exported, f"rules use names the server does not export: {used - exported}"
