"""serve/offline/status.py: ``demur status`` reads a server's /metrics and prints the monitoring state.

References: the exposition comes from serve/adapters/metrics.py and is parsed by
prometheus_client's parser; the PSI reading is common practice (< 0.1
stable, 0.1-0.25 moderate, > 0.25 major; a rule of thumb); the queue depths and
abstentions are the ones the test itself put in.
"""

from __future__ import annotations

import json
import socket
from typing import Any

import numpy as np
import pytest
from prometheus_client import CollectorRegistry

import demur.serve.offline.status as snapshot
from demur.serve.web.app import create_app
from demur.serve.cli import main
from demur.serve.config import ServeConfig
from demur.serve.adapters.engine import Engine
from demur.serve.adapters.metrics import Metrics


@pytest.mark.parametrize("value,reading", [(0.0, "stable"), (0.099, "stable"), (0.1, "moderate shift"),
                                           (0.25, "moderate shift"), (0.26, "major shift")])
def test_psi_reading_common_practice(value: float, reading: str) -> None:
    assert snapshot.psi_reading(value) == reading


class _Review:
    def queue_depths(self) -> dict[str, int]:
        return {"pending": 7, "claimed": 2}


@pytest.fixture()
def exposition(tiny_bundle_factory: Any) -> tuple[str, Any, int]:
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    config = ServeConfig(bundle=str(bundle.path), seed=0, drift_window=40)
    metrics = Metrics(config, registry=CollectorRegistry(), review=_Review())
    client = create_app(config, engine=Engine(bundle, seed=0), metrics=metrics).test_client()
    rng = np.random.default_rng(0)
    abstained = 0
    for _ in range(3):
        r = client.post("/v1/predict", json={"cases": rng.integers(0, 17, size=(10, 64)).astype(float).tolist()})
        abstained += sum(res["decision"] == "abstain" for res in r.get_json()["results"])
    return client.get("/metrics").get_data(as_text=True), bundle, abstained


def test_read_status(exposition: tuple[str, Any, int]) -> None:
    text, bundle, abstained = exposition
    s = snapshot.read_status(text, top=3)
    assert s["model"] == {"name": bundle.manifest.model_name, "version": bundle.manifest.model_version,
                          "checksum": bundle.checksum}
    assert sum(s["cases"].values()) == 30
    assert s["cases"].get("abstain", 0) == abstained
    assert s["abstain_ratio"] == pytest.approx(abstained / 30)
    assert s["review_queue"] == {"pending": 7, "claimed": 2}
    assert s["drift_window_cases"] == 30
    assert len(s["top_features"]) == 3
    psis = [f["psi"] for f in s["top_features"]]
    assert psis == sorted(psis, reverse=True) and psis[0] == pytest.approx(s["psi_max"])
    assert s["threshold"]["value"] == bundle.manifest.decision.threshold


def test_demur_status_prints_text_and_json(exposition: tuple[str, Any, int], monkeypatch: pytest.MonkeyPatch,
                                           capsys: pytest.CaptureFixture[str]) -> None:
    text, bundle, _ = exposition
    monkeypatch.setattr(snapshot, "fetch_metrics", lambda url, timeout=5.0: text)
    assert main(["status", "--url", "http://127.0.0.1:8600", "--top", "2"]) == 0
    out = capsys.readouterr().out
    assert bundle.checksum[:12] in out and "input drift (PSI)" in out and "pending 7" in out
    assert "never replaces" in out
    assert main(["status", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert sum(doc["cases"].values()) == 30


def test_demur_status_unreachable_server_is_a_clear_error(capsys: pytest.CaptureFixture[str]) -> None:
    with socket.socket() as s:  # a loopback port with nothing listening
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    assert main(["status", "--url", f"http://127.0.0.1:{port}", "--timeout", "2"]) == 2
    assert f"cannot read http://127.0.0.1:{port}/metrics" in capsys.readouterr().err


def test_status_prints_the_served_models_audit_line() -> None:
    """The audit line reads the served model's audit series only (another checksum's are ignored)."""
    from demur.serve.offline.status import read_status, render_status

    text = "\n".join([
        '# TYPE demur_model_info gauge',
        'demur_model_info{name="depot-digits",version="1",checksum="abc"} 1',
        '# TYPE demur_audit_decided_cases gauge',
        'demur_audit_decided_cases{model_checksum="abc"} 40',
        'demur_audit_decided_cases{model_checksum="old"} 999',
        '# TYPE demur_audit_agreements gauge',
        'demur_audit_agreements{model_checksum="abc"} 39',
        '# TYPE demur_certified_accuracy gauge',
        'demur_certified_accuracy{model_checksum="abc"} 0.98',
        '# TYPE demur_audit_accuracy_lower_bound gauge',
        'demur_audit_accuracy_lower_bound{model_checksum="abc"} 0.9',
        '# TYPE demur_audit_evidence_nats gauge',
        'demur_audit_evidence_nats{model_checksum="abc"} -0.5',
        '# TYPE demur_audit_evidence_threshold_nats gauge',
        'demur_audit_evidence_threshold_nats{model_checksum="abc"} 4.6',
        '# TYPE demur_abstentions_decided_cases gauge',
        'demur_abstentions_decided_cases{model_checksum="abc"} 10',
        '# TYPE demur_abstentions_model_right_cases gauge',
        'demur_abstentions_model_right_cases{model_checksum="abc"} 6',
        '',
    ])
    status = read_status(text)
    assert status["audit"]["decided"] == 40 and status["audit"]["agree"] == 39
    out = render_status(status)
    assert "39 of 40 audited accepted cases" in out
    assert "no evidence against the certificate" in out
    assert "right on 6 of 10 decided abstentions" in out
