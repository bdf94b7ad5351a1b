"""serve/adapters/metrics.py: the Prometheus metrics, through the app and through a real 2-worker server.

References: the exposition is parsed with prometheus_client's own parser
(``prometheus_client.parser.text_string_to_metric_families``); naming follows
the Prometheus naming conventions (base units, ``_total`` counters,
``_seconds`` durations); histogram buckets are compared with
prometheus_client's ``Histogram.observe``; the windowed abstention rate with
a plain ``collections.deque``; KS with ``scipy.stats.ks_2samp``; the digits are
scikit-learn's bundled ``load_digits``; PSI's reading is common practice
(> 0.25 major shift, a rule of thumb).
"""

from __future__ import annotations

import collections
import contextlib
import glob
import json
import os
import socket
import sys
import threading
import urllib.error
import urllib.request
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import scipy.stats
from prometheus_client import CollectorRegistry
from prometheus_client.parser import text_string_to_metric_families

import demur.serve.adapters.metrics as metrics_mod
from demur.serve.web.app import create_app
from demur.serve.config import ServeConfig
from demur.serve.adapters.engine import Engine
from demur.serve.errors import ReviewStoreUnavailable
from demur.serve.adapters.metrics import Metrics
from tests._processes import supervised

ROOT = Path(__file__).resolve().parents[3]


# -- helpers --------------------------------------------------------------------------
def scrape_text(client: Any) -> str:
    r = client.get("/metrics")
    assert r.status_code == 200
    assert r.content_type.startswith("text/plain")
    return r.get_data(as_text=True)


def samples(text: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    """{(sample name, sorted labels): value}, parsed with prometheus_client's parser."""
    out = {}
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            out[(s.name, tuple(sorted(s.labels.items())))] = s.value
    return out


def value(text: str, metric: str, /, **labels: str) -> float | None:
    return samples(text).get((metric, tuple(sorted(labels.items()))))


def total(text: str, metric: str, /, **match: str) -> float:
    return sum(v for (n, lab), v in samples(text).items()
               if n == metric and all(dict(lab).get(k) == m for k, m in match.items()))


def make(bundle: Any, **changes: Any) -> tuple[Any, Metrics, CollectorRegistry]:
    config = ServeConfig(bundle=str(bundle.path), seed=0, **changes)
    registry = CollectorRegistry()
    metrics = Metrics(config, registry=registry)
    app = create_app(config, engine=Engine(bundle, seed=0), metrics=metrics)
    return app.test_client(), metrics, registry


@pytest.fixture()
def tiny(tiny_bundle_factory: Any) -> Any:
    return tiny_bundle_factory(task="classification", kind="stacked", draws=8)


def digits_cases(n: int, seed: int) -> list[list[float]]:
    rng = np.random.default_rng(seed)
    return rng.integers(0, 17, size=(n, 64)).astype(float).tolist()


# -- names and exposition -------------------------------------------------------------
def test_names_follow_prometheus_conventions(tiny: Any) -> None:
    # reference: Prometheus naming conventions (one application prefix, base units,
    # counters end in _total, durations in _seconds); parsed by prometheus_client's parser
    client, _, _ = make(tiny)
    client.post("/v1/predict", json={"cases": digits_cases(3, 0)})
    fams = list(text_string_to_metric_families(scrape_text(client)))
    # (prometheus_client's <counter>_created / <histogram>_created series parse as their own gauges)
    names = {f.name: f.type for f in fams if not f.name.endswith("_created")}
    assert names and all(n.startswith("demur_") for n in names)
    for name, typ in names.items():
        if typ == "counter":
            assert all(s.name == name + "_total" for f in fams if f.name == name for s in f.samples)
        if "duration" in name:
            assert name.endswith("_seconds") and typ == "histogram"
    for needed in ("demur_http_requests", "demur_cases", "demur_http_request_duration_seconds",
                   "demur_graph_run_duration_seconds", "demur_batch_cases", "demur_decision_score",
                   "demur_mutual_information_nats", "demur_decision_threshold", "demur_model_info",
                   "demur_abstain_ratio", "demur_drift_feature_psi", "demur_drift_psi_max", "demur_drift_score_ks",
                   "demur_calibrated_abstain_ratio", "demur_review_enqueue_failures"):
        assert needed in names, needed
    assert names["demur_model_info"] == "gauge"  # an info metric is a gauge of value 1 in text format 0.0.4


def test_app_builds_its_own_metrics_when_none_given(tiny: Any) -> None:
    config = ServeConfig(bundle=str(tiny.path), seed=0)
    app = create_app(config, engine=Engine(tiny, seed=0))
    assert isinstance(app.extensions["demur"].metrics, Metrics)
    client = app.test_client()
    client.post("/v1/predict", json={"cases": digits_cases(2, 1)})
    assert total(scrape_text(client), "demur_cases_total") == 2


# -- counts ---------------------------------------------------------------------------
def test_label_values_stay_bounded_under_random_methods_and_paths(tiny: Any) -> None:
    """2,000 requests with random methods (any RFC 9110 token is a valid method) and random
    paths: the request counter keeps a bounded set of label values (Prometheus, "Metric and
    label naming": never put unbounded values such as user input in labels)."""
    client, metrics, _ = make(tiny)
    rng = np.random.default_rng(15)
    letters = np.array(list("ABCDEFGHIJKLMNOPQRSTUVWXYZ-_"))
    for i in range(2000):
        method = "".join(rng.choice(letters, size=int(rng.integers(1, 10))))
        path = "/" + "".join(rng.choice(letters, size=8)).lower() + ("/v1/model" if i % 5 == 0 else "")
        if i % 7 == 0:
            path = f"/v1/reviews/r-{i:030d}"
        client.open(path, method=method)
    metrics.observe_request("/made/up/by/a/caller", "BREW", 999, 0.0)  # direct callers are held too
    text = scrape_text(client)
    series = [lab for (n, lab) in samples(text) if n == "demur_http_requests_total"]
    methods = {dict(lab)["method"] for lab in series}
    routes = {dict(lab)["route"] for lab in series}
    assert methods <= set(metrics_mod.METHODS) | {"other"} and "other" in methods
    assert routes <= {r.rule for r in client.application.url_map.iter_rules()} | {"unmatched", "other"}
    assert len(series) < 60, len(series)


def test_cases_and_requests_match_what_was_answered(tiny: Any) -> None:
    # reference: the responses themselves (each case's "decision")
    client, _, _ = make(tiny)
    sent, decisions = 0, collections.Counter()
    for i, b in enumerate((1, 5, 2, 9, 4)):
        r = client.post("/v1/predict", json={"cases": digits_cases(b, i)})
        assert r.status_code == 200
        decisions.update(res["decision"] for res in r.get_json()["results"])
        sent += b
    assert client.post("/v1/predict", json={"cases": [[1.0]]}).status_code == 400
    text = scrape_text(client)
    assert value(text, "demur_cases_total", decision="accept") == decisions["accept"]
    assert (value(text, "demur_cases_total", decision="abstain") or 0.0) == decisions["abstain"]
    assert value(text, "demur_http_requests_total", route="/v1/predict", method="POST", status="200") == 5
    assert value(text, "demur_http_requests_total", route="/v1/predict", method="POST", status="400") == 1
    assert value(text, "demur_http_errors_total", code="invalid_input") == 1
    assert value(text, "demur_batch_cases_count") == 5
    assert value(text, "demur_batch_cases_sum") == sent
    assert value(text, "demur_graph_run_duration_seconds_count") == 5
    assert value(text, "demur_mutual_information_nats_count") == sent
    assert value(text, "demur_http_request_duration_seconds_count", route="/v1/predict") == 6


def test_abstention_ratio_is_over_the_last_window_decisions(tiny: Any) -> None:
    # reference: a collections.deque(maxlen=abstain_window) of the same decisions
    config = ServeConfig(bundle=str(tiny.path), abstain_window=7)
    metrics = Metrics(config, registry=CollectorRegistry())
    recent: collections.deque[bool] = collections.deque(maxlen=7)
    rng = np.random.default_rng(4)

    class D:
        def __init__(self, a: np.ndarray) -> None:
            self.abstain, self.score = a, rng.random(len(a))

    for b in (3, 0, 5, 1, 9, 2, 7, 4):
        a = rng.random(b) < 0.4
        metrics.observe_predict(np.zeros((b, 64)), None, D(a), 0.001, 0.002)
        recent.extend(a.tolist())
        assert metrics.abstain_ratio() == pytest.approx(sum(recent) / len(recent) if recent else 0.0)
    text = metrics.exposition()[0].decode()
    assert value(text, "demur_abstain_ratio") == pytest.approx(sum(recent) / len(recent))
    assert value(text, "demur_abstain_window_cases") == len(recent)


def test_model_threshold_and_calibrated_rate(tiny: Any) -> None:
    client, metrics, _ = make(tiny)
    text = scrape_text(client)
    m = tiny.manifest
    assert value(text, "demur_model_info", name=m.model_name, version=m.model_version, checksum=tiny.checksum) == 1
    assert value(text, "demur_decision_threshold", score=m.decision.score, source="bundle") == m.decision.threshold
    # calibration-time abstention rate = share of the reference scores above the threshold
    ref = np.asarray(m.drift_reference["score"]["values"])
    assert value(text, "demur_calibrated_abstain_ratio") == pytest.approx(np.mean(ref > m.decision.threshold))


def test_configured_threshold_is_the_one_shown(tiny: Any) -> None:
    client, _, _ = make(tiny, threshold=0.5)
    assert value(scrape_text(client), "demur_decision_threshold", score="mutual_information", source="config") == 0.5


class _Review:
    def __init__(self, fail: bool = False) -> None:
        self.fail = fail

    def queue_depths(self) -> dict[str, int]:
        if self.fail:
            raise ReviewStoreUnavailable("store down", field="review_store")
        return {"pending": 4, "claimed": 1, "decided": 10}


def test_review_queue_depths_and_failures(tiny: Any) -> None:
    config = ServeConfig(bundle=str(tiny.path), seed=0)
    metrics = Metrics(config, registry=CollectorRegistry(), review=_Review())
    client = create_app(config, engine=Engine(tiny, seed=0), metrics=metrics).test_client()
    metrics.review_enqueue_failed(3)
    text = scrape_text(client)
    assert value(text, "demur_review_queue_cases", status="pending") == 4
    assert value(text, "demur_review_queue_cases", status="decided") == 10
    assert value(text, "demur_review_enqueue_failures_total") == 3
    down = Metrics(config, registry=CollectorRegistry(), review=_Review(fail=True))
    text = scrape_text(create_app(config, engine=Engine(tiny, seed=0), metrics=down).test_client())
    assert value(text, "demur_review_queue_cases", status="pending") is None  # an outage never breaks a scrape


# -- drift through the app, on the trained digits demo ---------------------------------
def test_drift_metrics_clean_vs_shifted_digits(demo_bundle: Any, demo_dataset: Any) -> None:
    """Clean: the held-out test split (sklearn digits). Shifted: the same digits brighter by
    4 grey levels on the left half, plus Gaussian noise (sd 2) everywhere, clipped to 0..16.
    KS reference: scipy.stats.ks_2samp on the same recent scores."""
    x_test, _ = demo_dataset.split("test")
    window = len(x_test)
    client, metrics, _ = make(demo_bundle, drift_window=window)

    def send(x: np.ndarray) -> np.ndarray:
        scores = []
        for start in range(0, len(x), 64):
            r = client.post("/v1/predict", json={"cases": x[start:start + 64].tolist()})
            assert r.status_code == 200
            scores += [res["score"]["value"] for res in r.get_json()["results"]]
        return np.asarray(scores)

    clean_scores = send(x_test)
    text = scrape_text(client)
    psi_clean = value(text, "demur_drift_psi_max")
    ks_clean = value(text, "demur_drift_score_ks")
    ref = demo_bundle.manifest.drift_reference["score"]["values"]
    assert ks_clean == pytest.approx(scipy.stats.ks_2samp(clean_scores, ref).statistic, abs=1e-9)

    rng = np.random.default_rng(5)
    left = np.array([c < 4 for r in range(8) for c in range(8)])
    shifted = x_test.copy()
    shifted[:, left] += 4.0
    shifted = np.clip(shifted + rng.normal(scale=2.0, size=shifted.shape), 0.0, 16.0)
    send(shifted)
    text = scrape_text(client)
    psi_shift = value(text, "demur_drift_psi_max")
    ks_shift = value(text, "demur_drift_score_ks")
    names = demo_bundle.manifest.inputs.names
    feature_psi = np.array([value(text, "demur_drift_feature_psi", feature=n) for n in names])
    print(f"\ndemo digits, window {window}: PSI max clean {psi_clean:.3f} -> shifted {psi_shift:.3f} "
          f"(left-half median {np.median(feature_psi[left]):.3f}); score KS clean {ks_clean:.3f} -> "
          f"shifted {ks_shift:.3f}; abstain ratio now {value(text, 'demur_abstain_ratio'):.3f}")
    assert psi_clean < 0.25  # common practice: below 0.25 is not a major shift
    assert np.median(feature_psi[left]) > 0.25  # the shifted features read as major shifts
    assert ks_shift > ks_clean + 0.1
    assert value(text, "demur_drift_window_cases") == window


# -- several workers: counts served == counts scraped ---------------------------------
def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def http(method: str, url: str, body: Any = None, timeout: float = 10.0) -> tuple[int, bytes]:
    data = None if body is None else json.dumps(body).encode()
    req = urllib.request.Request(url, data=data, method=method,
                                 headers={"Content-Type": "application/json"} if data else {})
    try:
        with urllib.request.urlopen(req, timeout=timeout) as r:
            return r.status, r.read()
    except urllib.error.HTTPError as e:
        return e.code, e.read()


@contextlib.contextmanager
def demur_server(bundle_path: Path, *, workers: int, threads: int, log: Path, env: dict[str, str] | None = None,
                 extra: tuple[str, ...] = (), timeout_s: float = 90.0) -> Iterator[str]:
    """``demur serve`` in a subprocess on 127.0.0.1; yields the base URL once every worker is ready."""
    port = free_port()
    cmd = [sys.executable, "-m", "demur.serve.cli", "serve", str(bundle_path), "--host", "127.0.0.1", "--port", str(port),
           "--workers", str(workers), "--threads", str(threads), *extra]
    full_env = {k: v for k, v in os.environ.items() if not k.startswith("DEMUR_") and k != "PROMETHEUS_MULTIPROC_DIR"}
    full_env.update(env or {})
    full_env["DEMUR_DATA_DIR"] = str(log.parent / "demur-data")
    url = f"http://127.0.0.1:{port}"

    def ready() -> bool:
        text = log.read_text(errors="replace") if log.exists() else ""
        return ("worker" in text and text.count(" ready at ") >= workers
                and http("GET", url + "/readyz", timeout=2.0)[0] == 200)

    with supervised(cmd, log=log, ready=ready, what="demur serve", timeout_s=timeout_s, env=full_env, cwd=ROOT):
        yield url


def test_two_workers_counts_served_equal_counts_scraped(tiny: Any, tmp_path: Path) -> None:
    """``demur serve --workers 2 --threads 1`` with 4 concurrent clients, so both workers answer.
    Reference: the client's own tally of cases and decisions it received."""
    mp_dir = tmp_path / "metrics-mp"
    env = {"DEMUR_METRICS_MULTIPROCESS_DIR": str(mp_dir), "DEMUR_ABSTAIN_WINDOW": "100000"}
    tally: collections.Counter[str] = collections.Counter()
    lock = threading.Lock()
    errors: list[str] = []
    with demur_server(tiny.path, workers=2, threads=1, log=tmp_path / "serve.log", env=env) as url:
        def client(k: int) -> None:
            for i in range(15):
                b = 1 + (i * 7 + k) % 6
                status, body = http("POST", url + "/v1/predict", {"cases": digits_cases(b, 100 * k + i)})
                if status != 200:
                    errors.append(f"{status} {body[:200]!r}")
                    continue
                with lock:
                    tally["requests"] += 1
                    tally.update(r["decision"] for r in json.loads(body)["results"])

        threads = [threading.Thread(target=client, args=(k,)) for k in range(4)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(timeout=120)
        assert not errors, errors[:3]
        served = tally["accept"] + tally["abstain"]
        scrapes = [http("GET", url + "/metrics")[1].decode() for _ in range(4)]  # any worker may answer
        worker_files = {Path(f).stem.rsplit("_", 1)[1] for f in glob.glob(str(mp_dir / "counter_*.db"))}
    print(f"\n2 workers: {tally['requests']} requests, {served} cases served "
          f"({tally['abstain']} abstained); counter files from {len(worker_files)} worker processes")
    assert len(worker_files) == 2  # both workers answered some of the traffic
    for text in scrapes:
        assert total(text, "demur_cases_total") == served
        assert (value(text, "demur_cases_total", decision="abstain") or 0.0) == tally["abstain"]
        assert value(text, "demur_http_requests_total", route="/v1/predict", method="POST",
                     status="200") == tally["requests"]
        assert value(text, "demur_batch_cases_sum") == served
        # the pooled window holds every decision (window larger than the traffic)
        assert value(text, "demur_abstain_window_cases") == served
        assert value(text, "demur_abstain_ratio") == pytest.approx(tally["abstain"] / served)
        assert value(text, "demur_model_info", name=tiny.manifest.model_name, version=tiny.manifest.model_version,
                     checksum=tiny.checksum) == 1
