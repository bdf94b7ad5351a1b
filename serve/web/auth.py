"""Bearer tokens with scopes: who may predict, review and administer.

Three scopes:

- ``predict``: ``POST /v1/predict``. Optional: when no predict token is
  configured the route is open (a service inside a private network often needs
  no token to be asked for a prediction).
- ``review``: everything under ``/v1/reviews`` (the reviewer page itself loads
  without a token; its API calls carry one).
- ``admin``: model roll-out and other operator routes. **Admin implies every
  other scope**: an operator can see and settle the review queue (for example
  decide an item someone else claimed and left) and can call predict. A review
  or predict token never implies admin.

Tokens come from the frozen ``ServeConfig``: ``predict_tokens``,
``review_tokens``, ``admin_tokens`` (comma-separated, usually set through the
``DEMUR_*_TOKENS`` environment variables) and ``token_file``, whose lines are
``scope:token`` (blank lines and lines starting with ``#`` are skipped). A
token may be listed under several scopes.

A presented token is compared with *every* configured token with
``hmac.compare_digest``, without stopping at the first match, so the time taken
does not reveal which token (or how much of one) matched. Tokens are never
logged and never put in error messages; a reviewer is identified by a short
fingerprint of their token (``principal``), which is what the review store
records as the claimant.

Usage in a Flask view::

    @bp.post("/v1/reviews/claim")
    @require("review")
    def claim():
        who = g.demur_principal   # e.g. "t-3f9c2a71be04"
"""

from __future__ import annotations

import functools
import hashlib
import hmac
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TypeVar

from demur.serve.config import ServeConfig
from demur.serve.errors import ConfigError, Forbidden, Unauthorized

__all__ = [
    "AUTH_EXTENSION",
    "CHALLENGE",
    "SCOPES",
    "Principal",
    "TokenSet",
    "authenticate",
    "require",
    "tokens_of",
]

SCOPES = ("predict", "review", "admin")
AUTH_EXTENSION = "demur.auth"
"""Key under ``app.extensions`` where the app's ``TokenSet`` lives."""

CHALLENGE = 'Bearer realm="demur"'
"""The ``WWW-Authenticate`` value of every 401 (RFC 6750's bearer scheme)."""

_F = TypeVar("_F", bound=Callable[..., Any])


@dataclass(frozen=True)
class Principal:
    """Who made a request: a fingerprint of their token and the scopes it grants."""

    id: str
    scopes: frozenset[str]

    @property
    def is_admin(self) -> bool:
        return "admin" in self.scopes


ANONYMOUS = Principal(id="anonymous", scopes=frozenset())


def _fingerprint(token: str) -> str:
    return "t-" + hashlib.sha256(token.encode("utf-8")).hexdigest()[:12]


class TokenSet:
    """The configured tokens, by scope.

    ``tokens`` maps scope -> tokens. Empty strings are ignored.

    Example::

        tokens = TokenSet({"review": ["s3cret"], "admin": ["root-token"]})
        tokens.check("Bearer s3cret", "review").id   # 't-...'
    """

    def __init__(self, tokens: Mapping[str, Iterable[str]]) -> None:
        entries: list[tuple[bytes, str]] = []
        for scope, values in tokens.items():
            if scope not in SCOPES:
                raise ConfigError(f"token scope must be one of {', '.join(SCOPES)}; got '{scope}'",
                                  field="token_file")
            for value in values:
                value = value.strip()
                if value:
                    entries.append((value.encode("utf-8"), scope))
        self._entries = tuple(entries)
        self._configured = frozenset(scope for _, scope in entries)

    @classmethod
    def from_config(cls, config: ServeConfig) -> TokenSet:
        """Tokens from the config's comma-separated fields and its ``token_file``."""
        tokens: dict[str, list[str]] = {scope: [] for scope in SCOPES}
        for scope in SCOPES:
            tokens[scope] += str(getattr(config, f"{scope}_tokens")).split(",")
        if config.token_file:
            path = Path(config.token_file)
            try:
                text = path.read_text(encoding="utf-8")
            except OSError as exc:
                raise ConfigError(f"token_file {path} cannot be read: {exc.strerror}", field="token_file") from None
            for number, line in enumerate(text.splitlines(), start=1):
                line = line.strip()
                if not line or line.startswith("#"):
                    continue
                scope, sep, token = line.partition(":")
                if not sep or not token.strip():
                    raise ConfigError(
                        f"token_file {path} line {number} must look like 'scope:token'; "
                        "got a line without ':' or with an empty token", field="token_file")
                if scope.strip() not in SCOPES:
                    raise ConfigError(
                        f"token_file {path} line {number}: scope must be one of {', '.join(SCOPES)}; "
                        f"got '{scope.strip()}'", field="token_file")
                tokens[scope.strip()].append(token)
        return cls(tokens)

    def configured(self, scope: str) -> bool:
        """Whether any token grants ``scope`` (predict is open when none does)."""
        return scope in self._configured

    def identify(self, token: str) -> Principal | None:
        """The principal for a presented token, or ``None`` if it is unknown.

        Every configured token is compared (constant-time per comparison, no
        early exit), so timing does not depend on which one matched.
        """
        presented = token.encode("utf-8")
        scopes: set[str] = set()
        for known, scope in self._entries:
            if hmac.compare_digest(presented, known):
                scopes.add(scope)
        if not scopes:
            return None
        if "admin" in scopes:
            scopes.update(SCOPES)
        return Principal(id=_fingerprint(token), scopes=frozenset(scopes))

    def check(self, authorization: str | None, scope: str) -> Principal:
        """Authorise a request's ``Authorization`` header for ``scope``.

        Raises ``Unauthorized`` (401) for a missing, malformed or unknown
        token and ``Forbidden`` (403) for a valid token without the scope.
        """
        if scope not in SCOPES:
            raise ValueError(f"scope must be one of {SCOPES}; got {scope!r}")
        if scope == "predict" and not self.configured("predict") and not authorization:
            return ANONYMOUS
        if not authorization:
            raise Unauthorized(f"this route needs a bearer token with the '{scope}' scope; "
                               "got no Authorization header", field="Authorization")
        kind, _, token = authorization.strip().partition(" ")
        if kind.lower() != "bearer" or not token.strip():
            raise Unauthorized("the Authorization header must be 'Bearer <token>'; got another form",
                               field="Authorization")
        principal = self.identify(token.strip())
        if principal is None:
            raise Unauthorized("the bearer token is not recognised", field="Authorization")
        if scope not in principal.scopes:
            if scope == "predict" and not self.configured("predict"):
                return principal
            raise Forbidden(f"the token does not grant the '{scope}' scope", field="Authorization")
        return principal


def tokens_of(app: Any) -> TokenSet:
    """The ``TokenSet`` an app built by ``create_app`` checks requests against."""
    return app.extensions[AUTH_EXTENSION]


def authenticate(scope: str) -> Principal:
    """Check the current Flask request for ``scope``; return and record the principal."""
    from flask import current_app, g, request

    principal = tokens_of(current_app).check(request.headers.get("Authorization"), scope)
    g.demur_principal = principal
    return principal


def require(scope: str) -> Callable[[_F], _F]:
    """Decorator for Flask views: the request must carry a token granting ``scope``."""
    if scope not in SCOPES:
        raise ValueError(f"scope must be one of {SCOPES}; got {scope!r}")

    def wrap(view: _F) -> _F:
        @functools.wraps(view)
        def guarded(*args: Any, **kwargs: Any) -> Any:
            authenticate(scope)
            return view(*args, **kwargs)

        return guarded  # type: ignore[return-value]

    return wrap
