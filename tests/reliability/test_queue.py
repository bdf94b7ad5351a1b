"""The review queue under hostile traffic, against a real ``demur serve`` (2 workers) on 127.0.0.1:

- queue flood: requests of many random cases, far past the pending ceiling; every
  prediction is still answered, the queue stops at the ceiling (within one refresh
  of each worker's count) and the abstentions beyond it say "not queued: backlog full";
- label bound: 2,000 requests with random methods and random paths; the number of
  label sets of ``demur_http_requests_total`` stays bounded by the fixed method set
  times the app's route templates;
- poisoned spool: spool entries the store can never hold (a lone surrogate, a NUL)
  sit first in the oldest-first spool, a hostile predict request carries a lone
  surrogate; the spool still drains to zero, every good abstention reaches the
  store and the poisoned ones are set aside in the dead-letter table.

References: Prometheus' instrumentation practices ("do not use labels to store
dimensions with high cardinality", prometheus.io/docs/practices/naming) for the
label bound; RFC 9110 section 9 (methods: any token is a syntactically valid
method, so a server meets arbitrary ones); Unicode 15, section 3.9 D76 (a lone
surrogate is not a Unicode scalar value, so it has no UTF-8 form) and PostgreSQL's
documentation (the text type cannot hold the NUL character) for the poisoned items.
"""

from __future__ import annotations

import contextlib
import http.client
import json
import random
import re
import string
import time
from pathlib import Path
from typing import Any

import pytest
import requests

from demur.serve.review.router import SPOOL_FILE
from demur.serve.review.spool import Spool
from demur.serve.review.store import open_store
from tests.serve._review_helpers import PG_URL, item, pg_schema, pg_unreachable_reason, with_schema

from .conftest import TOKENS
from .harness import Server, record, run_load

REVIEW = {"Authorization": f"Bearer {TOKENS['review']}"}


def _env(tmp_path: Path, **extra: str) -> dict[str, str]:
    return {"DEMUR_DATA_DIR": str(tmp_path / "data"), "DEMUR_REVIEW_TOKENS": TOKENS["review"],
            "DEMUR_AUDIT_FRACTION": "0", **extra}


def _counts(url: str) -> dict[str, int]:
    return requests.get(url + "/v1/reviews/summary", headers=REVIEW, timeout=10).json()["counts"]


# -- queue flood -------------------------------------------------------------------------------
def test_queue_flood_holds_the_ceiling(tmp_path: Path, tiny_bundle_factory: Any) -> None:
    ceiling, n_requests, per_request = 1500, 24, 256
    # threshold 0: every case abstains, the flood of the report (20,419 items queued in 19 s)
    env = _env(tmp_path, DEMUR_REVIEW_MAX_PENDING=str(ceiling), DEMUR_THRESHOLD="0")

    def body(i: int) -> dict[str, Any]:
        rng = random.Random(i)
        return {"cases": [[rng.randint(0, 16) for _ in range(64)] for _ in range(per_request)]}

    with Server(Path(tiny_bundle_factory().path), tmp_path / "server.log", env=env) as server:
        result = run_load(server.url + "/v1/predict", n_requests, 2, make_body=body, keep_bodies=True)
        counts = _counts(server.url)
    abstained = sum(r["decision"] == "abstain" for b in result.bodies for r in b["results"])
    full = sum(1 for b in result.bodies for r in b["results"]
               if (r.get("review") or {}).get("reason") == "not queued: backlog full")
    slack = 2 * per_request  # each worker's count may be one batch behind the other's writes
    record("queue flood (ceiling 1,500)", requests=result.sent, errors=result.errors,
           p50_ms=result.percentile_ms(50), p99_ms=result.percentile_ms(99), faults=n_requests * per_request,
           note=f"pending {counts['pending']} of {abstained} abstained; {full} 'backlog full'")
    assert result.errors == 0, result.problems[:5]
    assert counts["pending"] <= ceiling + slack, counts
    assert full >= abstained - ceiling - slack > 0


# -- metric labels -----------------------------------------------------------------------------
KNOWN_ELSEWHERE = ["GET", "POST", "PUT", "DELETE", "PATCH", "OPTIONS", "TRACE", "PROPFIND", "PROPPATCH",
                   "MKCOL", "COPY", "MOVE", "LOCK", "UNLOCK", "SEARCH", "PURGE", "REPORT", "MKACTIVITY",
                   "CHECKOUT", "MERGE", "NOTIFY", "SUBSCRIBE", "UNSUBSCRIBE", "LINK", "UNLINK", "BIND", "ACL"]
"""Registered methods (IANA HTTP Method Registry, RFC 4918 WebDAV and others) an HTTP parser
passes on, so they reach the app; random tokens test the rest."""


def _random_requests(url: str, n: int, seed: int = 7) -> dict[int, int]:
    rng = random.Random(seed)
    port = int(url.rsplit(":", 1)[1])
    statuses: dict[int, int] = {}
    token = string.ascii_uppercase + string.digits + "!#$%&'*+-.^_`|~"  # RFC 9110 tchar, minus lowercase
    for i in range(n):
        method = ("".join(rng.choice(token) for _ in range(rng.randint(1, 12))) if i % 2
                  else rng.choice(KNOWN_ELSEWHERE))
        path = "/" + "/".join("".join(rng.choice(string.ascii_letters + string.digits) for _ in range(6))
                              for _ in range(rng.randint(1, 3)))
        if i % 3 == 0:
            path = f"/v1/reviews/r-{rng.getrandbits(64):016x}"
        conn = http.client.HTTPConnection("127.0.0.1", port, timeout=10)
        try:
            conn.request(method, path, headers={"Content-Length": "0"})
            status = conn.getresponse().status
        except (OSError, http.client.HTTPException):
            status = 0
        finally:
            conn.close()
        statuses[status] = statuses.get(status, 0) + 1
    return statuses


def test_random_methods_and_paths_keep_labels_bounded(tmp_path: Path, tiny_bundle_factory: Any) -> None:
    n = 2000
    with Server(Path(tiny_bundle_factory().path), tmp_path / "server.log", env=_env(tmp_path)) as server:
        statuses = _random_requests(server.url, n)
        text = requests.get(server.url + "/metrics", timeout=10).text
    series = [line for line in text.splitlines() if line.startswith("demur_http_requests_total{")]
    methods = {m.group(1) for line in series if (m := re.search(r'method="([^"]*)"', line))}
    routes = {m.group(1) for line in series if (m := re.search(r'route="([^"]*)"', line))}
    record("2,000 random methods and paths", requests=n, errors=statuses.get(0, 0) + sum(
        v for k, v in statuses.items() if k >= 500), faults=n,
        note=f"{len(series)} series, {len(methods)} methods, {len(routes)} routes")
    assert statuses.get(0, 0) == 0 and not any(k >= 500 for k in statuses), statuses
    assert methods <= {"GET", "HEAD", "POST", "PUT", "DELETE", "PATCH", "OPTIONS", "other"}, sorted(methods)[:20]
    assert len(series) <= 200, len(series)


def _post_raw(url: str, bodies: list[Any]) -> list[int]:
    """POST each body as JSON with \\u escapes (a lone surrogate survives the encoding); the statuses."""
    port = int(url.rsplit(":", 1)[1])
    out = []
    for body in bodies:
        conn = http.client.HTTPConnection("127.0.0.1", port, timeout=15)
        try:
            conn.request("POST", "/v1/predict", body=json.dumps(body).encode("ascii"),
                         headers={"Content-Type": "application/json"})
            resp = conn.getresponse()
            resp.read()
            out.append(resp.status)
        finally:
            conn.close()
    return out


# -- a poisoned spool --------------------------------------------------------------------------
POISON = ["\ud800x", "nul\x00here"]


@pytest.mark.parametrize("backend", ["sqlite", "postgresql"])
def test_poisoned_spool_drains(backend: str, tmp_path: Path, tiny_bundle_factory: Any) -> None:
    if backend == "postgresql" and pg_unreachable_reason() is not None:
        pytest.skip(f"PostgreSQL at {PG_URL} is not reachable: {pg_unreachable_reason()}")
    with pg_schema("demur_rel") if backend == "postgresql" else contextlib.nullcontext("") as schema:
        url = (with_schema(PG_URL, schema) if backend == "postgresql"
               else f"sqlite:///{tmp_path / 'data' / 'reviews.sqlite3'}")
        spool = Spool(tmp_path / "data" / SPOOL_FILE)
        poisoned = [item(client_case_id=cid) for cid in POISON]
        good = [item(client_case_id=f"spooled-{i}") for i in range(5)]
        spool.put(poisoned + good)  # the poisoned ones first: oldest-first replay meets them first
        env = _env(tmp_path, DEMUR_REVIEW_STORE=url, DEMUR_SPOOL_REPLAY_S="0.2")
        with Server(Path(tiny_bundle_factory().path), tmp_path / "server.log", env=env) as server:
            hostile = _post_raw(server.url, [
                {"cases": [[16] * 64, [0] * 64], "case_ids": ["fine-" + str(i), POISON[i % 2] + str(i)]}
                for i in range(4)])
            deadline = time.monotonic() + 20.0
            while spool.size() and time.monotonic() < deadline:
                time.sleep(0.2)
            left = spool.size()
            store = open_store(url, lease_s=60)
            try:
                stored = {it.client_case_id for it in store.page(limit=500)}
                rejected = store.rejected_count() if hasattr(store, "rejected_count") else 0
            finally:
                store.close()
            log = server.log()
    lost = sum(1 for it in good if it.client_case_id not in stored)
    record(f"poisoned spool item ({backend})", requests=len(hostile), errors=sum(s >= 500 for s in hostile),
           faults=len(POISON) + len(hostile), lost=lost,
           note=f"spool left {left}; hostile answers {sorted(hostile)}; set aside {rejected}")
    assert "Traceback" not in log, log[-3000:]
    assert set(hostile) <= {400}, hostile
    assert left == 0 and lost == 0
    assert rejected == len(POISON)
