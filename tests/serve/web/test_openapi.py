"""serve/web/openapi.json: a valid OpenAPI 3.1 document that matches the live routes.

References: the OpenAPI Specification 3.1.0 (paths, operations, components; its
schemas are JSON Schema 2020-12, checked with jsonschema's Draft202012Validator.check_schema).

Rule for everyone adding routes: every route the app serves must be listed in
serve/web/openapi.json with its methods; a path served only when a component is
configured carries ``"x-demur-component": "<name>"`` on its path item.
"""

from __future__ import annotations

import json
import re
from typing import Any

import numpy as np
import pytest

from jsonschema import Draft202012Validator

from demur.serve.web.app import OPENAPI_PATH

DOC = json.loads(OPENAPI_PATH.read_text())
HTTP_METHODS = {"get", "put", "post", "delete", "options", "head", "patch", "trace"}


def _live_routes(app: Any) -> set[tuple[str, str]]:
    out = set()
    for rule in app.url_map.iter_rules():
        if rule.endpoint == "static":
            continue
        path = re.sub(r"<(?:[^:<>]+:)?([^<>]+)>", r"{\1}", rule.rule)
        for method in rule.methods - {"HEAD", "OPTIONS"}:
            out.add((path, method.lower()))
    return out


def _documented() -> set[tuple[str, str]]:
    return {(path, m) for path, item in DOC["paths"].items() for m in item if m in HTTP_METHODS}


def test_document_is_openapi_3_1() -> None:
    assert DOC["openapi"].startswith("3.1.")
    assert {"title", "version"} <= set(DOC["info"])
    for name, schema in DOC["components"]["schemas"].items():
        Draft202012Validator.check_schema(schema)
    for path, item in DOC["paths"].items():
        assert path.startswith("/")
        for method, op in item.items():
            if method in HTTP_METHODS:
                assert op["responses"], f"{method.upper()} {path} documents no response"
                assert op.get("operationId"), f"{method.upper()} {path} has no operationId"
    ids = [op["operationId"] for item in DOC["paths"].values() for m, op in item.items() if m in HTTP_METHODS]
    assert len(ids) == len(set(ids)), "operationIds must be unique (OpenAPI 3.1, 4.8.10)"


def test_refs_resolve() -> None:
    text = OPENAPI_PATH.read_text()
    for ref in set(re.findall(r'"\$ref": "#/components/schemas/([^"]+)"', text)):
        assert ref in DOC["components"]["schemas"], ref


def test_live_routes_match_the_document(app: Any) -> None:
    live = _live_routes(app)
    documented = _documented()
    assert live - documented == set(), f"routes served but not in serve/web/openapi.json: {sorted(live - documented)}"
    core = {(p, m) for p, m in documented if "x-demur-component" not in DOC["paths"][p]}
    assert core - live == set(), f"documented core routes the app does not serve: {sorted(core - live)}"


def test_contract_routes_present() -> None:
    """Issue 3's contract routes."""
    documented = _documented()
    for route in [("/v1/predict", "post"), ("/v1/model", "get"), ("/healthz", "get"), ("/readyz", "get"),
                  ("/openapi.json", "get")]:
        assert route in documented


def test_served_document_is_the_file_bound_to_the_live_model(client: Any) -> None:
    """Only the places marked x-demur-bound differ (serve/web/apidoc.py)."""
    r = client.get("/openapi.json")
    assert r.status_code == 200 and r.mimetype == "application/json"
    served = r.get_json()
    bound = ("Case", "ReviewDecision", "PredictRequest")
    assert {k: v for k, v in served["components"]["schemas"].items() if k not in bound} == {
        k: v for k, v in DOC["components"]["schemas"].items() if k not in bound}
    assert served["paths"] == DOC["paths"]
    assert served["components"]["schemas"]["PredictRequest"]["properties"]["cases"]["maxItems"] >= 1
    assert served["components"]["schemas"]["ReviewDecision"]["required"] == ["label"]
    assert len(served["components"]["schemas"]["ReviewDecision"]["properties"]["label"]["enum"]) == 10


def _validator(document: dict[str, Any], name: str) -> Draft202012Validator:
    """A validator for one component schema of ``document``, its $refs resolved in it."""
    from referencing import Registry, Resource

    registry = Registry().with_resource("urn:demur", Resource.opaque(document))
    schema = {"$ref": f"urn:demur#/components/schemas/{name}"}
    return Draft202012Validator(schema, registry=registry)


@pytest.mark.parametrize("which", ["flat", "conv"])
def test_the_bound_case_schema_allows_exactly_what_the_server_accepts(
        which: str, client: Any, image_client: Any) -> None:
    """The served document is the contract: each body it allows gets 200, each it forbids a 4xx.
    Bodies from issue 20's findings plus each accepted form (jsonschema's Draft 2020-12 validator)."""
    c = client if which == "flat" else image_client
    doc = c.get("/openapi.json").get_json()
    check = _validator(doc, "PredictRequest")
    names = [f"px_r{r}c{col}" for r in range(8) for col in range(8)]
    grid = [[float(r + col) for col in range(8)] for r in range(8)]
    bodies = [
        {"cases": [[1.0] * 64]}, {"cases": [grid]}, {"cases": [[grid]]}, {"cases": [dict.fromkeys(names, 2.0)]},
        {"cases": [[1.0] * 64], "case_ids": None}, {"cases": [[1.0] * 64], "case_ids": ["parcel-1"]},
        {"cases": [[None]]}, {"cases": [[1.0] * 63]}, {"cases": [[True] * 64]}, {"cases": [["1"] * 64]},
        {"cases": [[1e39] * 64]}, {"cases": [dict.fromkeys(names[:-1], 2.0)]},
        {"cases": [{**dict.fromkeys(names, 2.0), "extra": 1.0}]}, {"cases": []}, {"cases": [[1.0] * 64], "x": 1},
        {"cases": [[1.0] * 64], "case_ids": ["a\x00b"]}, {"cases": [[1.0] * 64], "case_ids": [""]},
    ]
    for body in bodies:
        allowed = check.is_valid(body)
        status = c.post("/v1/predict", json=body).status_code
        assert (status == 200) == allowed, (body if len(str(body)) < 300 else str(body)[:300], allowed, status)
        assert status < 500


@pytest.mark.parametrize("value, allowed", [
    # float32's largest value, (2 - 2**-23) * 2**127 (IEEE 754 binary32; numpy.finfo(np.float32).max),
    # as float32 prints it and as float64 holds it; then the next float64 up, which still rounds to it
    (3.4028235e38, True), (float(np.finfo(np.float32).max), True), (3.402823466385289e+38, True),
    # the halfway point to the next power of two, 2**128 - 2**103, rounds to infinity (round half to even)
    (2.0 ** 128 - 2.0 ** 103, False), (1e39, False),
])
@pytest.mark.parametrize("sign", [1.0, -1.0])
def test_case_number_bound_is_the_float32_rounding_bound(value: float, allowed: bool, sign: float,
                                                         client: Any) -> None:
    """The schema fuzz found 3.402823466385289e+38 accepted by the server but outside the document's
    'maximum' (float32's largest value): the document's bound is validation's F32_LIMIT, exclusive."""
    with np.errstate(over="ignore"):
        assert bool(np.isfinite(np.float32(sign * value))) == allowed  # numpy's float64 -> float32 rounding
    doc = client.get("/openapi.json").get_json()
    body = {"cases": [[sign * value] + [1.0] * 63]}
    assert _validator(doc, "PredictRequest").is_valid(body) == allowed
    status = client.post("/v1/predict", json=body).status_code
    assert (status < 400 or status == 422) if allowed else status == 400, status
