"""A body over the size limit gets a 413 that ordinary clients can read (issue 20).

Before: the 413 was written while the client was still sending, the socket closed,
and the kernel answered the rest of the body with a reset, so clients often saw
ECONNRESET instead of the answer. Now the server half-closes after the answer and
reads and discards a bounded remainder (serve/web/loop/connection.py), so a client
that sends its whole body and then reads (``requests`` here, as most clients do)
gets the JSON 413 every time. Bounded: 12 requests of 6 MiB over a 256 KiB limit.
"""

from __future__ import annotations

import socket
import time
from pathlib import Path
from typing import Any

import requests

from .harness import Server

LIMIT = 256 * 1024


def test_an_oversize_body_gets_a_readable_413(tiny_bundle_factory: Any, tmp_path: Path) -> None:
    bundle = Path(tiny_bundle_factory().path)
    env = {"DEMUR_DATA_DIR": str(tmp_path / "data"), "DEMUR_MAX_BODY_BYTES": str(LIMIT)}
    with Server(bundle, tmp_path / "server.log", workers=1, threads=2, env=env) as server:
        body = b'{"cases": [' + b"1.0, " * (6 * 1024 * 1024 // 5) + b"1.0]}"
        outcomes = []
        for chunked in (False, True) * 6:
            data = iter([body[i:i + 65536] for i in range(0, len(body), 65536)]) if chunked else body
            try:
                r = requests.post(server.url + "/v1/predict", data=data, timeout=30,
                                  headers={"Content-Type": "application/json"})
                outcomes.append((r.status_code, r.json()["error"]["field"]))
            except requests.ConnectionError as exc:
                outcomes.append(("reset", type(exc).__name__))
        assert outcomes == [(413, "body")] * 12, outcomes
        raw = [_raw_post(server.port, body) for _ in range(12)]
        assert all(r.startswith(b"HTTP/1.1 413 ") and b'"field":"body"' in r for r in raw), [r[:80] for r in raw]
        for _ in range(3):
            _answer_then_keep_sending(server.port)
        assert requests.get(server.url + "/healthz", timeout=10).status_code == 200


def _answer_then_keep_sending(port: int) -> None:
    """Read the 413 and the server's FIN while the declared body is still mostly unsent, then
    send more of it: the server still reads (and discards) it, so no send fails. A server
    that closed outright would answer these bytes with a reset (EPIPE / ECONNRESET)."""
    with socket.create_connection(("127.0.0.1", port), timeout=30) as s:
        s.sendall(b"POST /v1/predict HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: application/json\r\n"
                  b"Content-Length: 8000000\r\n\r\n" + b"1" * 65536)
        answer = b""
        while chunk := s.recv(65536):  # up to the server's FIN
            answer += chunk
        assert answer.startswith(b"HTTP/1.1 413 "), answer[:100]
        for _ in range(8):
            s.sendall(b"1" * 65536)
            time.sleep(0.02)


def _raw_post(port: int, body: bytes) -> bytes:
    """A plain socket client: send the whole request (errors on send ignored), then read."""
    with socket.create_connection(("127.0.0.1", port), timeout=30) as s:
        head = (f"POST /v1/predict HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: application/json\r\n"
                f"Content-Length: {len(body)}\r\n\r\n").encode()
        try:
            s.sendall(head)
            for i in range(0, len(body), 65536):
                s.sendall(body[i:i + 65536])
        except OSError:
            pass
        out = b""
        try:
            while chunk := s.recv(65536):
                out += chunk
        except ConnectionResetError:
            return b"reset: " + out
        return out
