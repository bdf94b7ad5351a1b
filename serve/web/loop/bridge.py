"""The loop front's bridge to the Flask app: every route but predict runs there, in a thread pool.

Why a bridge and not a second server: each route is defined once (serve/web/app.py), and the
review API, /metrics, /v1/model and admin routes are light and rare next to predict. The
environ follows PEP 3333; headers whose names hold ``_`` are dropped (they would alias the
``-`` form, as gunicorn does), ``SCRIPT_NAME`` is always empty, and ``REMOTE_ADDR`` is the
client as the front resolved it (a configured proxy's ``X-Forwarded-For``, else the peer).
"""

from __future__ import annotations

import io
import sys
from typing import Any
from urllib.parse import unquote_to_bytes

from demur.serve.web.loop.connection import Request

__all__ = ["call_app", "environ_for"]


def environ_for(req: Request, peer_port: int, server_name: str, server_port: str) -> dict[str, Any]:
    """The WSGI environ of ``req``."""
    environ: dict[str, Any] = {
        "REQUEST_METHOD": req.method.decode("latin-1"),
        "SCRIPT_NAME": "",
        "PATH_INFO": unquote_to_bytes(req.path).decode("latin-1"),
        "QUERY_STRING": req.query.decode("latin-1"),
        "SERVER_NAME": server_name,
        "SERVER_PORT": server_port,
        "SERVER_PROTOCOL": f"HTTP/{req.version}",
        "REMOTE_ADDR": req.client,
        "REMOTE_PORT": str(peer_port),
        "wsgi.version": (1, 0),
        "wsgi.url_scheme": "http",
        "wsgi.input": io.BytesIO(req.body),
        "wsgi.input_terminated": True,
        "wsgi.errors": sys.stderr,
        "wsgi.multithread": True,
        "wsgi.multiprocess": True,
        "wsgi.run_once": False,
        "CONTENT_LENGTH": str(len(req.body)),
    }
    for name, value in req.headers:
        key = name.decode("latin-1").upper()
        if "_" in key:
            continue
        text = value.decode("latin-1")
        if key == "CONTENT-TYPE":
            environ["CONTENT_TYPE"] = text
        elif key != "CONTENT-LENGTH":
            key = "HTTP_" + key.replace("-", "_")
            environ[key] = f"{environ[key]},{text}" if key in environ else text
    return environ


def call_app(app: Any, environ: dict[str, Any]) -> tuple[int, list[tuple[str, str]], bytes]:
    """Run the WSGI ``app`` on ``environ``; return status, headers and the whole body."""
    captured: dict[str, Any] = {}

    def start_response(status: str, headers: list[tuple[str, str]], exc_info: Any = None) -> Any:
        captured["status"], captured["headers"] = status, headers
        return lambda chunk: captured.setdefault("written", []).append(chunk)

    result = app(environ, start_response)
    try:
        body = b"".join([*captured.pop("written", []), *result])
    finally:
        close = getattr(result, "close", None)
        if callable(close):
            close()
    return int(str(captured["status"]).split(" ", 1)[0]), list(captured["headers"]), body
