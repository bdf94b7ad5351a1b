"""serve/web/limits.py: security headers, body cap and debug off on every Flask response.

References: the security headers are common practice (OWASP secure-headers project,
values from memory). Admission (503 + Retry-After) is tests/serve/web/test_predict_http.py.
"""

from __future__ import annotations

from typing import Any

import pytest

from demur.serve.config import ServeConfig
from demur.serve.web.app import create_app
from demur.serve.web.limits import SECURITY_HEADERS

CASE = [[float(v % 17) for v in range(64)]]


@pytest.fixture()
def app(tiny_bundle_factory: Any) -> Any:
    cfg = ServeConfig(bundle=str(tiny_bundle_factory().path), batch_wait_ms=0.0, queue_max_requests=1,
                      request_timeout_s=0.1, workers=1, threads=2)
    return create_app(cfg)


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
