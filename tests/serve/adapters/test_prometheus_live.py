"""End to end: a real Prometheus scraping a real ``demur serve``, clean then drifted digits.

References: Debian's ``prometheus`` server and its HTTP query API
(``/api/v1/query``); scikit-learn's bundled digits (``load_digits``, demur's
held-out test split) as clean traffic; the same digits brighter by 4 grey
levels on the left half plus Gaussian noise (sd 2), clipped to 0..16, as
drifted traffic; PSI > 0.25 read as a major shift (common practice, a rule
of thumb). The rules are deploy/prometheus/rules/*.yml with every ``for:``
shortened to 2 s and the site file given the served bundle's checksum.
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import time
import urllib.parse
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import yaml

from tests._processes import supervised
from tests.serve.adapters.test_metrics import demur_server, free_port, http

pytestmark = pytest.mark.prometheus

PROM_DIR = Path(__file__).resolve().parents[3] / "deploy" / "prometheus"
DRIFT_WINDOW = 300


def prometheus_binary() -> str:
    path = shutil.which("prometheus") or ("/usr/bin/prometheus" if os.path.exists("/usr/bin/prometheus") else None)
    if path is None:
        pytest.skip("prometheus NOT FOUND: install Debian's 'prometheus' package (deploy/system-deps.sh); "
                    "the live monitoring check cannot run without it")
    return path


def write_test_rules(dest: Path, checksum: str) -> list[str]:
    """Copies of the shipped rules with short ``for:`` and the expected checksum filled in."""
    files = []
    for src in sorted((PROM_DIR / "rules").glob("*.yml")):
        doc = yaml.safe_load(src.read_text().replace("SET-TO-MANIFEST-SHA256", checksum))
        for group in doc["groups"]:
            for rule in group["rules"]:
                if "for" in rule:
                    rule["for"] = "2s"
        out = dest / src.name
        out.write_text(yaml.safe_dump(doc, sort_keys=False))
        files.append(str(out))
    return files


@contextlib.contextmanager
def prometheus(target: str, rule_files: list[str], tmp: Path, timeout_s: float = 60.0) -> Iterator[str]:
    """Prometheus on a free loopback port, scraping ``target`` (host:port) every second."""
    port = free_port()
    config = {
        "global": {"scrape_interval": "1s", "evaluation_interval": "1s", "scrape_timeout": "1s"},
        "rule_files": rule_files,
        "scrape_configs": [{"job_name": "demur", "metrics_path": "/metrics",
                            "static_configs": [{"targets": [target]}]}],
    }
    cfg = tmp / "prometheus.yml"
    cfg.write_text(yaml.safe_dump(config))
    log = tmp / "prometheus.log"
    url = f"http://127.0.0.1:{port}"
    cmd = [prometheus_binary(), f"--config.file={cfg}", f"--storage.tsdb.path={tmp / 'tsdb'}",
           f"--web.listen-address=127.0.0.1:{port}"]
    with supervised(cmd, log=log, ready=lambda: http("GET", url + "/-/ready", timeout=2.0)[0] == 200,
                    what="prometheus", timeout_s=timeout_s, poll_s=0.3, stop_timeout_s=20.0):
        yield url


def query(prom: str, expr: str) -> list[dict[str, Any]]:
    status, body = http("GET", f"{prom}/api/v1/query?query={urllib.parse.quote(expr)}")
    assert status == 200, body[:300]
    doc = json.loads(body)
    assert doc["status"] == "success", doc
    return doc["data"]["result"]


def scalar(prom: str, expr: str) -> float | None:
    result = query(prom, expr)
    return float(result[0]["value"][1]) if result else None


def wait_for(prom: str, expr: str, timeout_s: float = 40.0) -> list[dict[str, Any]]:
    """Poll until ``expr`` returns a non-empty vector (bounded)."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        result = query(prom, expr)
        if result:
            return result
        time.sleep(0.5)
    raise AssertionError(f"no result for {expr!r} within {timeout_s}s")


def firing(prom: str, alertname: str) -> bool:
    return bool(query(prom, f'ALERTS{{alertname="{alertname}", alertstate="firing"}}'))


def send(url: str, x: np.ndarray, batch: int = 40) -> int:
    sent = 0
    for start in range(0, len(x), batch):
        status, body = http("POST", url + "/v1/predict", {"cases": x[start:start + batch].tolist()}, timeout=30.0)
        assert status == 200, body[:300]
        sent += len(json.loads(body)["results"])
    return sent


def test_prometheus_sees_drift_and_fires_only_under_drift(demo_bundle: Any, demo_dataset: Any,
                                                          tmp_path: Path) -> None:
    x_test, _ = demo_dataset.split("test")
    rng = np.random.default_rng(7)
    left = np.array([c < 4 for r in range(8) for c in range(8)])
    drifted = x_test.copy()
    drifted[:, left] += 4.0
    drifted = np.clip(drifted + rng.normal(scale=2.0, size=drifted.shape), 0.0, 16.0)
    rules = write_test_rules(tmp_path, demo_bundle.checksum)
    env = {"DEMUR_DRIFT_WINDOW": str(DRIFT_WINDOW)}

    with demur_server(demo_bundle.path, workers=1, threads=4, log=tmp_path / "serve.log", env=env) as url, \
            prometheus(url.removeprefix("http://"), rules, tmp_path) as prom:
        wait_for(prom, 'up{job="demur"} == 1')
        # clean: the held-out digits, more than a full drift window
        served = send(url, x_test)
        wait_for(prom, f"demur_cases_total and on() sum(demur_cases_total) >= {served}")
        wait_for(prom, f"demur_drift_window_cases >= {DRIFT_WINDOW}")
        time.sleep(4.0)  # several rule evaluations (for: 2s) with the full clean window
        psi_clean = scalar(prom, "demur_drift_psi_max")
        ks_clean = scalar(prom, "demur_drift_score_ks")
        clean_alerts = {a: firing(prom, a) for a in ("DemurInputDriftMajor", "DemurScoreDrift",
                                                     "DemurModelNotExpected")}

        # drifted: brighter left half plus noise, again more than a full window
        served += send(url, drifted)
        wait_for(prom, f"sum(demur_cases_total) >= {served}")
        wait_for(prom, 'ALERTS{alertname="DemurInputDriftMajor", alertstate="firing"}', timeout_s=30.0)
        psi_drift = scalar(prom, "demur_drift_psi_max")
        ks_drift = scalar(prom, "demur_drift_score_ks")
        names = np.array(demo_bundle.manifest.inputs.names)
        per_feature = {r["metric"]["feature"]: float(r["value"][1]) for r in query(prom, "demur_drift_feature_psi")}
        left_psi = np.array([per_feature[n] for n in names[left]])
        top = query(prom, "topk(3, demur_drift_feature_psi)")
        ks_critical = scalar(prom, "demur_drift_score_ks_critical")
        score_alert = firing(prom, "DemurScoreDrift") or bool(
            wait_for(prom, 'ALERTS{alertname="DemurScoreDrift", alertstate="firing"}', timeout_s=15.0))
        scraped = scalar(prom, "sum(demur_cases_total)")

    print(f"\nlive Prometheus, drift window {DRIFT_WINDOW}: PSI max clean {psi_clean:.3f} -> drifted {psi_drift:.3f} "
          f"(left-half median {np.median(left_psi):.3f}); score KS clean {ks_clean:.3f} -> drifted {ks_drift:.3f} "
          f"(critical value {ks_critical:.3f}); "
          f"alerts clean {clean_alerts}, score-drift alert drifted {score_alert}; cases served {served}, "
          f"scraped {scraped:.0f}; top: {[(t['metric']['feature'], round(float(t['value'][1]), 2)) for t in top]}")
    assert not any(clean_alerts.values()), clean_alerts  # nothing fires under clean held-out traffic
    assert psi_clean is not None and psi_clean < 0.25
    assert psi_drift is not None and psi_drift > 0.25
    assert np.median(left_psi) > 0.25  # the shifted features read as major shifts
    assert ks_clean is not None and ks_drift is not None and ks_drift > ks_clean + 0.1
    assert score_alert  # the scores moved beyond sampling noise, and the alert says so
    assert scraped == served
