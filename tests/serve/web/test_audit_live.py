"""Audit truth through the app: people decide audit items, /metrics shows the audit series read
from the shared store, on SQLite and on the real PostgreSQL, and a restarted app (a fresh
process's view: new app, new metrics, same store) shows the same figures."""

from __future__ import annotations

import json
import math
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest
from prometheus_client import CollectorRegistry
from prometheus_client.parser import text_string_to_metric_families

from demur.serve.adapters.engine import Engine
from demur.serve.adapters.metrics import Metrics
from demur.serve.config import ServeConfig
from demur.serve.core.bundle import load_bundle, write_manifest
from demur.serve.web.app import create_app

TOKENS = {"review_tokens": "rev-token-0123456789abcdef"}



@pytest.fixture()
def certified_bundle(tiny_bundle_factory: Callable[..., Any], copy_bundle: Callable[[Any], Path]) -> Any:
    """The tiny classifier accepting every case, with a calibration record certifying 0.9 at 90%."""
    path = copy_bundle(tiny_bundle_factory(task="classification", kind="stacked", draws=8))
    raw = json.loads((path / "manifest.json").read_text())
    raw["decision"]["threshold"] = 1e9
    raw["decision"]["calibration"] = {"method": "fixed_sequence", "threshold": 1e9, "delta": 0.1,
                                      "target": {"accuracy": 0.9, "max_abstain": 0.3},
                                      "bound": {"accuracy_lower": 0.91}}
    write_manifest(path, raw)
    return load_bundle(path)


def _app(bundle: Any, store_url: str, tmp_path: Path) -> Any:
    config = ServeConfig(bundle=str(bundle.path), seed=0, data_dir=str(tmp_path / "data"), review_store=store_url,
                         audit_fraction=1.0, **TOKENS)
    metrics = Metrics(config, registry=CollectorRegistry())
    return create_app(config, engine=Engine(bundle, seed=0), metrics=metrics)


def _series(client: Any, checksum: str) -> dict[str, float]:
    text = client.get("/metrics").get_data(as_text=True)
    return {s.name: s.value for f in text_string_to_metric_families(text) for s in f.samples
            if s.labels.get("model_checksum") == checksum}


def test_audit_series_from_the_shared_store_survive_a_restart(certified_bundle: Any, store_url: str,
                                                               tmp_path: Path) -> None:
    app = _app(certified_bundle, store_url, tmp_path)
    client = app.test_client()
    answers = client.post("/v1/predict", json={"cases": [[float(i % 16)] * 64 for i in range(12)],
                                                "case_ids": [f"parcel-{i}" for i in range(12)]}).get_json()
    predictions = [r["prediction"] for r in answers["results"]]
    assert all(r["decision"] == "accept" for r in answers["results"])
    auth = {"Authorization": f"Bearer {TOKENS['review_tokens']}"}
    right = 0
    for i in range(12):  # the person agrees with the model on the first 9, not on the last 3
        got = client.post("/v1/reviews/claim", headers=auth).get_json()["item"]
        assert got["kind"] == "audit"
        label = got["prediction"] if i < 9 else next(l for l in "0123456789" if l != got["prediction"])
        right += label == got["prediction"]
        r = client.post(f"/v1/reviews/{got['id']}/decision", headers=auth, json={"label": label})
        assert r.status_code == 200, r.get_json()
    assert len(predictions) == 12 and right == 9
    checksum = certified_bundle.checksum
    first = _series(client, checksum)
    assert first["demur_audit_decided_cases"] == 12
    assert first["demur_audit_agreements"] == 9
    assert first["demur_certified_accuracy"] == 0.9
    assert first["demur_audit_evidence_threshold_nats"] == pytest.approx(math.log(100))
    # Clopper-Pearson one-sided 90% lower bound for 9 of 12 (scipy.stats.binomtest, alternative="greater")
    from scipy.stats import binomtest
    ref = binomtest(9, 12, alternative="greater").proportion_ci(confidence_level=0.9, method="exact").low
    assert first["demur_audit_accuracy_lower_bound"] == pytest.approx(ref)
    restarted = _app(certified_bundle, store_url, tmp_path / "again").test_client()
    assert _series(restarted, checksum) == first
