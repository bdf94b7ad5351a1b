"""serve/web/app.py through Flask's test client: the documented schema, the decision rule,
batch = singles, the seams (review, metrics, roll-out), errors, and the digits demo.

References: the response schema is serve/web/openapi.json, checked with jsonschema's
Draft 2020-12 validator (the JSON Schema dialect of OpenAPI 3.1); the BALD
decomposition (Houlsby et al. 2011, eq. 1) for the uncertainty fields, recomputed
with scipy.stats.entropy; the data set is scikit-learn's bundled digits
(sklearn.datasets.load_digits) through demur.export.datasets' fixed test split.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np
import pytest
from jsonschema import Draft202012Validator
from scipy.stats import entropy

from demur.serve.web import app as app_module
from demur.serve.web.app import EXTENSION, OPENAPI_PATH, create_app
from demur.serve.config import ServeConfig
from demur.serve.adapters.engine import Engine
from demur.serve.errors import GraphRunError

DOC = json.loads(OPENAPI_PATH.read_text())


def _validator(name: str) -> Draft202012Validator:
    schema = {"$schema": "https://json-schema.org/draft/2020-12/schema",
              "components": DOC["components"], "$ref": f"#/components/schemas/{name}"}
    return Draft202012Validator(schema)


def _rows(n: int, seed: int = 0) -> list[list[float]]:
    return np.random.default_rng(seed).uniform(0, 16, size=(n, 64)).round(3).tolist()


def _post(client: Any, body: Any) -> Any:
    return client.post("/v1/predict", json=body)


# --- schema ---------------------------------------------------------------------------------


def test_classification_response_follows_the_schema(client: Any) -> None:
    r = _post(client, {"cases": _rows(3), "case_ids": ["parcel-1", None, "parcel-3"]})
    assert r.status_code == 200 and r.mimetype == "application/json"
    body = r.get_json()
    _validator("PredictResponse").validate(body)
    assert [x["case_id"] for x in body["results"]] == ["parcel-1", None, "parcel-3"]
    assert body["draws"] == 8
    for result in body["results"]:
        assert result["prediction"] in [str(i) for i in range(10)]
        assert len(result["mean"]) == 10 and abs(sum(result["mean"]) - 1) < 1e-9
        assert result["uncertainty"]["unit"] == "nats"
        lo, hi = np.asarray(result["interval"]["lower"]), np.asarray(result["interval"]["upper"])
        assert (lo <= hi + 1e-12).all()
    assert r.headers["Demur-Model-Version"] == f"{body['model']['name']}/{body['model']['version']}"
    assert r.headers["Demur-Model-Checksum"] == body["model"]["checksum"]


def test_uncertainty_matches_scipy_entropy(app: Any) -> None:
    """BALD (Houlsby et al. 2011, eq. 1) recomputed from the engine's draws with scipy.stats.entropy."""
    rows = _rows(4, seed=3)
    body = _post(app.test_client(), {"cases": rows}).get_json()
    engine = app.extensions[EXTENSION].slot.live.engine
    logits = engine.run(np.asarray(rows, dtype=np.float32)).astype(np.float64)
    p = np.exp(logits - logits.max(axis=2, keepdims=True))
    p /= p.sum(axis=2, keepdims=True)
    mean = p.mean(axis=0)
    for b, result in enumerate(body["results"]):
        pe = entropy(mean[b])
        ee = np.mean([entropy(p[s, b]) for s in range(p.shape[0])])
        assert result["uncertainty"]["predictive_entropy"] == pytest.approx(pe, abs=1e-9)
        assert result["uncertainty"]["expected_entropy"] == pytest.approx(ee, abs=1e-9)
        assert result["uncertainty"]["mutual_information"] == pytest.approx(max(pe - ee, 0.0), abs=1e-9)


def test_regression_response_follows_the_schema(regression_client: Any) -> None:
    names = [f"f{i}" for i in range(10)]
    body = _post(regression_client, {"cases": [dict(zip(names, [1.0] * 10)), [2.0] * 10]}).get_json()
    _validator("PredictResponse").validate(body)
    for result in body["results"]:
        assert isinstance(result["prediction"], float) and result["prediction"] == result["mean"]
        assert result["interval"]["lower"] <= result["mean"] <= result["interval"]["upper"]
        v = result["variance"]
        assert v["total"] == pytest.approx(v["epistemic"] + v["aleatoric"], rel=1e-12)


def test_image_bundle_takes_grids(image_client: Any) -> None:
    grid = np.arange(64, dtype=float).reshape(8, 8) % 17
    one = _post(image_client, {"cases": [grid.tolist()]}).get_json()
    two = _post(image_client, {"cases": [[grid.tolist()]]}).get_json()
    three = _post(image_client, {"cases": [grid.ravel().tolist()]}).get_json()
    assert one["results"][0]["mean"] == two["results"][0]["mean"] == three["results"][0]["mean"]
    _validator("PredictResponse").validate(one)


def test_model_health_ready_follow_the_schema(client: Any) -> None:
    model = client.get("/v1/model")
    assert model.status_code == 200
    _validator("ModelDescription").validate(model.get_json())
    desc = model.get_json()
    assert desc["inputs"]["names"][0] == "px_r0c0" and desc["draws"] == 8
    assert desc["decision_rule"]["source"] in ("calibrated", "bundle")
    assert "never replaces" in desc["caution"]
    # how the served graph computes, as the bundle records it (None for a bundle that records nothing)
    assert desc["computation"] is None or desc["computation"].startswith(("shared", "per draw", "one pass"))
    _validator("Alive").validate(client.get("/healthz").get_json())
    ready = client.get("/readyz")
    assert ready.status_code == 200
    _validator("Ready").validate(ready.get_json())


# --- the decision -----------------------------------------------------------------------------


def _split_threshold(client: Any, rows: list[list[float]]) -> float:
    body = _post(client, {"cases": rows}).get_json()
    return float(np.median([r["score"]["value"] for r in body["results"]]))


def test_decision_follows_score_and_threshold(tiny_bundle_factory: Any, make_app: Any) -> None:
    """abstain iff score > threshold (issue 3's rule); the score is the named uncertainty field."""
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    rows = _rows(40, seed=5)
    threshold = _split_threshold(make_app(bundle).test_client(), rows)
    client = make_app(bundle, threshold=threshold).test_client()
    body = _post(client, {"cases": rows}).get_json()
    assert body["decision_rule"] == {"score": "mutual_information", "threshold": threshold, "source": "config"}
    decisions = set()
    for r in body["results"]:
        assert r["threshold"] == threshold
        assert r["score"]["value"] == r["uncertainty"][r["score"]["name"]]
        assert r["decision"] == ("abstain" if r["score"]["value"] > threshold else "accept")
        assert r["reason"].startswith("mutual_information")
        decisions.add(r["decision"])
        if r["decision"] == "abstain":
            assert "review_id" in r or r["review"]["queued"] is False  # the review queue's answer
    assert decisions == {"accept", "abstain"}


def test_other_score_by_config(tiny_bundle_factory: Any, make_app: Any) -> None:
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    client = make_app(bundle, score="one_minus_max_prob", threshold=0.5).test_client()
    for r in _post(client, {"cases": _rows(10)}).get_json()["results"]:
        assert r["score"]["name"] == "one_minus_max_prob"
        assert r["score"]["value"] == pytest.approx(1 - max(r["mean"]), abs=1e-12)
        assert r["decision"] == ("abstain" if r["score"]["value"] > 0.5 else "accept")


def test_batch_equals_single_calls(client: Any) -> None:
    """Stacked draws: the same S weight sets for every call, so a batch of N must equal
    N single-case calls (float32 graph; tolerance 1e-6 for batch-size-dependent matmul order)."""
    rows = _rows(6, seed=9)
    batch = _post(client, {"cases": rows}).get_json()["results"]
    for row, together in zip(rows, batch):
        alone = _post(client, {"cases": [row]}).get_json()["results"][0]
        np.testing.assert_allclose(alone["mean"], together["mean"], atol=1e-6)
        for key in ("mutual_information", "predictive_entropy", "expected_entropy"):
            assert alone["uncertainty"][key] == pytest.approx(together["uncertainty"][key], abs=1e-6)
        assert alone["prediction"] == together["prediction"]


# --- seams ------------------------------------------------------------------------------------


class _Review:
    def __init__(self, fail: bool = False) -> None:
        self.calls: list[tuple[Any, ...]] = []
        self.fail = fail

    def enqueue(self, answered: Any) -> list[Any]:
        if self.fail:
            raise ConnectionError("store down")
        self.calls.append(answered)
        return [{"review_id": f"r-{i}"} if a else None for i, a in enumerate(answered.decisions.abstain.tolist())]


class _Metrics:
    def __init__(self) -> None:
        self.predicts: list[dict[str, Any]] = []
        self.errors: list[dict[str, Any]] = []
        self.bound: list[Any] = []
        self.requests: list[tuple[str, int]] = []

    def bind_model(self, bundle: Any, rule: Any) -> None:
        self.bound.append((bundle.checksum, rule.score))

    def observe_predict(self, **kw: Any) -> None:
        self.predicts.append(kw)

    def observe_error(self, **kw: Any) -> None:
        self.errors.append(kw)

    def observe_request(self, route: str, method: str, status: int, seconds: float) -> None:
        self.requests.append((route, status))

    def observe_connection_refused(self) -> None:
        return None

    def attach(self, runtime: Any, *, review: Any = None, routes: Any = None) -> None:
        """What serve/web/metrics_http.py calls when create_app composes its metrics."""

    def exposition(self) -> tuple[bytes, str]:
        return b"", "text/plain"


class _FailingMetrics(_Metrics):
    """Every report raises, as a metrics backend with a full disk or a bug would."""

    def bind_model(self, bundle: Any, rule: Any) -> None:
        raise OSError("disk full")

    def observe_predict(self, **kw: Any) -> None:
        raise RuntimeError("metrics bug")

    def observe_error(self, **kw: Any) -> None:
        raise RuntimeError("metrics bug")

    def observe_request(self, route: str, method: str, status: int, seconds: float) -> None:
        raise RuntimeError("metrics bug")


def test_a_failing_metrics_hook_never_costs_an_answer(tiny_bundle_factory: Any, make_app: Any,
                                                      caplog: pytest.LogCaptureFixture) -> None:
    """Runtime.monitor is the one guard around the metrics hook: the model still goes live, answers
    and refusals still go out, and each failure is logged."""
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    client = make_app(bundle, review=_Review(), metrics=_FailingMetrics()).test_client()
    assert _post(client, {"cases": _rows(2)}).status_code == 200
    assert _post(client, {"cases": []}).status_code == 400
    assert sum("metrics hook failed" in r.getMessage() for r in caplog.records) >= 4


def test_review_and_metrics_hooks(tiny_bundle_factory: Any, make_app: Any) -> None:
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    review, metrics = _Review(), _Metrics()
    client = make_app(bundle, threshold=-1.0, review=review, metrics=metrics).test_client()
    body = _post(client, {"cases": _rows(3), "case_ids": ["a", "b", "c"]}).get_json()
    assert [r["review_id"] for r in body["results"]] == ["r-0", "r-1", "r-2"]
    answered = review.calls[0]
    assert answered.request.case_ids == ["a", "b", "c"] and answered.request.x.shape == (3, 64)
    assert answered.live.model == body["model"] and answered.decisions.abstain.all()
    assert answered.caller is None  # predict is open: no token to name
    assert answered.live.manifest.task == "classification" and len(answered.results) == 3
    assert metrics.bound == [(bundle.checksum, "mutual_information")]
    seen = metrics.predicts[0]
    assert seen["x_raw"].shape == (3, 64) and seen["graph_seconds"] >= 0 and seen["total_seconds"] >= 0
    client.post("/v1/predict", json={"cases": []})
    assert metrics.errors[-1]["status"] == 400 and metrics.errors[-1]["code"] == "invalid_input"


def test_failing_review_never_loses_the_answer(tiny_bundle_factory: Any, make_app: Any) -> None:
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    client = make_app(bundle, threshold=-1.0, review=_Review(fail=True)).test_client()
    r = _post(client, {"cases": _rows(2)})
    assert r.status_code == 200
    for result in r.get_json()["results"]:
        assert result["review"]["queued"] is False and "ConnectionError" in result["review"]["reason"]


def test_not_ready_until_started(tiny_bundle_factory: Any, tmp_path: Any) -> None:
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    app = create_app(ServeConfig(bundle=str(bundle.path), seed=0, data_dir=str(tmp_path)), start=False)
    client = app.test_client()
    assert client.get("/healthz").status_code == 200
    r = client.get("/readyz")
    assert r.status_code == 503 and r.get_json()["error"]["code"] == "not_loaded"
    assert _post(client, {"cases": _rows(1)}).status_code == 503
    app.extensions[EXTENSION].start()
    assert client.get("/readyz").status_code == 200


def test_roll_out_swaps_and_bad_model_is_refused(tiny_bundle_factory: Any, make_app: Any) -> None:
    first = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    second = tiny_bundle_factory(task="classification", kind="stacked", draws=4)
    app = make_app(first)
    client, runtime = app.test_client(), app.extensions[EXTENSION]
    old = runtime.install(Engine(second, seed=0))
    assert old is not None and old.model["checksum"] == first.checksum
    body = _post(client, {"cases": _rows(1)}).get_json()
    assert body["model"]["checksum"] == second.checksum and body["draws"] == 4

    class Broken(Engine):
        def run(self, x_raw: Any) -> np.ndarray:
            return np.full((4, len(x_raw), 10), np.nan, dtype=np.float32)

    with pytest.raises(Exception, match="smoke prediction failed"):
        runtime.install(Broken(first, seed=0))
    assert _post(client, {"cases": _rows(1)}).get_json()["model"]["checksum"] == second.checksum


# --- errors -----------------------------------------------------------------------------------


def _error_of(response: Any) -> dict[str, Any]:
    _validator("ErrorResponse").validate(response.get_json())
    return response.get_json()["error"]


def test_transport_errors(tiny_bundle_factory: Any, make_app: Any) -> None:
    """RFC 9110: 415 for a media type the route does not take, 413 for a body over the limit,
    405 with Allow for a wrong method, 404 for no route; all in our error shape."""
    client = make_app(tiny_bundle_factory(task="classification", kind="stacked", draws=8),
                      max_body_bytes=2000).test_client()
    r = client.post("/v1/predict", data="cases=1", content_type="text/plain")
    assert r.status_code == 415 and _error_of(r)["field"] == "Content-Type"
    r = client.post("/v1/predict", data=b"{" + b" " * 3000 + b"}", content_type="application/json")
    assert r.status_code == 413 and _error_of(r)["field"] == "body"
    r = client.post("/v1/predict", data=b"{\"cases\": [", content_type="application/json")
    assert r.status_code == 400 and _error_of(r)["field"] == "body"
    r = client.get("/v1/predict")
    assert r.status_code == 405 and "POST" in r.headers["Allow"] and _error_of(r)["code"] == "method_not_allowed"
    r = client.get("/v2/nothing")
    assert r.status_code == 404 and _error_of(r)["code"] == "not_found"


def test_unexpected_errors_are_500_without_traceback(app: Any, caplog: Any) -> None:
    runtime = app.extensions[EXTENSION]
    client = app.test_client()

    def explode(x: Any) -> Any:
        raise KeyError("secret internals")

    runtime.slot.live.engine.run = runtime.slot.live.engine.run_standardised = explode
    r = _post(client, {"cases": _rows(1)})
    assert r.status_code == 500
    err = _error_of(r)
    assert err["code"] == "internal" and "secret" not in err["message"] and "Traceback" not in r.get_data(as_text=True)
    assert any("unhandled error" in rec.message for rec in caplog.records)

    def graph_fails(x: Any) -> Any:
        raise GraphRunError("onnxruntime failed to run the stacked graph: boom", field="graph")

    runtime.slot.live.engine.run = runtime.slot.live.engine.run_standardised = graph_fails
    r = _post(client, {"cases": _rows(1)})
    assert r.status_code == 500 and _error_of(r)["code"] == "graph_run_failed"


# --- the digits demo ------------------------------------------------------------------------------


@pytest.mark.slow
def test_digits_demo_uncertainty_tracks_errors_and_noise(demo_client: Any, demo_dataset: Any) -> None:
    """On scikit-learn's bundled digits (demur.export.datasets' fixed test split): mean MI of the cases
    the model gets wrong is higher than of those it gets right, and mean MI rises when the
    inputs are corrupted with noise. Expected behaviour of the BALD score (Houlsby et al. 2011);
    not a published figure, the numbers are printed for the report."""
    x, y = demo_dataset.split("test")
    body = _post(demo_client, {"cases": x.tolist()}).get_json()
    _validator("PredictResponse").validate(body)
    pred = np.asarray([int(r["prediction"]) for r in body["results"]])
    mi = np.asarray([r["uncertainty"]["mutual_information"] for r in body["results"]])
    wrong = pred != y
    accuracy = 1 - wrong.mean()
    print(f"\n[demo] test n={len(y)} accuracy={accuracy:.4f} wrong={wrong.sum()} "
          f"mean MI wrong={mi[wrong].mean():.3g} right={mi[~wrong].mean():.3g} nats "
          f"ratio={mi[wrong].mean() / mi[~wrong].mean():.2f}")
    assert accuracy > 0.9  # the trained demo model
    assert wrong.sum() >= 1
    assert mi[wrong].mean() > mi[~wrong].mean()

    rng = np.random.default_rng(0)
    noisy = np.clip(x + rng.normal(0.0, 6.0, size=x.shape), 0.0, 16.0)  # pixel range 0..16
    noisy_body = _post(demo_client, {"cases": noisy.tolist()}).get_json()
    mi_noisy = np.asarray([r["uncertainty"]["mutual_information"] for r in noisy_body["results"]])
    abst = np.mean([r["decision"] == "abstain" for r in body["results"]])
    abst_noisy = np.mean([r["decision"] == "abstain" for r in noisy_body["results"]])
    print(f"[demo] mean MI clean={mi.mean():.3g} noisy(sd 6)={mi_noisy.mean():.3g} "
          f"ratio={mi_noisy.mean() / mi.mean():.2f}; abstain clean={abst:.3f} noisy={abst_noisy:.3f}")
    assert mi_noisy.mean() > mi.mean()


def test_sample_requests_are_answered_and_reproducible(client: Any) -> None:
    """sample_requests/*.json: each is answered 200 with the documented schema, and
    make_samples.py (scikit-learn's bundled digits, fixed test split) rebuilds them exactly."""
    import importlib.util

    from tests.serve.conftest import ROOT_DIR

    folder = ROOT_DIR / "sample_requests"
    spec = importlib.util.spec_from_file_location("make_samples", folder / "make_samples.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    built = module.build()
    assert set(built) == {"clear.json", "ambiguous.json", "corrupted.json", "batch.json", "named.json"}
    for name, body in built.items():
        on_disk = json.loads((folder / name).read_text())
        assert on_disk == body, f"{name} differs from make_samples.py's output; rerun it"
        r = _post(client, on_disk)
        assert r.status_code == 200, r.get_json()
        _validator("PredictResponse").validate(r.get_json())
        assert [x["case_id"] for x in r.get_json()["results"]] == body["case_ids"]


# --- several requests, one graph run (what the HTTP front does) --------------------------------


def test_answer_merges_valid_bodies_and_isolates_bad_ones(app: Any, client: Any) -> None:
    """``Runtime.answer`` on [good, bad, good]: each good body gets exactly what it gets alone
    (stacked draws are fixed, so the numbers must agree to float32 rounding); the bad one
    gets its own 400 naming the field; one metrics batch covers both good bodies."""
    runtime = app.extensions[EXTENSION]
    a, b = {"cases": _rows(2, seed=1), "case_ids": ["a1", "a2"]}, {"cases": _rows(3, seed=2)}
    bad = {"cases": [[1.0, 2.0]]}
    with app.test_request_context():
        live, answers = runtime.answer([a, bad, b])
    assert live is runtime.slot.live
    first, error, second = answers
    assert isinstance(error, app_module.DemurError) and error.status == 400 and error.field == "cases[0]"
    for body, got in ((a, first), (b, second)):
        alone = _post(client, body).get_json()
        assert [r["case_id"] for r in got["results"]] == [r["case_id"] for r in alone["results"]]
        for x, y in zip(got["results"], alone["results"]):
            np.testing.assert_allclose(x["mean"], y["mean"], rtol=1e-5, atol=1e-7)
            assert x["decision"] == y["decision"]
        assert got["model"] == alone["model"] and got["draws"] == alone["draws"]
