"""Bearer tokens and scopes (serve/web/auth.py).

References: RFC 6750 (the OAuth 2.0 Bearer Token Usage): the ``Authorization:
Bearer <token>`` form, 401 with a ``WWW-Authenticate: Bearer`` challenge for a
missing or invalid token, 403 for a token without the needed scope (section
3.1, "insufficient_scope"). Constant-time comparison: Python's
``hmac.compare_digest`` documentation.
"""

from __future__ import annotations

import hmac
import logging
from pathlib import Path
from typing import Any

import pytest
from flask import Flask, g

from demur.serve.web import auth
from demur.serve.web.predict_http import refusal
from demur.serve.web.auth import AUTH_EXTENSION, Principal, TokenSet, require
from demur.serve.config import ServeConfig
from demur.serve.errors import ConfigError, DemurError, Forbidden, Unauthorized


def test_tokens_from_config_fields_and_file(tmp_path: Path) -> None:
    f = tmp_path / "tokens"
    f.write_text("# depot staff\nreview:desk-token-2\n\nadmin: ops-token \npredict:sorter-token\n")
    cfg = ServeConfig(review_tokens="desk-token-1, ,", admin_tokens="", token_file=str(f))
    tokens = TokenSet.from_config(cfg)
    assert tokens.check("Bearer desk-token-1", "review").scopes == frozenset({"review"})
    assert tokens.check("Bearer desk-token-2", "review").scopes == frozenset({"review"})
    assert tokens.check("bearer ops-token", "review").is_admin  # scheme is case-insensitive (RFC 6750 / 7235)
    assert tokens.configured("predict") and tokens.configured("admin")


@pytest.mark.parametrize("text, match", [
    ("review desk-token", "scope:token"),
    ("reviewer:desk-token", "scope must be one of"),
    ("review:   ", "scope:token"),
])
def test_bad_token_file_lines_are_config_errors(tmp_path: Path, text: str, match: str) -> None:
    f = tmp_path / "tokens"
    f.write_text(text + "\n")
    with pytest.raises(ConfigError, match=match) as err:
        TokenSet.from_config(ServeConfig(token_file=str(f)))
    assert err.value.field == "token_file"
    assert "desk-token" not in err.value.message  # the token itself is never echoed


def test_missing_token_file_is_a_config_error(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="cannot be read"):
        TokenSet.from_config(ServeConfig(token_file=str(tmp_path / "absent")))


def test_admin_implies_every_scope_but_review_does_not_imply_admin() -> None:
    tokens = TokenSet({"review": ["r"], "admin": ["a"], "predict": ["p"]})
    assert tokens.check("Bearer a", "review").is_admin
    assert tokens.check("Bearer a", "predict").is_admin
    with pytest.raises(Forbidden):
        tokens.check("Bearer r", "admin")
    with pytest.raises(Forbidden):
        tokens.check("Bearer r", "predict")  # predict tokens are configured, so predict is closed
    with pytest.raises(Forbidden):
        tokens.check("Bearer p", "review")


def test_predict_is_open_only_while_no_predict_token_is_configured() -> None:
    open_tokens = TokenSet({"review": ["r"]})
    assert open_tokens.check(None, "predict").id == "anonymous"
    assert open_tokens.check("Bearer r", "predict").id.startswith("t-")  # a known token is fine too
    with pytest.raises(Unauthorized):
        open_tokens.check("Bearer wrong", "predict")  # a wrong token is still wrong
    closed = TokenSet({"predict": ["p"]})
    with pytest.raises(Unauthorized):
        closed.check(None, "predict")


@pytest.mark.parametrize("header", [None, "", "Bearer", "Bearer ", "Basic cjpy", "Token r", "Bearer wrong"])
def test_missing_malformed_or_unknown_tokens_are_401(header: str | None) -> None:
    with pytest.raises(Unauthorized) as err:
        TokenSet({"review": ["r"]}).check(header, "review")
    assert err.value.status == 401 and err.value.field == "Authorization"


def test_comparison_is_constant_time_and_visits_every_token(monkeypatch: pytest.MonkeyPatch) -> None:
    """No early exit: every configured token is compared with hmac.compare_digest."""
    calls: list[tuple[bytes, bytes]] = []
    real = hmac.compare_digest

    def spy(a: Any, b: Any) -> bool:
        calls.append((a, b))
        return real(a, b)

    monkeypatch.setattr(auth.hmac, "compare_digest", spy)
    tokens = TokenSet({"review": ["first", "second"], "admin": ["third"]})
    tokens.check("Bearer first", "review")
    assert len(calls) == 3
    calls.clear()
    with pytest.raises(Unauthorized):
        tokens.check("Bearer nobody", "review")
    assert len(calls) == 3


def test_principal_is_a_fingerprint_not_the_token() -> None:
    p = TokenSet({"review": ["s3cret-desk-token"]}).check("Bearer s3cret-desk-token", "review")
    assert isinstance(p, Principal) and p.id.startswith("t-") and len(p.id) == 14
    assert "s3cret" not in p.id and "s3cret" not in repr(p)


def test_unknown_scope_is_a_programming_error() -> None:
    with pytest.raises(ValueError):
        require("superuser")
    with pytest.raises(ConfigError):
        TokenSet({"superuser": ["x"]})


@pytest.fixture()
def flask_app() -> Flask:
    app = Flask("auth-test")
    app.extensions[AUTH_EXTENSION] = TokenSet.from_config(ServeConfig(review_tokens="desk-token",
                                                                       admin_tokens="ops-token"))

    @app.errorhandler(DemurError)
    def _err(exc: DemurError) -> Any:
        status, headers, data = refusal(exc)  # the app's one error path (serve/web/predict_http.py)
        return data, status, [*headers, ("Content-Type", "application/json")]

    @app.get("/desk")
    @require("review")
    def desk() -> Any:
        return {"who": g.demur_principal.id}

    @app.get("/ops")
    @require("admin")
    def ops() -> Any:
        return {"ok": True}

    return app


def test_views_answer_401_with_challenge_403_and_200(flask_app: Flask, caplog: pytest.LogCaptureFixture) -> None:
    caplog.set_level(logging.DEBUG)
    c = flask_app.test_client()
    r = c.get("/desk")
    assert r.status_code == 401 and r.headers["WWW-Authenticate"].startswith("Bearer")
    assert r.json["error"]["field"] == "Authorization"
    r = c.get("/desk", headers={"Authorization": "Bearer not-a-token"})
    assert r.status_code == 401 and "not-a-token" not in r.get_data(as_text=True)
    r = c.get("/ops", headers={"Authorization": "Bearer desk-token"})
    assert r.status_code == 403 and "WWW-Authenticate" not in r.headers
    assert r.json["error"]["code"] == "forbidden"
    assert c.get("/desk", headers={"Authorization": "Bearer desk-token"}).json["who"].startswith("t-")
    assert c.get("/desk", headers={"Authorization": "Bearer ops-token"}).status_code == 200
    assert c.get("/ops", headers={"Authorization": "Bearer ops-token"}).status_code == 200
    assert "desk-token" not in caplog.text and "ops-token" not in caplog.text
