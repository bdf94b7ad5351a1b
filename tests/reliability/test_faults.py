"""Faults under load, against a real ``demur serve`` (2 gunicorn workers) on 127.0.0.1:

- bundle swaps under load: zero failed requests; answers name v1 then v2;
- a corrupt bundle swap under load: refused (checksum_mismatch), the old model serves on;
- a worker killed (SIGKILL) under load: the master replaces it; clients see at most
  the requests on that worker's connections fail once, and retried they succeed;
- the PostgreSQL connection cut and restored (a TCP proxy between server and
  database): predictions keep flowing, abstentions spool and replay, none lost.

References: the bundle's seal/digests (hashlib.sha256, FIPS 180-4) define a
corrupt bundle; "at most the in-flight failures" bounds retried requests by the
number of client connections (each client holds one keep-alive connection);
PostgreSQL is the real server on 127.0.0.1:5432 (database ``test``).
"""

from __future__ import annotations

import os
import secrets
import signal
import threading
import time
from pathlib import Path
from typing import Any

import pytest
import requests

from .conftest import TOKENS
from .harness import Server, TcpProxy, digit_body, record, run_load, worker_pids

ADMIN = {"Authorization": f"Bearer {TOKENS['admin']}"}
PG = ("127.0.0.1", 5432)


def _server(rel_bundles: dict[str, Path], tmp_path: Path, **kw: Any) -> Server:
    env = {"DEMUR_DATA_DIR": str(tmp_path / "data"), "DEMUR_BUNDLES_DIR": str(rel_bundles["root"]),
           "DEMUR_ADMIN_TOKENS": TOKENS["admin"], "DEMUR_REVIEW_TOKENS": TOKENS["review"],
           **kw.pop("env", {})}
    return Server(rel_bundles["current"], tmp_path / "server.log", env=env, **kw)


class _Progress:
    """Counts answered requests so the main thread can inject a fault at a given point."""

    def __init__(self) -> None:
        self.done = 0
        self._cv = threading.Condition()

    def tick(self, _i: int) -> None:
        with self._cv:
            self.done += 1
            self._cv.notify_all()

    def wait_for(self, n: int, timeout_s: float = 120.0) -> None:
        with self._cv:
            assert self._cv.wait_for(lambda: self.done >= n, timeout_s), f"load stalled at {self.done} < {n}"


def _in_background(fn: Any) -> tuple[threading.Thread, dict[str, Any]]:
    box: dict[str, Any] = {}

    def run() -> None:
        try:
            box["result"] = fn()
        except BaseException as exc:  # surfaced by the test
            box["error"] = exc

    t = threading.Thread(target=run, daemon=True)
    t.start()
    return t, box


def _join(t: threading.Thread, box: dict[str, Any], timeout_s: float = 300.0) -> Any:
    t.join(timeout_s)
    assert not t.is_alive(), "load did not finish in time"
    if "error" in box:
        raise box["error"]
    return box["result"]


def _versions_served(url: str, n: int = 20) -> set[str]:
    seen = set()
    for _ in range(n):
        r = requests.get(url + "/readyz", timeout=5)
        seen.add(r.json()["model"]["version"])
    return seen


def _wait_all_workers_on(url: str, version: str, timeout_s: float = 60.0) -> set[str]:
    deadline = time.monotonic() + timeout_s
    seen = _versions_served(url)
    while seen != {version} and time.monotonic() < deadline:
        time.sleep(0.2)
        seen = _versions_served(url)
    return seen


# -- bundle swaps ------------------------------------------------------------------------------
def _swap_under_load(rel_bundles: dict[str, Path], tmp_path: Path, n: int, swaps: int, name: str) -> None:
    with _server(rel_bundles, tmp_path) as server:
        progress = _Progress()
        t, box = _in_background(lambda: run_load(server.url + "/v1/predict", n, 32, make_body=digit_body,
                                                 on_progress=progress.tick))
        answers = []
        for k in range(swaps):
            progress.wait_for(n * (k + 1) // (swaps + 2))
            target = "v2" if k % 2 == 0 else "v1"
            r = requests.post(server.url + "/v1/admin/model", json={"bundle": target}, headers=ADMIN, timeout=30)
            answers.append((r.status_code, r.json()))
        result = _join(t, box)
        final = "2" if swaps % 2 == 1 else "1"
        served = _wait_all_workers_on(server.url, final)
    record(name, requests=result.sent, errors=result.errors, p50_ms=result.percentile_ms(50),
           p99_ms=result.percentile_ms(99), faults=swaps,
           note=f"answers by version {dict(sorted(result.versions.items()))}")
    assert all(status == 200 for status, _ in answers), answers
    assert result.errors == 0, result.problems[:5]
    assert result.statuses == {200: n}
    assert set(result.versions) == {"1", "2"}  # every answer names its model; both served
    assert served == {final}


def test_bundle_swap_under_load(rel_bundles: dict[str, Path], tmp_path: Path) -> None:
    _swap_under_load(rel_bundles, tmp_path, 2_000, 3, "bundle swap under load")


@pytest.mark.long
def test_bundle_swap_under_load_long(rel_bundles: dict[str, Path], tmp_path: Path) -> None:
    _swap_under_load(rel_bundles, tmp_path, 20_000, 9, "bundle swap under load (long)")


def test_corrupt_bundle_swap_is_refused_under_load(rel_bundles: dict[str, Path], tmp_path: Path) -> None:
    n = 1_000
    with _server(rel_bundles, tmp_path) as server:
        progress = _Progress()
        t, box = _in_background(lambda: run_load(server.url + "/v1/predict", n, 32, make_body=digit_body,
                                                 on_progress=progress.tick))
        progress.wait_for(n // 3)
        r = requests.post(server.url + "/v1/admin/model", json={"bundle": "corrupt"}, headers=ADMIN, timeout=30)
        result = _join(t, box)
        served = _versions_served(server.url)
    record("corrupt bundle swap under load", requests=result.sent, errors=result.errors,
           p50_ms=result.percentile_ms(50), p99_ms=result.percentile_ms(99), faults=1,
           note=f"refused {r.status_code} {r.json()['error']['code']}")
    assert r.status_code == 422 and r.json()["error"]["code"] == "checksum_mismatch"
    assert result.errors == 0, result.problems[:5]
    assert result.versions == {"1": n} and served == {"1"}


# -- a worker killed ------------------------------------------------------------------------------
def _kill_under_load(rel_bundles: dict[str, Path], tmp_path: Path, n: int, kills: int, name: str) -> None:
    clients = 32
    with _server(rel_bundles, tmp_path) as server:
        assert server.proc is not None
        before = worker_pids(server.proc.pid)
        assert len(before) == 2, before
        progress = _Progress()
        t, box = _in_background(lambda: run_load(server.url + "/v1/predict", n, clients, make_body=digit_body,
                                                 retry=True, on_progress=progress.tick))
        killed = []
        for k in range(kills):
            progress.wait_for(n * (k + 1) // (kills + 2))
            victim = worker_pids(server.proc.pid)[k % 2]
            os.kill(victim, signal.SIGKILL)
            killed.append(victim)
            time.sleep(0.5)
        result = _join(t, box)
        deadline = time.monotonic() + 60
        after = worker_pids(server.proc.pid)
        while (len(after) != 2 or set(after) & set(killed)) and time.monotonic() < deadline:
            time.sleep(0.2)
            after = worker_pids(server.proc.pid)
        server.wait_ready(60)
    record(name, requests=result.sent, errors=result.errors, p50_ms=result.percentile_ms(50),
           p99_ms=result.percentile_ms(99), faults=kills,
           note=f"{result.retried} retried after the kill, all answered")
    assert result.errors == 0, result.problems[:5]
    assert result.statuses == {200: n}
    assert result.retried <= clients * kills  # at most the requests on the killed worker's connections
    assert len(after) == 2 and not set(after) & set(killed), (before, killed, after)


def test_worker_killed_under_load(rel_bundles: dict[str, Path], tmp_path: Path) -> None:
    _kill_under_load(rel_bundles, tmp_path, 2_000, 1, "worker killed under load")


@pytest.mark.long
def test_workers_killed_under_load_long(rel_bundles: dict[str, Path], tmp_path: Path) -> None:
    _kill_under_load(rel_bundles, tmp_path, 20_000, 4, "workers killed under load (long)")


# -- PostgreSQL cut and restored -------------------------------------------------------------------
def _pg() -> Any:
    psycopg = pytest.importorskip("psycopg")
    try:
        return psycopg.connect("postgresql://postgres@127.0.0.1:5432/test", connect_timeout=3, autocommit=True)
    except psycopg.OperationalError as exc:
        pytest.skip(f"NO POSTGRESQL on 127.0.0.1:5432 ({exc}); the review-store fault test cannot run")


def _pg_cut(rel_bundles: dict[str, Path], tmp_path: Path, n: int, cuts: int, name: str) -> None:
    conn = _pg()
    schema = f"h7rel_{secrets.token_hex(4)}"
    proxy = TcpProxy(PG)
    try:
        url = f"postgresql://postgres@127.0.0.1:{proxy.port}/test?schema={schema}"
        # threshold 0: every case with any disagreement between draws abstains
        with _server(rel_bundles, tmp_path, args=["--review-store", url, "--threshold", "0"],
                     env={"DEMUR_SPOOL_REPLAY_S": "0.5", "DEMUR_AUDIT_FRACTION": "0"}) as server:
            progress = _Progress()
            t, box = _in_background(lambda: run_load(server.url + "/v1/predict", n, 8, make_body=digit_body,
                                                     keep_bodies=True, on_progress=progress.tick))
            for k in range(cuts):
                progress.wait_for(n * (2 * k + 1) // (2 * cuts + 1))
                proxy.cut()
                progress.wait_for(n * (2 * k + 2) // (2 * cuts + 1))
                proxy.restore()
            result = _join(t, box)
            ids: dict[str, str] = {}
            spooled = 0
            for body in result.bodies:
                for res in body["results"]:
                    if res["decision"] != "abstain":
                        continue
                    if "review_id" in res:
                        ids[res["review_id"]] = res["case_id"]
                    else:
                        review = res["review"]
                        assert review["queued"] is False and review.get("spooled") is True, review
                        ids[review["pending_review_id"]] = res["case_id"]
                        spooled += 1
            deadline = time.monotonic() + 90
            found: dict[str, int] = {}
            while time.monotonic() < deadline:
                rows = conn.execute(
                    f'SELECT id, client_case_id FROM "{schema}".demur_review_items').fetchall()
                found = {}
                for rid, case_id in rows:
                    found[rid] = found.get(rid, 0) + 1
                # a pending id may be an alias of the item its case was stored as (serve/review/store)
                for alias, rid in conn.execute(f'SELECT alias, id FROM "{schema}".demur_review_aliases').fetchall():
                    found.setdefault(alias, found.get(rid, 0))
                if set(ids) <= set(found):
                    break
                time.sleep(0.5)
            healthy = requests.get(server.url + "/readyz", timeout=5).status_code
        lost = len(set(ids) - set(found))
        record(name, requests=result.sent, errors=result.errors, p50_ms=result.percentile_ms(50),
               p99_ms=result.percentile_ms(99), faults=proxy.cuts, lost=lost,
               note=f"{len(ids)} abstained, {spooled} spooled and replayed")
        assert result.errors == 0, result.problems[:5]
        assert len(ids) > n // 2, "too few abstentions to exercise the queue"
        assert spooled > 0, "the cut never reached the request path"
        assert lost == 0
        assert all(found[rid] == 1 for rid in ids)  # exactly once
        rows = conn.execute(f'SELECT client_case_id, count(*) FROM "{schema}".demur_review_items '
                            "GROUP BY client_case_id HAVING count(*) > 1").fetchall()
        assert rows == []
        assert healthy == 200
    finally:
        proxy.close()
        conn.execute(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE')
        conn.close()


@pytest.mark.postgres
def test_postgres_cut_and_restored(rel_bundles: dict[str, Path], tmp_path: Path) -> None:
    _pg_cut(rel_bundles, tmp_path, 600, 1, "postgres cut and restored")


@pytest.mark.postgres
@pytest.mark.long
def test_postgres_cut_and_restored_long(rel_bundles: dict[str, Path], tmp_path: Path) -> None:
    _pg_cut(rel_bundles, tmp_path, 6_000, 4, "postgres cut and restored (long)")
