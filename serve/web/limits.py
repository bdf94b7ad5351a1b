"""Hygiene on every Flask response: security headers, the body-size cap, debug off.

Back-pressure for predict is the loop front's admission bound (serve/web/predict_http.py,
``queue_max_requests``); there is no second gate here.
"""

from __future__ import annotations

from typing import Any

from demur.serve.config import ServeConfig

__all__ = ["SECURITY_HEADERS", "install_limits"]

SECURITY_HEADERS: dict[str, str] = {
    "X-Content-Type-Options": "nosniff",
    "X-Frame-Options": "DENY",
    "Referrer-Policy": "no-referrer",
    "Cross-Origin-Opener-Policy": "same-origin",
    "Cross-Origin-Resource-Policy": "same-origin",
    "Permissions-Policy": "camera=(), microphone=(), geolocation=()",
    # One strict policy for every response: no inline script or style anywhere (the
    # reviewer page loads its script and style from /review/assets), nothing from
    # elsewhere, no framing, no forms posting anywhere.
    "Content-Security-Policy": (
        "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self' data:; "
        "connect-src 'self'; base-uri 'none'; form-action 'none'; frame-ancestors 'none'"
    ),
}
"""Headers added to every response (common practice; values from memory of the
OWASP secure-headers recommendations)."""

def install_limits(app: Any, config: ServeConfig) -> None:
    """Body cap, debug off and security headers for every response of ``app``."""
    app.debug = False
    app.config["MAX_CONTENT_LENGTH"] = config.max_body_bytes
    app.config["PROPAGATE_EXCEPTIONS"] = False

    # Built once: eight ``setdefault`` calls per response each scan the header
    # list, so the hook checks the (few) headers a view set once and adds the
    # missing ones in one ``extend``. A view's own value still wins (the review
    # page sets a stricter Content-Security-Policy).
    added = tuple({**SECURITY_HEADERS, "Cache-Control": "no-store"}.items())
    names = frozenset(key.lower() for key, _ in added)

    @app.after_request
    def _headers(response: Any) -> Any:
        headers = response.headers
        present = {key.lower() for key, _ in headers} & names
        headers.extend([item for item in added if item[0].lower() not in present] if present else added)
        return response

