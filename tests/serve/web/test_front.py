"""serve/web/loop/: the event-loop HTTP front of ``demur serve``, over real sockets on 127.0.0.1.

References: RFC 9112 (HTTP/1.1 message syntax: pipelining answered in order,
``Expect: 100-continue``, chunked bodies, ``Connection: close``); RFC 9110 for
the statuses (400, 401 + ``WWW-Authenticate``, 405 + ``Allow``, 413, 414, 415,
431 from RFC 6585, 503 + ``Retry-After``). Every loop is bounded and every
socket has a timeout.
"""

from __future__ import annotations

import json
import socket
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.serve.web.test_server import Server, _call, _rows, _start

SOCKET_TIMEOUT_S = 15.0


@pytest.fixture(scope="module")
def bundle(tiny_bundle_factory: Any) -> Any:
    return tiny_bundle_factory(task="classification", kind="stacked", draws=8)


@pytest.fixture(scope="module")
def live(bundle: Any, tmp_path_factory: pytest.TempPathFactory) -> Iterator[Server]:
    """One worker, 50 ms batch wait (so concurrent requests surely share a batch),
    4 KiB body limit, 16 cases at most."""
    tmp = tmp_path_factory.mktemp("front")
    srv = _start(bundle.path, tmp, "--workers", "1", "--threads", "2",
                 env={"DEMUR_BATCH_WAIT_MS": "50", "DEMUR_MAX_BODY_BYTES": "4096", "DEMUR_MAX_CASES": "16"})
    try:
        yield srv
    finally:
        srv.stop()


def _port(server: Server) -> int:
    return int(server.url.rsplit(":", 1)[1])


def _post(path: str, body: bytes, *, extra: str = "", ctype: str = "application/json") -> bytes:
    return (f"POST {path} HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: {ctype}\r\n"
            f"Content-Length: {len(body)}\r\n{extra}\r\n").encode() + body


class _Reader:
    """Reads HTTP/1.1 responses with a Content-Length off one socket."""

    def __init__(self, sock: socket.socket) -> None:
        self.sock, self.buf = sock, b""

    def _fill(self) -> bool:
        chunk = self.sock.recv(65536)
        self.buf += chunk
        return bool(chunk)

    def response(self, *, head: bool = False) -> tuple[int, dict[str, str], bytes]:
        """One response; ``head=True`` for the answer to a HEAD request (no body follows)."""
        for _ in range(10_000):
            if b"\r\n\r\n" in self.buf:
                break
            if not self._fill():
                raise ConnectionError(f"closed before a full head: {self.buf[:200]!r}")
        top, self.buf = self.buf.split(b"\r\n\r\n", 1)
        lines = top.decode("latin-1").split("\r\n")
        status = int(lines[0].split()[1])
        headers = {k.strip().lower(): v.strip() for k, v in (line.split(":", 1) for line in lines[1:])}
        length = 0 if head else int(headers.get("content-length", "0"))
        for _ in range(10_000):
            if len(self.buf) >= length:
                break
            if not self._fill():
                raise ConnectionError("closed before the full body")
        body, self.buf = self.buf[:length], self.buf[length:]
        return status, headers, body

    def closed(self) -> bool:
        try:
            return self.sock.recv(1) == b""
        except (ConnectionResetError, socket.timeout):
            return False


def _connect(server: Server) -> socket.socket:
    sock = socket.create_connection(("127.0.0.1", _port(server)), timeout=SOCKET_TIMEOUT_S)
    return sock


def _metric(server: Server, name: str) -> float:
    with socket.create_connection(("127.0.0.1", _port(server)), timeout=SOCKET_TIMEOUT_S) as sock:
        sock.sendall(b"GET /metrics HTTP/1.1\r\nHost: x\r\n\r\n")
        _, _, body = _Reader(sock).response()
    total = 0.0
    for line in body.decode().splitlines():
        if line.startswith(name + " ") or line.startswith(name + "{"):
            total += float(line.rsplit(" ", 1)[1])
    return total


# -- the job ------------------------------------------------------------------------------------
def test_answers_match_the_flask_app(live: Server, bundle: Any, make_app: Any) -> None:
    """The same stacked draws through both fronts: the same results (float32 graph, allclose)."""
    body = {"cases": _rows(3, seed=4), "case_ids": ["p1", "p2", "p3"]}
    status, headers, got = _call(live.url + "/v1/predict", body)
    want = make_app(bundle).test_client().post("/v1/predict", json=body).get_json()
    assert status == 200 and headers["Demur-Model-Checksum"] == want["model"]["checksum"]
    assert [r["case_id"] for r in got["results"]] == ["p1", "p2", "p3"]
    for a, b in zip(got["results"], want["results"]):
        assert a["decision"] == b["decision"] and a["prediction"] == b["prediction"]
        np.testing.assert_allclose(a["mean"], b["mean"], rtol=1e-5, atol=1e-7)
        assert a["uncertainty"]["unit"] == "nats"
    assert headers["X-Content-Type-Options"] == "nosniff" and headers["Cache-Control"] == "no-store"


def test_concurrent_requests_share_a_batch_and_get_their_own_rows(live: Server) -> None:
    n = 12
    before = _metric(live, "demur_batch_cases_count")
    barrier = threading.Barrier(n)
    answers: dict[int, Any] = {}

    def client(i: int) -> None:
        barrier.wait(timeout=SOCKET_TIMEOUT_S)
        answers[i] = _call(live.url + "/v1/predict", {"cases": _rows(2, seed=i), "case_ids": [f"{i}a", f"{i}b"]})

    threads = [threading.Thread(target=client, args=(i,)) for i in range(n)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=60)
    assert sorted(answers) == list(range(n))
    for i, (status, _, body) in answers.items():
        assert status == 200
        assert [r["case_id"] for r in body["results"]] == [f"{i}a", f"{i}b"]
        alone = _call(live.url + "/v1/predict", {"cases": _rows(2, seed=i)})[2]
        for a, b in zip(body["results"], alone["results"]):
            np.testing.assert_allclose(a["mean"], b["mean"], rtol=1e-5, atol=1e-7)
    batches = _metric(live, "demur_batch_cases_count") - before
    assert batches < 2 * n  # n concurrent + n single requests: the concurrent ones were merged


def test_pipelined_requests_are_answered_in_order(live: Server) -> None:
    with _connect(live) as sock:
        sock.sendall(b"".join(_post("/v1/predict", json.dumps({"cases": _rows(1, seed=i),
                                                                 "case_ids": [f"k{i}"]}).encode())
                              for i in range(4)) + b"GET /healthz HTTP/1.1\r\nHost: x\r\n\r\n")
        reader = _Reader(sock)
        ids = [json.loads(reader.response()[2])["results"][0]["case_id"] for _ in range(4)]
        status, _, health = reader.response()
    assert ids == ["k0", "k1", "k2", "k3"]
    assert status == 200 and json.loads(health)["status"] == "alive"


def test_a_batch_with_one_bad_request_answers_the_others(live: Server) -> None:
    with _connect(live) as sock:
        sock.sendall(_post("/v1/predict", b'{"cases": [[1, 2]]}') + _post("/v1/predict", json.dumps(
            {"cases": _rows(1)}).encode()))
        reader = _Reader(sock)
        bad, good = reader.response(), reader.response()
    assert bad[0] == 400 and json.loads(bad[2])["error"]["field"] == "cases[0]"
    assert good[0] == 200


# -- refusals ---------------------------------------------------------------------------------------
def test_malformed_http_gets_a_json_400_and_the_connection_closes(live: Server) -> None:
    with _connect(live) as sock:
        sock.sendall(b"NOT HTTP AT ALL\r\n\r\n")
        reader = _Reader(sock)
        status, headers, body = reader.response()
        assert status == 400 and headers["connection"] == "close"
        assert json.loads(body)["error"]["field"] == "request"
        assert reader.closed()


def test_declared_oversized_body_is_refused_without_reading_it(live: Server) -> None:
    with _connect(live) as sock:
        sock.sendall(b"POST /v1/predict HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\n"
                     b"Content-Length: 10000000\r\n\r\n")
        status, _, body = _Reader(sock).response()
    assert status == 413 and json.loads(body)["error"]["field"] == "body"


def test_chunked_body_over_the_limit_is_refused(live: Server) -> None:
    with _connect(live) as sock:
        sock.sendall(b"POST /v1/predict HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\n"
                     b"Transfer-Encoding: chunked\r\n\r\n" + b"400\r\n" + b" " * 1024 + b"\r\n")
        for _ in range(5):
            sock.sendall(b"400\r\n" + b" " * 1024 + b"\r\n")
        status, _, body = _Reader(sock).response()
    assert status == 413 and json.loads(body)["error"]["code"] == "payload_too_large"


def test_chunked_body_within_the_limit_is_answered(live: Server) -> None:
    payload = json.dumps({"cases": _rows(1)}).encode()
    with _connect(live) as sock:
        sock.sendall(b"POST /v1/predict HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\n"
                     b"Transfer-Encoding: chunked\r\n\r\n" + b"%x\r\n" % len(payload) + payload + b"\r\n0\r\n\r\n")
        status, _, _ = _Reader(sock).response()
    assert status == 200


@pytest.mark.parametrize(("head", "status", "field"), [
    (b"GET /" + b"a" * 9000 + b" HTTP/1.1\r\nHost: x\r\n\r\n", 414, "path"),
    (b"GET /healthz HTTP/1.1\r\n" + b"".join(b"X-H%d: v\r\n" % i for i in range(200)) + b"\r\n", 431, "headers"),
])
def test_oversized_request_heads_are_refused(live: Server, head: bytes, status: int, field: str) -> None:
    with _connect(live) as sock:
        sock.sendall(head)
        got, _, body = _Reader(sock).response()
    assert got == status and json.loads(body)["error"]["field"] == field


def test_wrong_content_type_is_415(live: Server) -> None:
    status, _, body = _call(live.url + "/v1/predict", raw=b"cases=1", ctype="application/x-www-form-urlencoded")
    assert status == 415 and body["error"]["field"] == "Content-Type"


def test_expect_100_continue(live: Server) -> None:
    payload = json.dumps({"cases": _rows(1)}).encode()
    with _connect(live) as sock:
        sock.sendall(_post("/v1/predict", b"", extra="Expect: 100-continue\r\n").replace(
            b"Content-Length: 0", b"Content-Length: %d" % len(payload)))
        interim = sock.recv(64)
        assert interim.startswith(b"HTTP/1.1 100 Continue\r\n\r\n")
        sock.sendall(payload)
        reader = _Reader(sock)
        reader.buf = interim[len(b"HTTP/1.1 100 Continue\r\n\r\n"):]
        status, _, _ = reader.response()
    assert status == 200


def test_other_routes_go_through_the_app(live: Server) -> None:
    with _connect(live) as sock:
        sock.sendall(b"GET /v1/predict HTTP/1.1\r\nHost: x\r\n\r\nHEAD /healthz HTTP/1.1\r\nHost: x\r\n\r\n"
                     b"GET /nowhere?q=1 HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n")
        reader = _Reader(sock)
        s405, h405, b405 = reader.response()
        s_head, h_head, b_head = reader.response(head=True)
        s404, h404, b404 = reader.response()
        assert reader.closed()
    assert s405 == 405 and "POST" in h405["allow"] and json.loads(b405)["error"]["field"] == "method"
    assert s_head == 200 and b_head == b"" and int(h_head["content-length"]) > 0
    assert s404 == 404 and json.loads(b404)["error"]["field"] == "path" and h404["connection"] == "close"
    assert _metric(live, 'demur_http_requests_total') > 0


def test_http_1_0_without_keep_alive_is_closed(live: Server) -> None:
    payload = json.dumps({"cases": _rows(1)}).encode()
    with _connect(live) as sock:
        sock.sendall(_post("/v1/predict", payload).replace(b"HTTP/1.1", b"HTTP/1.0"))
        reader = _Reader(sock)
        status, headers, _ = reader.response()
        assert status == 200 and headers["connection"] == "close" and reader.closed()


# -- access and back-pressure -------------------------------------------------------------------------
def test_tokens_and_back_pressure(bundle: Any, tmp_path: Path) -> None:
    """Predict tokens on; one request may wait at a time (the second concurrent one is refused
    with 503 and Retry-After, RFC 9110 section 10.2.3)."""
    srv = _start(bundle.path, tmp_path, "--workers", "1", "--threads", "1",
                 env={"DEMUR_PREDICT_TOKENS": "depot-key", "DEMUR_BATCH_WAIT_MS": "400",
                      "DEMUR_QUEUE_MAX_REQUESTS": "1", "DEMUR_REQUEST_TIMEOUT_S": "2"})
    try:
        payload = json.dumps({"cases": _rows(1)}).encode()
        with _connect(srv) as sock:
            sock.sendall(_post("/v1/predict", payload))
            status, headers, body = _Reader(sock).response()
        assert status == 401 and headers["www-authenticate"].startswith("Bearer")
        assert json.loads(body)["error"]["field"] == "Authorization"
        auth = "Authorization: Bearer depot-key\r\n"
        with _connect(srv) as first, _connect(srv) as second:
            first.sendall(_post("/v1/predict", payload, extra=auth))
            threading.Event().wait(0.1)  # the first request is waiting for its batch (400 ms)
            second.sendall(_post("/v1/predict", payload, extra=auth))
            refused = _Reader(second).response()
            answered = _Reader(first).response()
        assert refused[0] == 503 and int(refused[1]["retry-after"]) >= 1
        assert json.loads(refused[2])["error"]["code"] == "overloaded"
        assert answered[0] == 200
        # a client trickling its request head past the 2 s request timeout is cut off
        with _connect(srv) as slow:
            slow.sendall(b"POST /v1/predict HTTP/1.1\r\n")
            slow.settimeout(0.5)
            closed = False
            for i in range(20):  # at most about 10 s
                try:
                    slow.sendall(b"X-Slow-%d: 1\r\n" % i)
                    closed = slow.recv(1) == b""
                except socket.timeout:
                    continue
                except (BrokenPipeError, ConnectionResetError):
                    closed = True
                if closed:
                    break
            assert closed and i >= 3
    finally:
        assert srv.stop() == 0


# -- hostile bytes --------------------------------------------------------------------------------------
@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.binary(max_size=300), st.sampled_from([b"application/json", b"text/plain", b""]))
def test_arbitrary_bodies_never_get_a_5xx(live: Server, body: bytes, ctype: bytes) -> None:
    """Whatever the body, the answer is a 2xx or a JSON 4xx naming a field (property test)."""
    with _connect(live) as sock:
        sock.sendall(b"POST /v1/predict HTTP/1.1\r\nHost: x\r\nContent-Type: " + ctype +
                     b"\r\nContent-Length: %d\r\n\r\n" % len(body) + body)
        status, _, answer = _Reader(sock).response()
    assert status < 500
    if status >= 400:
        error = json.loads(answer)["error"]
        assert error["field"] and error["message"]


# -- HTTP semantics found wanting by a hostile client (RFC 9110 / RFC 9112) ---------------------


def test_http10_keep_alive_is_said_aloud(live: Server) -> None:
    """RFC 9112 appendix C.2.2 (and 9.3): an HTTP/1.0 connection persists only when the answer
    carries ``Connection: keep-alive``; without it a client such as ``ab -k`` waits out the idle
    timeout on every request. Three requests on one connection, each answered at once."""
    with _connect(live) as sock:
        reader = _Reader(sock)
        for _ in range(3):
            sock.sendall(b"GET /healthz HTTP/1.0\r\nConnection: keep-alive\r\n\r\n")
            status, headers, _ = reader.response()
            assert status == 200 and headers["connection"].lower() == "keep-alive"
        sock.sendall(b"GET /healthz HTTP/1.0\r\n\r\n")  # no keep-alive asked: closed after the answer
        status, headers, _ = reader.response()
        assert status == 200 and headers["connection"].lower() == "close" and reader.closed()


def test_upgrade_is_ignored_and_answered_once(live: Server) -> None:
    """RFC 9110 section 7.8: a server may ignore Upgrade. The upgrade request gets one answer and
    the pipelined request after it gets its own (before: a 200, then a stray 400)."""
    body = json.dumps({"cases": _rows(1)}).encode()
    with _connect(live) as sock:
        reader = _Reader(sock)
        sock.sendall(b"GET /healthz HTTP/1.1\r\nHost: x\r\nConnection: Upgrade, HTTP2-Settings\r\n"
                     b"Upgrade: h2c\r\nHTTP2-Settings: AAMAAABkAARAAAAAAAIAAAAA\r\n\r\n" + _post("/v1/predict", body))
        first, second = reader.response(), reader.response()
    assert first[0] == 200 and b"alive" in first[2]
    assert second[0] == 200 and json.loads(second[2])["results"]


def test_100_continue_only_for_http11_and_in_order(live: Server) -> None:
    """RFC 9110 section 10.1.1: a server ignores 100-continue from an HTTP/1.0 client, and an
    interim answer must not overtake the final answer of an earlier pipelined request."""
    body = json.dumps({"cases": _rows(1)}).encode()
    with _connect(live) as sock:
        reader = _Reader(sock)
        sock.sendall(f"POST /v1/predict HTTP/1.0\r\nContent-Type: application/json\r\nContent-Length: {len(body)}"
                     f"\r\nExpect: 100-continue\r\nConnection: keep-alive\r\n\r\n".encode() + body)
        status, _, _ = reader.response()
        assert status == 200  # the final answer, no 100 ahead of it
    with _connect(live) as sock:
        reader = _Reader(sock)
        sock.sendall(_post("/v1/predict", body) + _post("/v1/predict", body, extra="Expect: 100-continue\r\n"))
        statuses = [reader.response()[0] for _ in range(3)]
    assert statuses == [200, 100, 200]


def test_refusals_are_counted_with_the_client(live: Server) -> None:
    """A request refused while parsing still counts in the request metric (route "other")."""
    before = _metric(live, "demur_http_requests_total")
    with _connect(live) as sock:
        sock.sendall(b"GARBAGE / HTTP/1.1\r\n\r\n")
        status, _, body = _Reader(sock).response()
    assert status == 400 and json.loads(body)["error"]["field"] == "request"
    assert _metric(live, "demur_http_requests_total") >= before + 1


def test_a_late_sweep_closes_nothing_and_the_next_one_does() -> None:
    """The keep-alive sweep after a held-up loop (a predict batch waiting on a stalled review
    store) must not close a connection that only looks idle: the client's next request may be
    sitting unread in the socket, and closing it resets that request (one reset seen in the
    PostgreSQL cut test). A sweep on time closes what is idle past the keep-alive time."""
    import time
    from types import SimpleNamespace

    from demur.serve.web.loop.worker import SWEEP_LATE_S, Front

    closed: list[str] = []

    def conn(name: str) -> SimpleNamespace:
        transport = SimpleNamespace(close=lambda: closed.append(name))
        return SimpleNamespace(transport=transport, idle=True, in_message=False, began=0.0,
                               last_active=time.monotonic() - 60.0)

    now = time.monotonic()
    front = SimpleNamespace(connections=[conn("a")], keepalive_s=5.0, config=SimpleNamespace(request_timeout_s=30.0),
                            swept=now - SWEEP_LATE_S - 5.0)
    Front.sweep(front)  # type: ignore[arg-type]
    assert closed == [] and front.swept >= now
    Front.sweep(front)  # type: ignore[arg-type]
    assert closed == ["a"]
