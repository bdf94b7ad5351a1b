"""serve/web/limits.py: bounded admission (back-pressure) and security headers.

References: RFC 9110 section 15.6.4 (503 Service Unavailable) and section
10.2.3 (Retry-After, delay in seconds); the security headers are common
practice (OWASP secure-headers project, values from memory).
"""

from __future__ import annotations

import threading
from contextlib import ExitStack
from typing import Any

import pytest

from demur.serve.web import limits
from demur.serve.web.app import create_app
from demur.serve.config import ServeConfig
from demur.serve.errors import Overloaded
from demur.serve.web.limits import SECURITY_HEADERS, AdmissionGate, gate_for

CASE = [[float(v % 17) for v in range(64)]]


def test_public_names_exact() -> None:
    assert sorted(limits.__all__) == ["AdmissionGate", "SECURITY_HEADERS", "gate_for", "install_limits"]


def test_gate_admits_slots_then_refuses_at_once_when_the_queue_is_full() -> None:
    gate = AdmissionGate(slots=2, queue=0, wait_s=5.0)
    with gate.admit(), gate.admit():
        with pytest.raises(Overloaded) as info:
            with gate.admit():
                pass
        assert info.value.status == 503 and info.value.retry_after_s >= 1
    with gate.admit():  # slots are given back
        pass
    assert gate.refused == 1


def test_a_waiter_gets_the_slot_when_it_frees() -> None:
    gate = AdmissionGate(slots=1, queue=1, wait_s=10.0)
    entered = threading.Event()
    hold = gate.admit()
    hold.__enter__()

    def waiter() -> None:
        with gate.admit():
            entered.set()

    t = threading.Thread(target=waiter)
    t.start()
    hold.__exit__(None, None, None)
    t.join(10)
    assert entered.is_set() and gate.refused == 0 and gate.waiting == 0


def test_a_waiter_past_its_bounded_wait_is_refused() -> None:
    gate = AdmissionGate(slots=1, queue=4, wait_s=0.05)
    with gate.admit():
        with pytest.raises(Overloaded, match="no capacity"):
            with gate.admit():
                pass
    assert gate.refused == 1 and gate.waiting == 0


def test_gate_for_follows_the_settings() -> None:
    batched = gate_for(ServeConfig(threads=6, batch_wait_ms=1.0, queue_max_requests=7), cpus=2)
    assert (batched.slots, batched.queue) == (6, 7)
    plain = gate_for(ServeConfig(workers=2, threads=6, batch_wait_ms=0.0, request_timeout_s=4.0), cpus=2)
    assert (plain.slots, plain.wait_s) == (1, 2.0)
    assert gate_for(ServeConfig(workers=1, threads=8, batch_wait_ms=0.0), cpus=4).slots == 4
    with pytest.raises(ValueError):
        AdmissionGate(slots=0, queue=1, wait_s=1.0)


@pytest.fixture()
def app(tiny_bundle_factory: Any) -> Any:
    cfg = ServeConfig(bundle=str(tiny_bundle_factory().path), batch_wait_ms=0.0, queue_max_requests=1,
                      request_timeout_s=0.1, workers=1, threads=2)
    return create_app(cfg)


def test_full_server_answers_503_with_retry_after_and_a_json_error(app: Any) -> None:
    """RFC 9110 15.6.4 / 10.2.3: 503 with a Retry-After delay in seconds."""
    gate = app.extensions["demur_gate"]
    client = app.test_client()
    with ExitStack() as stack:
        for _ in range(gate.slots):
            stack.enter_context(gate.admit())
        r = client.post("/v1/predict", json={"cases": CASE})
    assert r.status_code == 503
    assert int(r.headers["Retry-After"]) >= 1
    assert r.get_json()["error"]["code"] == "overloaded"
    assert client.post("/v1/predict", json={"cases": CASE}).status_code == 200  # recovers at once


def test_security_headers_and_no_debug(app: Any) -> None:
    client = app.test_client()
    for path in ("/healthz", "/v1/model", "/no-such-route"):
        r = client.get(path)
        for key, value in SECURITY_HEADERS.items():
            assert r.headers[key] == value, (path, key)
        assert r.headers["Cache-Control"] == "no-store"
    assert app.debug is False
    csp = SECURITY_HEADERS["Content-Security-Policy"]
    assert "frame-ancestors 'none'" in csp and "default-src 'none'" in csp
    assert "unsafe-inline" not in csp and "unsafe-eval" not in csp  # one strict policy everywhere


def test_body_cap_is_the_configured_limit(app: Any) -> None:
    cfg = app.extensions["demur"].config
    assert app.config["MAX_CONTENT_LENGTH"] == cfg.max_body_bytes
