"""``POST /v1/predict`` as bytes in, bytes out: every check and header of the route, written once.

Both ways in use this module and nothing else: the loop front (serve/web/loop/), which
batches admitted requests across one pass of its event loop, and the Flask route
(serve/web/app.py), used by the test client and tools. Neither builds an error body, a
``Retry-After`` or a ``WWW-Authenticate`` of its own. No framework is imported here.

What a predict request meets, in order::

    Authorization (predict scope)                401 / 403
    Content-Type: application/json (or application/x-npy)   415
    no Content-Encoding (or identity)            415
    body size <= max_body_bytes                  413
    JSON (or .npy, serve/core/npy_body.py)       400
    admission: fewer than queue_max_requests     503 + Retry-After
      waiting in this worker
    -> Runtime.answer (validation, graph, summary, decision, review, metrics)

Example::

    admitted = admit(headers.get, body, tokens=tokens, config=config, waiting=len(pending))
    live, (answer,) = runtime.answer([admitted.body], caller=admitted.caller)
    status, headers, data = reply(answer, live)
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import orjson

from demur.serve.config import ServeConfig
from demur.serve.errors import DemurError, Overloaded, PayloadTooLarge, UnsupportedMediaType
from demur.serve.core.npy_body import NPY_MEDIA_TYPE, ArrayBody, parse_npy
from demur.serve.core.validation import parse_json
from demur.serve.web.auth import CHALLENGE, TokenSet

__all__ = ["PREDICT_PATH", "Admitted", "admit", "encode", "model_headers", "refusal", "reply", "retry_after"]

PREDICT_PATH = "/v1/predict"

Headers = list[tuple[str, str]]


@dataclass(frozen=True)
class Admitted:
    """A predict request that passed every check before the pipeline.

    ``body``: the parsed JSON; ``caller``: the token's fingerprint (None when predict is
    open); ``rows``: the cases it carries (for the batch row cap; 1 if not a list)."""

    body: Any
    caller: str | None
    rows: int


def admit(header: Callable[[str], str | None], body: bytes, *, tokens: TokenSet, config: ServeConfig,
          waiting: int = 0) -> Admitted:
    """Run the checks above on one request; raise the ``DemurError`` it earns.

    ``header(name)``: the request's header value by lower-case name, or None.
    ``waiting``: predict requests already admitted and not yet answered in this worker.
    """
    principal = tokens.check(header("authorization"), "predict")
    ctype = header("content-type")
    media = (ctype or "").split(";", 1)[0].strip().lower()
    if media not in ("application/json", NPY_MEDIA_TYPE):
        raise UnsupportedMediaType(f"Content-Type must be application/json (or {NPY_MEDIA_TYPE}: the cases as one "
                                   f"NumPy .npy array); got {ctype or 'no Content-Type'}", field="Content-Type")
    coding = (header("content-encoding") or "").strip()
    if coding and coding.lower() != "identity":  # RFC 9110, 8.4: a coding the server does not support is a 415
        raise UnsupportedMediaType(f"the body is read as sent: Content-Encoding {coding[:40]!r} is not supported; "
                                   "send it uncompressed", field="Content-Encoding")
    if len(body) > config.max_body_bytes:
        raise PayloadTooLarge(f"body is {len(body)} bytes; the limit is {config.max_body_bytes}", field="body")
    if media == NPY_MEDIA_TYPE:
        return _admit_array(parse_npy(body), principal, tokens, config, waiting)
    parsed = parse_json(body)
    if waiting >= config.queue_max_requests:
        raise Overloaded(f"server is at capacity: {waiting} requests waiting (limit {config.queue_max_requests}); "
                         "retry later", retry_after_s=config.request_timeout_s / 2)
    cases = parsed.get("cases") if isinstance(parsed, dict) else None
    caller = principal.id if tokens.configured("predict") else None
    return Admitted(parsed, caller, len(cases) if isinstance(cases, list) else 1)


def _admit_array(parsed: ArrayBody, principal: Any, tokens: TokenSet, config: ServeConfig,
                 waiting: int) -> Admitted:
    """The admission step of a binary (.npy) body, as for JSON above."""
    if waiting >= config.queue_max_requests:
        raise Overloaded(f"server is at capacity: {waiting} requests waiting (limit {config.queue_max_requests}); "
                         "retry later", retry_after_s=config.request_timeout_s / 2)
    return Admitted(parsed, principal.id if tokens.configured("predict") else None, parsed.rows)


def encode(payload: Any) -> bytes:
    """JSON bytes; a lone surrogate echoed from a hostile key is escaped, never an error."""
    try:
        return orjson.dumps(payload)
    except orjson.JSONEncodeError:
        return json.dumps(payload, ensure_ascii=True).encode("ascii")


def retry_after(seconds: float) -> str:
    """``Retry-After`` in whole seconds, rounded up, at least 1 (RFC 9110, section 10.2.3)."""
    return str(max(1, math.ceil(seconds)))


def model_headers(live: Any) -> Headers:
    """The headers naming the model that answered (names are checked at bundle load)."""
    if live is None:
        return []
    m = live.model
    return [("Demur-Model-Version", f"{m['name']}/{m['version']}"), ("Demur-Model-Checksum", m["checksum"])]


def refusal(exc: DemurError) -> tuple[int, Headers, bytes]:
    """The answer for an error: the one JSON shape, plus ``Retry-After`` on 503 overload and
    ``WWW-Authenticate`` on 401."""
    headers: Headers = []
    retry = getattr(exc, "retry_after_s", None)
    if retry is not None:
        headers.append(("Retry-After", retry_after(float(retry))))
    if exc.status == 401:
        headers.append(("WWW-Authenticate", CHALLENGE))
    return exc.status, headers, encode(exc.to_payload())


def reply(answer: dict[str, Any] | DemurError, live: Any) -> tuple[int, Headers, bytes]:
    """The answer of one predict request that reached the pipeline, with the model headers."""
    if isinstance(answer, DemurError):
        status, headers, data = refusal(answer)
    else:
        status, headers, data = 200, [], encode(answer)
    return status, [*headers, *model_headers(live)], data
