"""The reviewer API and page through the Flask test client (serve/web/review_api.py).

The loop: predict -> abstain (threshold -1: mutual information is >= 0, so every
case abstains) -> claim -> decide -> export. Access follows RFC 6750 (401 with a
Bearer challenge, 403 for a missing scope). Page headers: common practice from
the OWASP secure-headers project (from memory): a CSP with no inline script,
nosniff, no referrer, no framing.
"""

from __future__ import annotations

import csv
import io
import json
import re
from collections.abc import Callable
from typing import Any

import pytest

from demur.serve.review.router import ReviewRouter
from demur.serve.web import review_api

TOKENS = {"review_tokens": "desk-token-1,desk-token-2", "admin_tokens": "ops-token",
          "predict_tokens": "sorter-token"}
R1 = {"Authorization": "Bearer desk-token-1"}
R2 = {"Authorization": "Bearer desk-token-2"}
ADMIN = {"Authorization": "Bearer ops-token"}
SORTER = {"Authorization": "Bearer sorter-token"}


@pytest.fixture()
def app(tiny_bundle_factory: Callable[..., Any], make_app: Callable[..., Any]) -> Any:
    """Digits-shaped tiny classifier where every case abstains; tokens for every scope."""
    return make_app(tiny_bundle_factory(task="classification", kind="stacked", draws=8), threshold=-1.0,
                    audit_fraction=0.0, **TOKENS)


@pytest.fixture()
def client(app: Any) -> Any:
    return app.test_client()


def _router(app: Any) -> ReviewRouter:
    return app.extensions["demur"].review


def _predict(client: Any, cases: list[list[float]], case_ids: list[str | None] | None = None) -> list[dict]:
    body: dict[str, Any] = {"cases": cases}
    if case_ids is not None:
        body["case_ids"] = case_ids
    r = client.post("/v1/predict", json=body, headers=SORTER)
    assert r.status_code == 200, r.json
    return r.json["results"]


def _digit(seed: int) -> list[float]:
    return [float((seed * 7 + i * 3) % 17) for i in range(64)]


def test_abstained_results_carry_a_review_id_that_is_in_the_store(app: Any, client: Any) -> None:
    results = _predict(client, [_digit(1), _digit(2)], ["parcel-1", None])
    assert all(r["decision"] == "abstain" for r in results)
    for r, seed in zip(results, (1, 2)):
        stored = _router(app).store.get(r["review_id"])
        assert stored.case["values"] == _digit(seed) and stored.case["grid"] == [8, 8]
        assert stored.summary["labels"] == [str(d) for d in range(10)]
    again = _predict(client, [_digit(1)], ["parcel-1"])  # a retried request
    assert again[0]["review_id"] == results[0]["review_id"]
    assert _router(app).store.counts()["total"] == 2


def test_the_loop_claim_decide_export(app: Any, client: Any) -> None:
    ids = [r["review_id"] for r in _predict(client, [_digit(s) for s in range(3)], ["a", "b", "c"])]
    r = client.post("/v1/reviews/claim", headers=R1)
    assert r.status_code == 200
    body = r.json
    assert body["item"]["id"] == ids[0] and body["item"]["status"] == "claimed"
    assert body["counts"] == {"pending": 2, "claimed": 1, "decided": 0, "total": 3}
    assert body["item"]["claim"]["reviewer"] == body["reviewer"]
    r = client.post(f"/v1/reviews/{ids[0]}/decision", headers=R1, json={"label": "4", "note": "=cmd|' /C calc'!A0"})
    assert r.status_code == 200 and r.json["item"]["decision"]["label"] == "4"
    assert r.json["counts"]["decided"] == 1
    # export: JSON lines
    r = client.get("/v1/reviews/export?format=jsonl", headers=R1)
    assert r.status_code == 200 and r.mimetype == "application/x-ndjson"
    lines = [json.loads(line) for line in r.get_data(as_text=True).splitlines()]
    assert [x["id"] for x in lines] == [ids[0]] and lines[0]["decision"]["label"] == "4"
    assert lines[0]["case"]["values"] == _digit(0)
    # export: CSV
    r = client.get("/v1/reviews/export?format=csv", headers=R1)
    rows = list(csv.DictReader(io.StringIO(r.get_data(as_text=True))))
    assert len(rows) == 1 and rows[0]["label"] == "4" and rows[0]["client_case_id"] == "a"
    assert rows[0]["note"].startswith("'=")  # spreadsheet formula neutralised
    assert [float(rows[0][f"x{i}"]) for i in range(64)] == _digit(0)
    # listing and summary
    r = client.get("/v1/reviews?status=pending", headers=R2)
    assert [x["id"] for x in r.json["items"]] == ids[1:] and r.json["next"] is None
    r = client.get("/v1/reviews/summary", headers=R2)
    assert r.json["counts"]["decided"] == 1
    assert r.json["accuracy"]["abstained"]["n"] == 1
    assert client.get(f"/v1/reviews/{ids[0]}", headers=R2).json["item"]["decision"]["label"] == "4"


def test_skip_releases_and_the_next_claim_passes_over_it(client: Any) -> None:
    ids = [r["review_id"] for r in _predict(client, [_digit(s) for s in range(2)])]
    first = client.post("/v1/reviews/claim", headers=R1).json["item"]["id"]
    assert client.post(f"/v1/reviews/{first}/release", headers=R1).status_code == 200
    second = client.post("/v1/reviews/claim", headers=R1, json={"skip": [first]}).json["item"]["id"]
    assert (first, second) == (ids[0], ids[1])
    assert client.post("/v1/reviews/claim", headers=R1, json={"skip": [first, second]}).json["item"] is None


def test_only_the_claimant_or_an_admin_decides(client: Any) -> None:
    [rid] = [r["review_id"] for r in _predict(client, [_digit(5)])]
    assert client.post(f"/v1/reviews/{rid}/decision", headers=R1, json={"label": "5"}).status_code == 409
    claimant = client.post("/v1/reviews/claim", headers=R1).json["reviewer"]
    r = client.post(f"/v1/reviews/{rid}/decision", headers=R2, json={"label": "5"})
    assert r.status_code == 409 and r.json["error"]["field"] == "id"
    assert client.post(f"/v1/reviews/{rid}/release", headers=R2).status_code == 409
    r = client.post(f"/v1/reviews/{rid}/decision", headers=ADMIN, json={"label": "5"})
    assert r.status_code == 200 and r.json["item"]["decision"]["reviewer"] not in (claimant, None)
    assert client.post(f"/v1/reviews/{rid}/decision", headers=R1, json={"label": "5"}).status_code == 409


@pytest.mark.parametrize("body, field", [
    ({"label": "ten"}, "label"),
    ({"label": 7}, "label"),
    ({}, "label"),
    ({"label": "7", "value": 7.0}, "label"),
    ({"value": 7.0}, "value"),
    ({"label": "7", "note": "x" * 2001}, "note"),
    ({"label": "7", "reviewer": "someone-else"}, "reviewer"),
    ([1, 2], "body"),
])
def test_bad_decisions_are_400_naming_the_field(client: Any, body: Any, field: str) -> None:
    [rid] = [r["review_id"] for r in _predict(client, [_digit(6)])]
    client.post("/v1/reviews/claim", headers=R1)
    r = client.post(f"/v1/reviews/{rid}/decision", headers=R1, json=body)
    assert r.status_code == 400 and r.json["error"]["field"] == field, r.json


def test_bad_bodies_and_queries_are_4xx_naming_the_field(client: Any) -> None:
    [rid] = [r["review_id"] for r in _predict(client, [_digit(6)])]
    cases = [
        client.post(f"/v1/reviews/{rid}/decision", headers=R1, data="{not json", content_type="application/json"),
        client.post(f"/v1/reviews/{rid}/decision", headers=R1, data="label=7", content_type="text/plain"),
        client.get("/v1/reviews?status=lost", headers=R1),
        client.get("/v1/reviews?limit=0", headers=R1),
        client.get("/v1/reviews?limit=many", headers=R1),
        client.get("/v1/reviews?after=%27%3B--", headers=R1),
        client.get("/v1/reviews/export?format=xlsx", headers=R1),
        client.post("/v1/reviews/claim", headers=R1, json={"skip": "all"}),
        client.post("/v1/reviews/claim", headers=R1, json={"skip": ["x"] * 101}),
    ]
    fields = ["body", "Content-Type", "status", "limit", "limit", "after", "format", "skip", "skip"]
    for r, field in zip(cases, fields):
        assert 400 <= r.status_code < 500 and r.json["error"]["field"] == field, (field, r.json)
    for path in ("/v1/reviews/" + "0" * 32, "/v1/reviews/..%2F..%2Fetc", "/v1/reviews/" + "a" * 300):
        r = client.get(path, headers=R1)
        assert r.status_code == 404 and r.json["error"]["code"] == "not_found"


ROUTES = [("GET", "/v1/reviews"), ("POST", "/v1/reviews/claim"), ("GET", "/v1/reviews/summary"),
          ("GET", "/v1/reviews/export?format=csv"), ("GET", "/v1/reviews/{id}"),
          ("POST", "/v1/reviews/{id}/decision"), ("POST", "/v1/reviews/{id}/release")]


@pytest.mark.parametrize("method, path", ROUTES)
def test_every_reviewer_route_rejects_missing_wrong_and_wrong_scope_tokens(client: Any, method: str,
                                                                           path: str) -> None:
    [rid] = [r["review_id"] for r in _predict(client, [_digit(9)])]
    url = path.format(id=rid)
    for headers, status in ((None, 401), ({"Authorization": "Bearer desk-token-3"}, 401),
                            ({"Authorization": "desk-token-1"}, 401), (SORTER, 403)):
        r = client.open(url, method=method, headers=headers or {}, json={"label": "9"})
        assert r.status_code == status, (url, headers, r.status_code)
        assert set(r.json) == {"error"} and r.json["error"]["field"] == "Authorization"
        if status == 401:
            assert r.headers["WWW-Authenticate"].startswith("Bearer")
        text = r.get_data(as_text=True)
        assert rid not in text and "values" not in text and "desk-token" not in text
    assert _router_counts(client)["decided"] == 0


def _router_counts(client: Any) -> dict[str, int]:
    return client.get("/v1/reviews/summary", headers=ADMIN).json["counts"]


def test_no_response_leaks_another_items_data(app: Any, client: Any) -> None:
    a, b = (r["review_id"] for r in _predict(client, [[1.0] * 64, [13.0] * 64], ["case-a", "case-b"]))
    got_a = client.post("/v1/reviews/claim", headers=R1).json
    got_b = client.post("/v1/reviews/claim", headers=R2).json
    assert (got_a["item"]["id"], got_b["item"]["id"]) == (a, b)
    assert b not in json.dumps(got_a) and "case-b" not in json.dumps(got_a)
    assert a not in json.dumps(got_b) and "case-a" not in json.dumps(got_b)
    # reviewer 2 tries reviewer 1's item: refused, and the answer holds nothing of either item
    for r in (client.post(f"/v1/reviews/{a}/decision", headers=R2, json={"label": "1"}),
              client.post(f"/v1/reviews/{a}/release", headers=R2)):
        text = r.get_data(as_text=True)
        assert r.status_code == 409
        assert "case-a" not in text and "case-b" not in text and b not in text
        assert got_a["reviewer"] not in text  # not even who holds it
    done = client.post(f"/v1/reviews/{b}/decision", headers=R2, json={"label": "3"}).get_data(as_text=True)
    assert a not in done and "case-a" not in done
    listing = client.get("/v1/reviews", headers=R2).json
    assert all(set(x) == {"id", "kind", "status", "created", "model", "client_case_id"} for x in listing["items"])
    assert "values" not in json.dumps(listing) and "summary" not in json.dumps(listing)


def test_audit_items_are_queued_without_telling_the_client(tiny_bundle_factory: Callable[..., Any],
                                                         make_app: Callable[..., Any]) -> None:
    app = make_app(tiny_bundle_factory(task="classification", kind="stacked", draws=8), threshold=1e9,
                   audit_fraction=1.0, **TOKENS)
    client = app.test_client()
    results = _predict(client, [_digit(1), _digit(2)])
    assert all(r["decision"] == "accept" and "review_id" not in r and "review" not in r for r in results)
    items = client.get("/v1/reviews?kind=audit", headers=R1).json["items"]
    assert len(items) == 2
    for r in results:
        got = client.post("/v1/reviews/claim", headers=R1).json["item"]
        assert got["kind"] == "audit"
        client.post(f"/v1/reviews/{got['id']}/decision", headers=R1, json={"label": r["prediction"]})
    accuracy = client.get("/v1/reviews/summary", headers=R1).json["accuracy"]["accepted"]
    assert (accuracy["agree"], accuracy["n"], accuracy["accuracy"]) == (2, 2, 1.0)
    model = client.get("/v1/model").json
    assert model["review"]["accuracy"]["accepted"]["n"] in (0, 2)  # cached up to a few seconds


def test_regression_items_take_a_value(tiny_bundle_factory: Callable[..., Any],
                                       make_app: Callable[..., Any]) -> None:
    app = make_app(tiny_bundle_factory(task="regression", kind="stacked", draws=8), threshold=-1.0, **TOKENS)
    client = app.test_client()
    [res] = _predict(client, [[float(i) for i in range(10)]])
    item = client.post("/v1/reviews/claim", headers=R1).json["item"]
    assert item["id"] == res["review_id"] and item["case"]["names"] == [f"f{i}" for i in range(10)]
    assert len(item["case"]["low"]) == 10 and item["summary"]["task"] == "regression"
    r = client.post(f"/v1/reviews/{item['id']}/decision", headers=R1, json={"label": "3"})
    assert r.status_code == 400 and r.json["error"]["field"] == "label"
    r = client.post(f"/v1/reviews/{item['id']}/decision", headers=R1, json={"value": float("nan")})
    assert r.status_code == 400
    r = client.post(f"/v1/reviews/{item['id']}/decision", headers=R1, json={"value": 3.25})
    assert r.status_code == 200 and r.json["item"]["decision"]["value"] == 3.25


def test_page_loads_without_a_token_with_strict_headers_and_the_caution(client: Any) -> None:
    r = client.get("/review")
    assert r.status_code == 200 and r.mimetype == "text/html"
    csp = r.headers["Content-Security-Policy"]
    assert "unsafe-inline" not in csp and "script-src 'self'" in csp and "frame-ancestors 'none'" in csp
    assert r.headers["X-Content-Type-Options"] == "nosniff"
    assert r.headers["X-Frame-Options"] == "DENY"
    assert r.headers["Referrer-Policy"] == "no-referrer"
    html = r.get_data(as_text=True)
    assert "The decision is yours: demur supports, never replaces, qualified human judgement." in html
    assert not re.search(r"<script(?![^>]*\bsrc=)", html), "no inline script"
    assert " style=" not in html and "<style" not in html and " on" + "click=" not in html
    for name, mimetype in (("review.js", "text/javascript"), ("review.css", "text/css")):
        asset = client.get(f"/review/assets/{name}")
        assert asset.status_code == 200 and asset.mimetype == mimetype
        assert "unsafe-inline" not in asset.headers["Content-Security-Policy"]
    assert client.get("/review/assets/..%2Fapp.py").status_code == 404
    assert client.get("/review/assets/review.html").status_code == 404


def test_store_down_the_answer_still_comes_spooled_and_the_failure_metric_rises(
        tiny_bundle_factory: Callable[..., Any], make_app: Callable[..., Any]) -> None:
    """PostgreSQL on a closed port: predictions are answered (200), each abstention says it was
    not queued but spooled, and demur_review_enqueue_failures_total counts them."""
    from tests.serve._review_helpers import free_port

    app = make_app(tiny_bundle_factory(task="classification", kind="stacked", draws=8), threshold=-1.0,
                   review_store=f"postgresql://postgres@127.0.0.1:{free_port()}/test", spool_replay_s=60.0,
                   **TOKENS)
    client = app.test_client()
    try:
        results = _predict(client, [_digit(1), _digit(2)]) + _predict(client, [_digit(3)])
        for r in results:
            assert "review_id" not in r
            assert r["review"]["queued"] is False and r["review"]["spooled"] is True
            assert r["review"]["pending_review_id"] and "unavailable" in r["review"]["reason"]
        router = _router(app)
        assert router.failures == 3 and router.spool is not None and router.spool.size() == 3
        registry = app.extensions["demur"].metrics.registry
        assert registry.get_sample_value("demur_review_enqueue_failures_total") == 3.0
        r = client.get("/v1/reviews/summary", headers=R1)
        assert r.status_code == 503 and r.json["error"]["code"] == "review_store_unavailable"
        assert client.get("/v1/model").json["review"]["available"] is False
    finally:
        _router(app).close()


def test_csv_export_neutralises_formulas_in_every_text_cell(client: Any) -> None:
    """OWASP, "CSV Injection": a cell that starts with = + - @ tab or carriage return is read
    as a formula by spreadsheets; prefix it with an apostrophe. The client's case id and the
    reviewer's note are free text; numbers (a negative value) stay numbers."""
    hostile = ["=HYPERLINK(\"http://x\")", "+1+cmd|' /C calc'!A0", "-2+3", "@SUM(A1)"]
    ids = [r["review_id"] for r in _predict(client, [_digit(s) for s in range(4)], hostile)]
    for rid, note in zip(ids, ["=1+1", "plain", "-x", "@me"]):
        claimed = client.post("/v1/reviews/claim", headers=R1).json["item"]
        assert claimed["id"] == rid
        assert client.post(f"/v1/reviews/{rid}/decision", headers=R1,
                           json={"label": "4", "note": note}).status_code == 200
    rows = list(csv.DictReader(io.StringIO(client.get("/v1/reviews/export?format=csv", headers=R1)
                                           .get_data(as_text=True))))
    assert [r["client_case_id"] for r in rows] == ["'" + h for h in hostile]
    assert [r["note"] for r in rows] == ["'=1+1", "plain", "'-x", "'@me"]
    assert not any(cell.startswith(tuple("=+-@\t\r")) for r in rows for k, cell in r.items() if k[:1] != "x")
    assert review_api._safe_cell("-0.25") == "-0.25" and review_api._safe_cell("-1e-3") == "-1e-3"


@pytest.mark.parametrize(("body", "field"), [
    ({"label": "4", "note": "bad \ud800 note"}, "note"),
    ({"label": "4", "note": "nul\x00"}, "note"),
    ({"label": "4\x00"}, "label"),
    ({"label": "\ud800"}, "label"),
])
def test_reviewer_text_is_checked_at_the_boundary(client: Any, body: dict[str, Any], field: str) -> None:
    [res] = _predict(client, [_digit(0)])
    assert client.post("/v1/reviews/claim", headers=R1).json["item"]["id"] == res["review_id"]
    r = client.post(f"/v1/reviews/{res['review_id']}/decision", headers=R1, data=json.dumps(body),
                    content_type="application/json")
    assert r.status_code == 400 and r.json["error"]["field"] == field, r.json
    r = client.post("/v1/reviews/claim", headers=R1, data=json.dumps({"skip": ["ok", "\ud800"]}),
                    content_type="application/json")
    assert r.status_code == 400 and r.json["error"]["field"] == "skip[1]"
    assert client.get("/v1/reviews?after=%00", headers=R1).json["error"]["field"] == "after"


# -- issue 20: where the API document and the code disagreed --------------------------------------


@pytest.mark.parametrize("query", ["/v1/reviews?status=", "/v1/reviews?limit=", "/v1/reviews?kind=",
                                   "/v1/reviews?after=", "/v1/reviews/export?format=&limit=1",
                                   "/v1/reviews/export?limit="])
def test_an_empty_query_value_is_refused_naming_it(client: Any, query: str) -> None:
    """The document's enums and integers allow no empty value (allowEmptyValue: false)."""
    r = client.get(query, headers=R1)
    assert r.status_code == 400, r.json
    assert r.json["error"]["field"] == query.split("?")[1].split("=")[0]


def test_options_on_claim_advertises_only_what_the_document_lists(client: Any) -> None:
    r = client.open("/v1/reviews/claim", method="OPTIONS")
    allowed = {m.strip() for m in r.headers["Allow"].split(",")}
    assert "GET" not in allowed and "POST" in allowed
    for word in ("summary", "export"):
        allowed = {m.strip() for m in client.open(f"/v1/reviews/{word}", method="OPTIONS").headers["Allow"].split(",")}
        assert "POST" not in allowed and "GET" in allowed


def test_an_empty_decision_is_refused_and_the_document_says_so(app: Any, client: Any) -> None:
    [rid] = [r["review_id"] for r in _predict(client, [_digit(5)], ["d-1"])]
    client.post("/v1/reviews/claim", headers=R1)
    r = client.post(f"/v1/reviews/{rid}/decision", json={}, headers=R1)
    assert r.status_code == 400 and r.json["error"]["field"] == "label"
    served = client.get("/openapi.json").get_json()["components"]["schemas"]["ReviewDecision"]
    assert served["required"] == ["label"]  # the document forbids {} too
    r = client.post(f"/v1/reviews/{rid}/decision", json={"label": "3", "note": None}, headers=R1)
    assert r.status_code == 200, r.json  # a null note is no note, as the document says


def test_case_ids_null_is_no_ids_and_another_length_is_refused(client: Any) -> None:
    r = client.post("/v1/predict", json={"cases": [_digit(1)], "case_ids": None}, headers=SORTER)
    assert r.status_code == 200 and r.json["results"][0]["case_id"] is None
    r = client.post("/v1/predict", json={"cases": [_digit(1)], "case_ids": ["a", "b"]}, headers=SORTER)
    assert r.status_code == 400 and r.json["error"]["field"] == "case_ids"
    described = client.get("/openapi.json").get_json()["components"]["schemas"]["PredictRequest"]
    assert "exactly one entry per case" in described["properties"]["case_ids"]["description"]


def test_a_reused_case_id_with_other_inputs_is_queued_and_the_answer_says_so(app: Any, client: Any) -> None:
    [first] = _predict(client, [_digit(1)], ["reuse-1"])
    [second] = _predict(client, [_digit(2)], ["reuse-1"])
    [third] = _predict(client, [_digit(1)], ["reuse-1"])
    assert second["review_id"] != first["review_id"]
    assert second["review"] == {"queued": True, "case_id_reused": True, "reason": second["review"]["reason"]}
    assert third["review_id"] == first["review_id"]  # same id, same inputs: the same item
    assert _router(app).store.get(second["review_id"]).case["values"] == _digit(2)
