"""The loop front (the one production front) against slow and hostile clients, through a real
``demur serve`` (2 workers) on 127.0.0.1:

- slowloris: 40 connections each sending its request head one byte every 0.5 s, and slow
  bodies: 40 connections declaring 2,000 bytes and trickling them; meanwhile other clients'
  predictions keep a p99 under 100 ms, and every slow connection is cut once it has taken
  longer than the request timeout (2 s here) to arrive;
- HTTP/1.0 keep-alive with ``ab -k`` (Apache's benchmark tool, Debian's apache2-utils): 400
  requests over 4 kept-alive HTTP/1.0 connections finish without a stall (before the fix each
  request waited out the 5 s idle timeout);
- hostile case ids (lone surrogates, NUL, control characters, 10 KB strings) mixed with good
  ones, property-generated, on SQLite and on the real PostgreSQL: every request is answered
  (200 or 400), and every abstention of a good request reaches the review store.

References: RFC 9112 section 9.3 and appendix C.2.2 (HTTP/1.0 persistence needs
``Connection: keep-alive`` in the answer); the slowloris attack pattern (common practice:
bound the time a request head and body may take); Unicode 15 section 3.9 D76 (a lone
surrogate has no UTF-8 form) and PostgreSQL's documentation (text cannot hold NUL).
"""

from __future__ import annotations

import contextlib
import json
import re
import shutil
import socket
import subprocess
import threading
import time
from pathlib import Path
from typing import Any

import pytest
import requests
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from demur.serve.review.store import open_store
from tests.serve._review_helpers import PG_URL, pg_schema, pg_unreachable_reason, with_schema

from .conftest import TOKENS
from .harness import Server, digit_body, record, run_load

REVIEW = {"Authorization": f"Bearer {TOKENS['review']}"}
SLOW_CLIENTS = 40


def _env(tmp_path: Path, **extra: str) -> dict[str, str]:
    return {"DEMUR_DATA_DIR": str(tmp_path / "data"), "DEMUR_REVIEW_TOKENS": TOKENS["review"],
            "DEMUR_AUDIT_FRACTION": "0", **extra}


def _trickle(port: int, payload: bytes, gap_s: float, stop: threading.Event, cut: list[float]) -> None:
    """Send ``payload`` one byte every ``gap_s`` until the server closes the connection."""
    t0 = time.monotonic()
    with socket.create_connection(("127.0.0.1", port), timeout=10) as sock:
        for i in range(len(payload)):
            if stop.is_set():
                return
            try:
                sock.sendall(payload[i:i + 1])
            except OSError:
                cut.append(time.monotonic() - t0)
                return
            time.sleep(gap_s)
            sock.settimeout(0.0)
            try:
                if sock.recv(1024) == b"":
                    cut.append(time.monotonic() - t0)
                    return
            except BlockingIOError:
                pass
            except OSError:
                cut.append(time.monotonic() - t0)
                return
            finally:
                sock.settimeout(10)


@pytest.mark.parametrize("kind", ["slow headers", "slow body"])
def test_slow_clients_do_not_hold_the_others(kind: str, tmp_path: Path, tiny_bundle_factory: Any) -> None:
    env = _env(tmp_path, DEMUR_REQUEST_TIMEOUT_S="2")
    body = json.dumps(digit_body(0)).encode()
    if kind == "slow headers":
        payload = b"POST /v1/predict HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\n" + b"X-Pad: a\r\n" * 20
    else:
        payload = (b"POST /v1/predict HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\n"
                   b"Content-Length: 2000\r\n\r\n" + body[:40])
    stop, cut = threading.Event(), []  # type: ignore[var-annotated]
    with Server(Path(tiny_bundle_factory().path), tmp_path / "server.log", env=env) as server:
        slow = [threading.Thread(target=_trickle, args=(server.port, payload, 0.5, stop, cut), daemon=True)
                for _ in range(SLOW_CLIENTS)]
        for t in slow:
            t.start()
        time.sleep(0.5)
        result = run_load(server.url + "/v1/predict", 300, 4, make_body=digit_body)
        deadline = time.monotonic() + 10
        while len(cut) < SLOW_CLIENTS and time.monotonic() < deadline:
            time.sleep(0.1)
        stop.set()
    p99 = result.percentile_ms(99)
    record(f"{kind} ({SLOW_CLIENTS} connections)", requests=result.sent, errors=result.errors,
           p50_ms=result.percentile_ms(50), p99_ms=p99,
           faults=SLOW_CLIENTS, note=f"{len(cut)} of {SLOW_CLIENTS} cut, last after {max(cut or [0]):.1f} s")
    assert result.errors == 0, result.problems[:5]
    assert p99 is not None and p99 < 100.0, p99
    assert len(cut) == SLOW_CLIENTS and max(cut) < 2.0 + 0.5 + 1.0 + 1.0  # timeout, one sweep, one byte gap


@pytest.mark.skipif(shutil.which("ab") is None, reason="needs Debian's apache2-utils (deploy/system-deps.sh)")
def test_http10_keep_alive_with_ab(tmp_path: Path, tiny_bundle_factory: Any) -> None:
    with Server(Path(tiny_bundle_factory().path), tmp_path / "server.log", env=_env(tmp_path)) as server:
        t0 = time.monotonic()
        # /readyz: a body of constant length (ab counts a change of length as a failed request)
        out = subprocess.run(["ab", "-k", "-n", "400", "-c", "4", "-s", "20", server.url + "/readyz"],
                             capture_output=True, text=True, timeout=120)
        seconds = time.monotonic() - t0
    assert out.returncode == 0, out.stderr
    kept = int(re.search(r"Keep-Alive requests:\s+(\d+)", out.stdout).group(1))  # type: ignore[union-attr]
    failed = int(re.search(r"Failed requests:\s+(\d+)", out.stdout).group(1))  # type: ignore[union-attr]
    record("HTTP/1.0 keep-alive (ab -k, 400 requests)", requests=400, errors=failed,
           note=f"{kept} kept alive, {seconds:.1f} s in all")
    assert failed == 0 and kept >= 396  # the last request of each connection may close it
    assert seconds < 20.0  # a stall costs the 5 s idle timeout per request: 400 requests would take minutes


# -- hostile case ids, property-generated ------------------------------------------------------
HOSTILE = st.one_of(
    st.text(min_size=1, max_size=30),  # any Unicode, surrogates included
    st.sampled_from(["\ud800x", "a\x00b", "\x1b[31m", "\u0085next", "x" * 10_000, ""]),
)


def _hostile_round(server: Server, store_url: str, ids: list[str], tag: str) -> None:
    good = [f"{tag}-good-{i}" for i in range(3)]
    bodies = [{"cases": [digit_body(i)["cases"][0]], "case_ids": [cid]} for i, cid in enumerate(ids)]
    bodies += [{"cases": [digit_body(i)["cases"][0]], "case_ids": [cid]} for i, cid in enumerate(good)]
    statuses = []
    for body in bodies:
        raw = json.dumps(body, ensure_ascii=True).encode()  # lone surrogates travel as \\ud800 escapes
        r = requests.post(server.url + "/v1/predict", data=raw, headers={"Content-Type": "application/json"},
                          timeout=15)
        statuses.append(r.status_code)
    assert set(statuses) <= {200, 400}, statuses
    assert statuses[-3:] == [200, 200, 200]
    store = open_store(store_url, lease_s=60)
    try:
        found = {it.client_case_id for it in store.page(limit=500)}
    finally:
        store.close()
    assert set(good) <= found


@pytest.mark.parametrize("backend", ["sqlite", "postgresql"])
def test_hostile_case_ids_through_the_loop_front(backend: str, tmp_path: Path, tiny_bundle_factory: Any) -> None:
    if backend == "postgresql":
        reason = pg_unreachable_reason()
        if reason:
            pytest.fail(f"PostgreSQL at {PG_URL} is required for this check: {reason}")
    with contextlib.ExitStack() as stack:
        schema = stack.enter_context(pg_schema("relfront")) if backend == "postgresql" else None
        store_url = with_schema(PG_URL, schema) if schema else f"sqlite:///{tmp_path / 'data' / 'reviews.sqlite3'}"
        log = _hostile_server(tmp_path, tiny_bundle_factory, store_url, backend)
    assert "Traceback" not in log and "Exception in callback" not in log


def _hostile_server(tmp_path: Path, tiny_bundle_factory: Any, store_url: str, backend: str) -> str:
    env = _env(tmp_path, DEMUR_THRESHOLD="-1", DEMUR_REVIEW_STORE=store_url)  # every case abstains
    rounds = [0]
    with Server(Path(tiny_bundle_factory().path), tmp_path / "server.log", env=env) as server:

        @settings(max_examples=15, deadline=None, suppress_health_check=list(HealthCheck), database=None)
        @given(st.lists(HOSTILE, min_size=1, max_size=4))
        def check(ids: list[str]) -> None:
            rounds[0] += 1
            _hostile_round(server, store_url, ids, f"r{rounds[0]}")

        check()
        log = server.log()
    record(f"hostile case ids, loop front ({backend})", requests=rounds[0] * 5, note=f"{rounds[0]} rounds")
    return log
