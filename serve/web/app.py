"""The Flask app: the routes other than the hot predict path, around one ``Runtime``.

The request pipeline (validation -> engine -> summary -> decision -> review -> metrics)
lives in serve/core/pipeline.py; the predict route's checks and headers in
serve/web/predict_http.py, shared with the loop front (serve/web/loop/), which answers
predict itself in production and hands every other route to this app.

Composition is explicit: ``create_app`` builds the metrics, the review queue, the tokens
and the engine loader from the config (or takes them as arguments, for tests), passes them
to the ``Runtime`` and registers their routes. The runtime lives in
``app.extensions["demur"]`` (``runtime_of(app)``).

Errors: one handler maps ``DemurError`` through ``predict_http.refusal`` to
``{"error": {"code", "message", "field"}}``; werkzeug's HTTP errors (404, 405, 413) answer in
the same shape; any other exception is logged with its traceback and answered as a 500
without one. Every response carries ``Demur-Model-Version`` and ``Demur-Model-Checksum``
naming the model that was live (for predict: the one that produced the answer).
"""

from __future__ import annotations

import logging
import time
from collections.abc import Iterable
from pathlib import Path
from typing import Any

from flask import Flask, Response, g, request
from werkzeug.exceptions import HTTPException

from demur.serve.adapters.compute import engine_loader
from demur.serve.adapters.metrics import Metrics
from demur.serve.web.metrics_http import install_metrics
from demur.serve.config import ServeConfig
from demur.serve.core.pipeline import CAUTION, Runtime
from demur.serve.errors import DemurError, PayloadTooLarge, Refused, internal_error
from demur.serve.review.router import ReviewRouter
from demur.serve.web import predict_http
from demur.serve.web.admin import install_admin
from demur.serve.web.apidoc import bound_document
from demur.serve.web.auth import AUTH_EXTENSION, TokenSet
from demur.serve.web.limits import install_limits

__all__ = ["CAUTION", "EXTENSION", "OPENAPI_PATH", "create_app", "json_response", "runtime_of"]

EXTENSION = "demur"
"""Key of the ``Runtime`` in ``app.extensions``."""

OPENAPI_PATH = Path(__file__).with_name("openapi.json")

log = logging.getLogger("demur.app")


def runtime_of(app: Flask) -> Runtime:
    """The ``Runtime`` an app built by ``create_app`` serves with."""
    return app.extensions[EXTENSION]


def json_response(payload: Any, status: int = 200, headers: list[tuple[str, str]] | dict[str, str] | None = None
                  ) -> Response:
    """A JSON response (orjson; a lone surrogate echoed from a hostile key is escaped)."""
    response = Response(predict_http.encode(payload), status=status, mimetype="application/json")
    if headers:
        response.headers.extend(list(headers.items()) if isinstance(headers, dict) else headers)
    return response


def create_app(
    config: ServeConfig,
    *,
    engine: Any = None,
    review: Any = None,
    metrics: Metrics | None = None,
    registry: Any = None,
    tokens: TokenSet | None = None,
    plugins: Iterable[Any] = (),
    start: bool = True,
) -> Flask:
    """Build the app. ``engine``: an ``Engine`` (loaded or not) to serve instead of
    ``config.bundle``. ``review``: a ``ReviewHook`` (default: the queue named by config);
    ``metrics``: a ``Metrics`` (default: a fresh one in ``registry``). ``plugins``: objects
    with ``init_app(app)`` that add routes. ``start=False`` leaves the model unloaded
    (``/readyz`` answers 503) until ``runtime_of(app).start()`` or ``.install(...)``.

    Create it in each worker process after any fork: loading opens the onnxruntime
    sessions, and each worker needs its own random stream.

    Example::

        app = create_app(build_config(flags={"bundle": "build/digits-radial"}))
        app.test_client().post("/v1/predict", json={"cases": [[0] * 64]})
    """
    # no implicit /static route; root_path given because ``demur`` is a namespace package
    app = Flask("demur", static_folder=None, root_path=str(Path(__file__).parent))
    app.config["MAX_CONTENT_LENGTH"] = config.max_body_bytes
    if metrics is None:  # the app owns its metrics, in its own registry (a fresh one unless given)
        metrics = Metrics(config, registry=registry)
    if review is None:  # the review queue named by config (SQLite under data_dir by default)
        review = ReviewRouter.from_config(config)
    tokens = tokens if tokens is not None else TokenSet.from_config(config)
    app.extensions[AUTH_EXTENSION] = tokens
    runtime = Runtime(config, load_engine=engine_loader(config), review=review, metrics=metrics)
    app.extensions[EXTENSION] = runtime
    openapi = OPENAPI_PATH.read_bytes()

    @app.post("/v1/predict")
    def predict() -> Response:
        body = request.get_data(cache=False)
        admitted = predict_http.admit(request.headers.get, body, tokens=tokens, config=config)
        live, (answer,) = runtime.answer([admitted.body], caller=admitted.caller)
        g.demur_live = live
        if isinstance(answer, DemurError):
            raise answer
        return json_response(answer)

    @app.get("/v1/model")
    def model() -> Response:
        return json_response(runtime.describe())

    @app.get("/healthz")
    def healthz() -> Response:
        return json_response({"status": "alive", "uptime_s": round(time.time() - runtime.started_at, 3)})

    @app.get("/readyz")
    def readyz() -> Response:
        live = runtime.slot.live  # NotLoaded -> 503
        return json_response({"status": "ready", "model": live.model, "draws": live.engine.draws})

    @app.get("/openapi.json")
    def openapi_document() -> Response:  # the file bound to the model serving (serve/web/apidoc.py)
        return Response(bound_document(openapi, runtime.slot.current, config.max_cases), mimetype="application/json")

    _install_errors(app, runtime)

    @app.after_request
    def _name_model(response: Response) -> Response:
        response.headers.extend(predict_http.model_headers(g.get("demur_live") or runtime.slot.current))
        return response

    install_admin(app, config)
    router = review if isinstance(review, ReviewRouter) else None  # a test may pass a bare ReviewHook
    if router is not None:
        router.install(app, runtime, metrics)
    install_metrics(app, metrics, runtime, router)
    for plugin in plugins:
        plugin.init_app(app)
    install_limits(app, config)
    if engine is not None:
        runtime.install(engine)
    elif start:
        runtime.start()
    return app


def _install_errors(app: Flask, runtime: Runtime) -> None:
    def answer(exc: DemurError, headers: list[tuple[str, str]] | None = None) -> Response:
        runtime.monitor.observe_error(status=exc.status, code=exc.code, endpoint=request.endpoint)
        status, extra, data = predict_http.refusal(exc)
        response = Response(data, status=status, mimetype="application/json")
        response.headers.extend([*extra, *(headers or [])])
        return response

    @app.errorhandler(DemurError)
    def _demur(exc: DemurError) -> Response:
        if exc.status >= 500:
            log.warning("%s: %s", exc.code, exc.message)
        return answer(exc)

    @app.errorhandler(HTTPException)
    def _http(exc: HTTPException) -> Response:
        status = exc.code or 500
        if status == 413:
            return answer(PayloadTooLarge(
                f"body is larger than the limit of {runtime.config.max_body_bytes} bytes", field="body"))
        if status == 405:
            allowed = [m for m in (getattr(exc, "valid_methods", None) or [])]
            message = f"{request.method} is not allowed on {request.path}"
            if allowed:
                message += f"; use {', '.join(m for m in allowed if m not in ('HEAD', 'OPTIONS'))}"
            return answer(Refused(405, "method_not_allowed", message, "method"),
                          [("Allow", ", ".join(allowed))] if allowed else None)
        if status == 404:
            return answer(Refused(404, "not_found", f"no route {request.path}; see /openapi.json", "path"))
        code = (exc.name or "error").lower().replace(" ", "_").replace("'", "")
        return answer(Refused(status, code, exc.description or exc.name, None))

    @app.errorhandler(Exception)
    def _unexpected(exc: Exception) -> Response:
        log.error("unhandled error on %s %s", request.method, request.path, exc_info=exc)
        return answer(internal_error())


