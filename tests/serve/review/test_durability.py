"""Nothing acknowledged is lost: real ``demur serve`` processes on 127.0.0.1, the real PostgreSQL.

- concurrency: 2 server processes share one PostgreSQL queue; 8 reviewer threads
  drain 500 items through both: every item decided exactly once;
- crash: a server is killed with SIGKILL in the middle of a stream of abstaining
  requests; every review id a client received is in the store afterwards
  (SQLite, the embedded default, and PostgreSQL);
- spool: PostgreSQL is cut (a TCP proxy stops) while abstentions arrive; they are
  answered and spooled; once it is back they appear in the queue exactly once.

Everything abstains because the threshold is -1 (mutual information is >= 0,
Houlsby et al. 2011: it is a KL divergence). Loops are bounded by counts and
deadlines; each test prints the counts it measured.
"""

from __future__ import annotations

import sqlite3
import threading
import time
from collections import Counter
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import psycopg
import pytest
import requests

from tests.serve._review_helpers import PG_URL, Server, TcpProxy, pg_schema, require_postgres, with_schema

pytestmark = [pytest.mark.slow]

REVIEW_TOKENS = [f"desk-token-{k}" for k in range(8)]
ENV = {"DEMUR_REVIEW_TOKENS": ",".join(REVIEW_TOKENS), "DEMUR_SPOOL_REPLAY_S": "0.5",
       "DEMUR_AUDIT_FRACTION": "0"}
SERVE_FLAGS = ["--threshold", "-1", "--workers", "1", "--threads", "4"]


def _case(i: int) -> list[float]:
    return [float((i * 5 + j) % 17) for j in range(64)]


@pytest.fixture()
def bundle_path(tiny_bundle_factory: Callable[..., Any]) -> Path:
    return Path(tiny_bundle_factory(task="classification", kind="stacked", draws=8).path)


@pytest.fixture()
def servers() -> Iterator[list[Server]]:
    """Collects started servers and always stops them."""
    started: list[Server] = []
    yield started
    for s in started:
        s.stop()


def _pg_ids(schema: str) -> Counter[str]:
    with psycopg.connect(PG_URL, connect_timeout=5) as conn:
        rows = conn.execute(f'SELECT id FROM "{schema}".demur_review_items').fetchall()
    return Counter(r[0] for r in rows)


@pytest.mark.postgres
def test_two_servers_eight_reviewers_500_items_each_decided_exactly_once(
        bundle_path: Path, tmp_path: Path, servers: list[Server]) -> None:
    require_postgres()
    with pg_schema() as schema:
        url = with_schema(PG_URL, schema)
        for k in range(2):
            data = tmp_path / f"server-{k}"
            data.mkdir()
            servers.append(Server(bundle_path, data_dir=data, review_store=url, env=ENV, extra=SERVE_FLAGS))
        for s in servers:
            s.wait_ready()
        session = requests.Session()
        received: list[str] = []
        for b in range(50):  # 50 requests of 10 cases, alternating servers
            cases = [_case(b * 10 + i) for i in range(10)]
            ids = [f"parcel-{b * 10 + i:04d}" for i in range(10)]
            r = session.post(f"{servers[b % 2].url}/v1/predict", json={"cases": cases, "case_ids": ids}, timeout=30)
            assert r.status_code == 200, r.text
            received += [res["review_id"] for res in r.json()["results"]]
        assert len(set(received)) == 500

        decided: list[list[str]] = [[] for _ in range(8)]
        conflicts = [0] * 8
        errors: list[str] = []

        def reviewer(k: int) -> None:
            s = requests.Session()
            headers = {"Authorization": f"Bearer {REVIEW_TOKENS[k]}"}
            for n in range(600):  # bounded: more than enough for 500 items over 8 threads
                base = servers[(k + n) % 2].url
                try:
                    r = s.post(f"{base}/v1/reviews/claim", headers=headers, timeout=30)
                    if r.status_code != 200:
                        errors.append(f"claim {r.status_code}: {r.text[:200]}")
                        return
                    item = r.json()["item"]
                    if item is None:
                        return
                    label = str(len(item["id"]) % 10)
                    base = servers[(k + n + 1) % 2].url  # decide through the other server
                    r = s.post(f"{base}/v1/reviews/{item['id']}/decision", headers=headers,
                               json={"label": label}, timeout=30)
                    if r.status_code == 409:
                        conflicts[k] += 1
                    elif r.status_code != 200:
                        errors.append(f"decide {r.status_code}: {r.text[:200]}")
                        return
                    else:
                        decided[k].append(item["id"])
                except requests.RequestException as exc:
                    errors.append(repr(exc))
                    return

        threads = [threading.Thread(target=reviewer, args=(k,)) for k in range(8)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(timeout=300)
        per_item = Counter(i for d in decided for i in d)
        print(f"\n[concurrency] items enqueued={len(received)} decided={sum(per_item.values())} "
              f"distinct={len(per_item)} decided-twice={sum(1 for v in per_item.values() if v > 1)} "
              f"lost={len(set(received) - set(per_item))} conflicts={sum(conflicts)} "
              f"per-reviewer={[len(d) for d in decided]}")
        assert not errors, errors[:3]
        assert set(per_item) == set(received) and max(per_item.values()) == 1
        assert sum(conflicts) == 0
        with psycopg.connect(PG_URL) as conn:
            status, claims, n = conn.execute(
                f'SELECT MIN(status), MAX(claims), COUNT(*) FROM "{schema}".demur_review_items').fetchone()
        assert (status, claims, n) == ("decided", 1, 500), "no item was claimed twice"


def _stream_until_killed(server: Server, *, clients: int, kill_after: int) -> tuple[list[str], int]:
    """Clients send 1-case abstaining requests; the server is SIGKILLed after ``kill_after``
    answers. Returns (review ids received, requests that failed)."""
    received: list[str] = []
    failed = [0]
    lock = threading.Lock()
    stop = threading.Event()

    def client(k: int) -> None:
        s = requests.Session()
        for n in range(2000):  # bounded
            if stop.is_set():
                return
            try:
                r = s.post(f"{server.url}/v1/predict", json={"cases": [_case(k * 10_000 + n)]}, timeout=10)
            except requests.RequestException:
                with lock:
                    failed[0] += 1
                if stop.is_set():
                    return
                continue
            if r.status_code == 200:
                rid = r.json()["results"][0].get("review_id")
                assert rid, r.text
                with lock:
                    received.append(rid)
            else:
                with lock:
                    failed[0] += 1

    threads = [threading.Thread(target=client, args=(k,)) for k in range(clients)]
    for t in threads:
        t.start()
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        with lock:
            if len(received) >= kill_after:
                break
        time.sleep(0.01)
    server.kill()  # mid-stream: requests are in flight
    stop.set()
    for t in threads:
        t.join(timeout=30)
    return received, failed[0]


@pytest.mark.parametrize("backend", ["sqlite", pytest.param("postgres", marks=pytest.mark.postgres)])
def test_sigkill_mid_stream_loses_no_received_review_id(bundle_path: Path, tmp_path: Path,
                                                       servers: list[Server], backend: str) -> None:
    if backend == "postgres":
        require_postgres()
    with pg_schema() if backend == "postgres" else _no_schema() as schema:
        url = with_schema(PG_URL, schema) if schema else f"sqlite:///{tmp_path / 'reviews.sqlite3'}"
        server = Server(bundle_path, data_dir=tmp_path, review_store=url, env=ENV, extra=SERVE_FLAGS)
        servers.append(server)
        server.wait_ready()
        received, failed = _stream_until_killed(server, clients=4, kill_after=150)
        if schema:
            found = _pg_ids(schema)
        else:
            conn = sqlite3.connect(tmp_path / "reviews.sqlite3")
            found = Counter(r[0] for r in conn.execute("SELECT id FROM demur_review_items"))
            conn.close()
        missing = set(received) - set(found)
        print(f"\n[crash/{backend}] review ids received={len(received)} found={len(set(received) & set(found))} "
              f"missing={len(missing)} rows in store={sum(found.values())} failed requests={failed}")
        assert len(received) >= 150
        assert not missing
        assert max(found.values()) == 1


class _no_schema:
    def __enter__(self) -> None:
        return None

    def __exit__(self, *exc: Any) -> None:
        return None


@pytest.mark.postgres
def test_postgres_cut_abstentions_are_answered_spooled_and_replayed_once(
        bundle_path: Path, tmp_path: Path, servers: list[Server]) -> None:
    require_postgres()
    proxy = TcpProxy(("127.0.0.1", 5432))
    proxy.start()
    try:
        with pg_schema() as schema:
            via_proxy = with_schema(f"postgresql://postgres@127.0.0.1:{proxy.port}/test", schema)
            server = Server(bundle_path, data_dir=tmp_path, review_store=via_proxy, env=ENV, extra=SERVE_FLAGS)
            servers.append(server)
            server.wait_ready()
            s = requests.Session()

            def predict(i: int) -> dict[str, Any]:
                r = s.post(f"{server.url}/v1/predict",
                           json={"cases": [_case(i)], "case_ids": [f"parcel-{i:03d}"]}, timeout=30)
                assert r.status_code == 200, r.text
                return r.json()["results"][0]

            before = [predict(i)["review_id"] for i in range(5)]
            proxy.stop()  # PostgreSQL is gone
            during = [predict(i) for i in range(5, 25)]
            retried = predict(5)  # a client retries one case while the store is down
            spooled = [d["review"] for d in during + [retried]]
            assert all(r["queued"] is False and r["spooled"] is True for r in spooled)
            assert all("review_id" not in d for d in during)
            proxy.start()  # PostgreSQL is back
            pending = {r["pending_review_id"] for r in spooled[:-1]}
            deadline = time.monotonic() + 90
            found: Counter[str] = Counter()
            while time.monotonic() < deadline:
                found = _pg_ids(schema)
                if pending <= set(found):
                    break
                time.sleep(0.5)
            time.sleep(1.5)  # let any duplicate replay show up before counting
            found = _pg_ids(schema)
            print(f"\n[spool] queued before cut={len(before)} answered during cut={len(during) + 1} "
                  f"(spooled={len(spooled)}, one a retry) rows after return={sum(found.values())} "
                  f"missing={len(pending - set(found))}")
            assert set(before) | pending == set(found), "every case once; the retry folded into its first item"
            assert max(found.values()) == 1 and sum(found.values()) == 25
            after = predict(100)
            assert "review_id" in after  # the request path uses the store again
            summary = s.get(f"{server.url}/v1/reviews/summary",
                            headers={"Authorization": f"Bearer {REVIEW_TOKENS[0]}"}, timeout=30).json()
            assert summary["counts"]["total"] == 26
    finally:
        proxy.stop()
