"""Access control on a real ``demur serve``: every protected route, every method,
without a token, with a wrong one, with a malformed header and with a token of
the wrong scope; the right scope gets through. Tokens never reach the log.

The route list comes from the app's own ``url_map`` (built in-process with the
same settings), so a route added later without a decision here fails the test:
it must be listed as public or fall under a protected prefix.

Reference: RFC 6750 section 3.1 (bearer tokens: 401 with WWW-Authenticate for a
missing or invalid token, 403 for insufficient scope); RFC 9110 section 11.6.1.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import requests

from demur.serve.web.app import create_app
from demur.serve.config import ServeConfig

from .conftest import TOKENS
from .harness import Server, record

PUBLIC = {"/v1/model", "/healthz", "/readyz", "/openapi.json", "/metrics", "/review", "/review/assets/<name>"}
"""Routes anyone may call: descriptions, probes, the scrape target, the reviewer page shell
(its API calls carry a token)."""

SCOPE_BY_PREFIX = (("/v1/admin", "admin"), ("/v1/reviews", "review"), ("/v1/predict", "predict"))
WRONG_SCOPES = {"admin": ("review", "predict"), "review": ("predict",), "predict": ("review",)}


def _scope(rule: str) -> str | None:
    for prefix, scope in SCOPE_BY_PREFIX:
        if rule == prefix or rule.startswith(prefix + "/"):
            return scope
    return None


def _routes(config: ServeConfig) -> list[tuple[str, str, str]]:
    app = create_app(config)
    out = []
    for rule in app.url_map.iter_rules():
        for method in sorted((rule.methods or set()) - {"HEAD", "OPTIONS"}):
            if rule.rule in PUBLIC:
                continue
            scope = _scope(rule.rule)
            assert scope is not None, f"{method} {rule.rule} is neither public nor under a protected prefix"
            path = re.sub(r"<(?:[^:>]+:)?([^>]+)>", "r-00000000000000000000000000", rule.rule)
            out.append((method, path, scope))
    return out


def test_every_protected_route_checks_its_token(tiny_bundle_factory: Any, tmp_path: Path) -> None:
    bundle = Path(tiny_bundle_factory().path)
    env = {"DEMUR_DATA_DIR": str(tmp_path / "data"), "DEMUR_PREDICT_TOKENS": TOKENS["predict"],
           "DEMUR_REVIEW_TOKENS": TOKENS["review"], "DEMUR_ADMIN_TOKENS": TOKENS["admin"]}
    config = ServeConfig(bundle=str(bundle), data_dir=str(tmp_path / "inproc"), predict_tokens=TOKENS["predict"],
                         review_tokens=TOKENS["review"], admin_tokens=TOKENS["admin"])
    routes = _routes(config)
    assert {s for _, _, s in routes} == {"predict", "review", "admin"}
    problems: list[str] = []
    sent = 0
    with Server(bundle, tmp_path / "server.log", env=env) as server, requests.Session() as session:
        def call(method: str, path: str, authorization: str | None) -> requests.Response:
            nonlocal sent
            headers = {"Authorization": authorization} if authorization else {}
            sent += 1
            return session.request(method, server.url + path, headers=headers, timeout=15,
                                   json={} if method in ("POST", "PUT", "PATCH") else None)

        for method, path, scope in routes:
            cases: list[tuple[str, str | None, int]] = [
                ("no token", None, 401),
                ("wrong token", "Bearer not-a-demur-token", 401),
                ("malformed header", f"Basic {TOKENS[scope]}", 401),
                ("empty bearer", "Bearer ", 401),
            ]
            cases += [(f"{wrong} token", f"Bearer {TOKENS[wrong]}", 403) for wrong in WRONG_SCOPES[scope]]
            for label, auth, want in cases:
                r = call(method, path, auth)
                body = r.json() if r.headers.get("Content-Type", "").startswith("application/json") else None
                ok = (r.status_code == want and isinstance(body, dict)
                      and body.get("error", {}).get("field") == "Authorization")
                if want == 401:
                    ok = ok and r.headers.get("WWW-Authenticate", "").startswith("Bearer")
                if not ok:
                    problems.append(f"{method} {path} [{label}]: {r.status_code} {str(body)[:120]}")
            r = call(method, path, f"Bearer {TOKENS[scope]}")  # the right scope gets past the check
            if r.status_code in (401, 403) or r.status_code >= 500:
                problems.append(f"{method} {path} [right token]: {r.status_code} {r.text[:120]}")
            if scope != "admin":  # admin implies every scope (serve/web/auth.py)
                r = call(method, path, f"Bearer {TOKENS['admin']}")
                if r.status_code in (401, 403) or r.status_code >= 500:
                    problems.append(f"{method} {path} [admin token]: {r.status_code}")
        log = server.log()
    leaked = [name for name, token in TOKENS.items() if token in log]
    record("access control", requests=sent, errors=len(problems) + len(leaked),
           note=f"{len(routes)} protected route/method pairs, tokens in log: {len(leaked)}")
    assert not problems, problems
    assert not leaked, f"tokens found in the server log: {leaked}"
