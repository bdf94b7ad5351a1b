"""serve/web/predict_http.py: the predict route's checks and headers, shared by both ways in.

References: RFC 9110 section 15.5.16 (415 Unsupported Media Type) with 8.4 (a content coding
the server does not accept: 415), 15.5.14 (413 Content
Too Large), 15.6.4 (503) with 10.2.3 (Retry-After: a delay in whole seconds); RFC 6750
section 3 (401 with a ``WWW-Authenticate: Bearer`` challenge, 403 for a missing scope).
"""

from __future__ import annotations

import pytest

from demur.serve.config import ServeConfig
from demur.serve.errors import DemurError, Overloaded
from demur.serve.web.auth import TokenSet
from demur.serve.web.predict_http import admit, model_headers, refusal, reply, retry_after

CFG = ServeConfig(max_body_bytes=100, queue_max_requests=2, request_timeout_s=3.0)
OPEN = TokenSet.from_config(CFG)
JSON = {"content-type": "application/json"}


def _admit(headers: dict[str, str], body: bytes, tokens: TokenSet = OPEN, waiting: int = 0):  # type: ignore[no-untyped-def]
    return admit(headers.get, body, tokens=tokens, config=CFG, waiting=waiting)


def _error(headers: dict[str, str], body: bytes, tokens: TokenSet = OPEN, waiting: int = 0) -> DemurError:
    with pytest.raises(DemurError) as info:
        _admit(headers, body, tokens, waiting)
    return info.value


def test_checks_in_order_each_naming_its_field() -> None:
    locked = TokenSet({"predict": ["depot-secret"]})
    e = _error({}, b"{", locked)
    assert (e.status, e.field) == (401, "Authorization")  # the token first, before anything is read
    assert (_error({"content-type": "text/plain"}, b"{}").status, _error({}, b"{}").field) == (415, "Content-Type")
    big = _error(JSON, b"x" * 101)
    assert big.status == 413 and big.field == "body" and "101 bytes" in big.message
    assert _error(JSON, b"{not json").status == 400
    full = _error(JSON, b"{}", waiting=2)
    assert isinstance(full, Overloaded) and full.status == 503


def test_a_content_coding_is_refused_naming_the_header() -> None:
    """A gzip body would otherwise be read as JSON and refused as malformed (a trial's finding)."""
    e = _error({**JSON, "content-encoding": "gzip"}, b"\x1f\x8b\x08")
    assert (e.status, e.field) == (415, "Content-Encoding") and "gzip" in e.message
    assert _admit({**JSON, "content-encoding": "identity"}, b"{}").body == {}


def test_admitted_request_names_its_caller_and_rows() -> None:
    locked = TokenSet({"predict": ["depot-secret"]})
    a = _admit({**JSON, "authorization": "Bearer depot-secret"}, b'{"cases": [[1], [2], [3]]}', locked)
    assert a.rows == 3 and a.caller is not None and "depot-secret" not in a.caller  # a fingerprint, not the token
    assert _admit(JSON, b'{"cases": 5}').caller is None and _admit(JSON, b'{"cases": 5}').rows == 1
    assert _admit({"content-type": "Application/JSON; charset=utf-8"}, b"{}").body == {}


def test_refusal_headers() -> None:
    status, headers, body = refusal(Overloaded("busy", retry_after_s=1.2))
    assert status == 503 and dict(headers)["Retry-After"] == "2"  # whole seconds, rounded up
    status, headers, _ = refusal(_error({}, b"", TokenSet({"predict": ["t"]})))
    assert status == 401 and dict(headers)["WWW-Authenticate"].startswith("Bearer")
    assert [retry_after(s) for s in (0.0, 0.2, 1.0, 4.5)] == ["1", "1", "1", "5"]
    assert b'"field":"Authorization"' in refusal(_error({}, b"", TokenSet({"predict": ["t"]})))[2]


def test_reply_encodes_hostile_text_and_names_the_model() -> None:
    class _Live:
        model = {"name": "postcode-digits", "version": "3", "checksum": "ab" * 32}

    status, headers, body = reply({"results": [{"case_id": "\ud800"}]}, _Live())
    assert status == 200 and b"\\ud800" in body  # escaped, never an encoding error
    assert ("Demur-Model-Version", "postcode-digits/3") in headers
    assert model_headers(None) == []
