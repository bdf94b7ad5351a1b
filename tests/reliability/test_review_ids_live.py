"""Issue 20, finding 1, end to end: case id ``out-1`` is queued (id A); the same request while
PostgreSQL is cut answers ``pending_review_id`` B; after the replay ``GET /v1/reviews/B``
answers, with the stored item A, and the queue holds the case once.

A real ``demur serve`` on 127.0.0.1 whose review store is the real PostgreSQL behind a TCP
proxy the test cuts (tests/reliability/harness.py). The router-level variant on SQLite and
PostgreSQL is tests/serve/review/test_ids.py. Bounded: a deadline on every wait.
"""

from __future__ import annotations

import secrets
import time
from pathlib import Path

import pytest
import requests

from .conftest import TOKENS
from .harness import Server, TcpProxy, digit_body

REVIEW = {"Authorization": f"Bearer {TOKENS['review']}"}


@pytest.mark.postgres
def test_a_pending_id_given_during_a_cut_resolves_after_the_replay(rel_bundles: dict[str, Path],
                                                                   tmp_path: Path) -> None:
    import psycopg

    try:
        conn = psycopg.connect("postgresql://postgres@127.0.0.1:5432/test", connect_timeout=3, autocommit=True)
    except psycopg.OperationalError as exc:
        pytest.skip(f"NO POSTGRESQL on 127.0.0.1:5432 ({exc}); this test cannot run")
    schema = f"ids_{secrets.token_hex(4)}"
    proxy = TcpProxy(("127.0.0.1", 5432))
    url = f"postgresql://postgres@127.0.0.1:{proxy.port}/test?schema={schema}"
    env = {"DEMUR_DATA_DIR": str(tmp_path / "data"), "DEMUR_REVIEW_TOKENS": TOKENS["review"],
           "DEMUR_SPOOL_REPLAY_S": "0.5", "DEMUR_AUDIT_FRACTION": "0"}
    body = {**digit_body(7), "case_ids": ["out-1"]}
    try:
        with Server(rel_bundles["current"], tmp_path / "server.log", workers=1, threads=4, env=env,
                    args=["--review-store", url, "--threshold", "-1"]) as server:
            first = requests.post(server.url + "/v1/predict", json=body, timeout=30).json()["results"][0]
            stored = first["review_id"]
            proxy.cut()
            second = requests.post(server.url + "/v1/predict", json=body, timeout=60).json()["results"][0]
            assert second["review"]["spooled"] is True, second
            pending = second["review"]["pending_review_id"]
            assert pending != stored
            proxy.restore()
            deadline = time.monotonic() + 90
            answer = None
            while time.monotonic() < deadline:
                r = requests.get(f"{server.url}/v1/reviews/{pending}", headers=REVIEW, timeout=10)
                if r.status_code == 200:
                    answer = r.json()["item"]
                    break
                time.sleep(0.5)
            assert answer is not None, "the pending review id never resolved"
            assert answer["id"] == stored and answer["client_case_id"] == "out-1"
            counts = requests.get(server.url + "/v1/reviews/summary", headers=REVIEW, timeout=10).json()["counts"]
            assert counts["total"] == 1
    finally:
        proxy.close()
        conn.execute(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE')
        conn.close()
