"""The HTTP application: a Flask app factory around one ``Runtime``.

Request path (``POST /v1/predict``)::

    body bytes -> validation.parse_json -> validation.validate_predict (InputSpec of the live model)
      -> Runtime.runner(engine, x)  float32[S, B, K]
      -> summary.summarise -> decision.decide -> render.results
      -> review.enqueue(Answered) per-case annotations merged into the results
      -> metrics.observe_predict(...) -> orjson response

Seams for the components that plug in. ``create_app`` builds the configured review
router and metrics when none are passed; ``Runtime`` itself falls back to no-op hooks:

``review``   ``enqueue(answered: Answered) -> list[dict | None]`` (the ``ReviewHook`` of
             serve/core/pipeline.py): one annotation per case, merged into that case's
             result as-is, e.g. ``{"review_id": "r-..."}`` or ``{"review": {"queued": False,
             "reason": "..."}}``. If ``enqueue``
             raises, the predictions are still answered and every abstained case
             says ``{"review": {"queued": false, "reason": ...}}``.
``metrics``  ``observe_predict(x_raw=, summary=, decisions=, graph_seconds=, total_seconds=)``
             after every answered predict (``x_raw``: float32[B, *shape] validated inputs);
             optional ``bind_model(bundle, rule)``, called whenever a model goes live; optional
             ``observe_error(status=, code=, endpoint=)`` for every error answer.
``plugins``  anything with ``init_app(app)``; ``review`` and ``metrics`` get ``init_app``
             called too if they have it. That is where blueprints (``/v1/reviews``,
             ``/review``, ``/metrics``, admin routes) and extra hooks are registered.
             They reach the runtime through ``app.extensions["demur"]``.
``Runtime.runner``   ``(engine, x) -> draws``; the default calls ``engine.run``. Micro-batching
             replaces it with a batcher that gathers concurrent requests.
``Runtime.install(engine)``  loads, smoke-tests and atomically swaps in a new model
             (roll-outs). In-flight requests keep the ``Live`` they started with.
``Runtime.model_extras``  callables returning dicts merged into ``GET /v1/model``.

Errors: one handler maps ``DemurError.status`` to ``{"error": {"code", "message",
"field"}}``; werkzeug's HTTP errors (404, 405, 413) answer in the same shape; any
other exception is logged with its traceback and answered as a 500 without one.
Every response carries ``Demur-Model-Version`` and ``Demur-Model-Checksum`` headers
naming the model that was live (for predict: the one that produced the answer).
"""

from __future__ import annotations

import json
import logging
import threading
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import orjson
from flask import Flask, Response, g, request
from werkzeug.exceptions import HTTPException

from demur.serve.core import render
from demur.serve.web.admin import install_admin
from demur.serve.web.auth import ANONYMOUS as _ANONYMOUS
from demur.serve.web.auth import authenticate, install_auth
from demur.serve.web.batching import batching_runner
from demur.serve.core.bundle import load_bundle
from demur.serve.config import ServeConfig
from demur.serve.core.decision import DecisionRule, decide, rule_from
from demur.serve.adapters.engine import Engine
from demur.serve.errors import (
    BundleError,
    DemurError,
    InvalidInput,
    NotLoaded,
    PayloadTooLarge,
    UnsupportedMediaType,
)
from demur.serve.web.limits import install_limits
from demur.serve.adapters.metrics import Metrics
from demur.serve.core.pipeline import Answered
from demur.serve.core.summary import summarise
from demur.serve.core.validation import PredictRequest, parse_json, validate_predict

__all__ = ["CAUTION", "EXTENSION", "OPENAPI_PATH", "EngineHolder", "Live", "Runtime", "create_app", "json_response"]

EXTENSION = "demur"
"""Key of the ``Runtime`` in ``app.extensions``."""

OPENAPI_PATH = Path(__file__).with_name("openapi.json")

log = logging.getLogger("demur.app")


@dataclass(frozen=True)
class Live:
    """One served model: the loaded engine and what answering with it needs.
    Immutable; a roll-out replaces the whole object."""

    engine: Any
    rule: DecisionRule
    level: float
    model: dict[str, str]
    loaded_at: float

    @property
    def manifest(self) -> Any:
        return self.engine.manifest


class EngineHolder:
    """The slot holding the live model. Reads take no lock (one attribute read
    is atomic); ``swap`` is serialised so two roll-outs cannot interleave."""

    def __init__(self) -> None:
        self._live: Live | None = None
        self._lock = threading.Lock()
        self._listeners: list[Callable[[Live], None]] = []

    def subscribe(self, listener: Callable[[Live], None]) -> None:
        """Call ``listener(live)`` after every swap (metrics re-bind the model there)."""
        self._listeners.append(listener)

    @property
    def live(self) -> Live:
        live = self._live
        if live is None:
            raise NotLoaded("no model is loaded yet; the server is starting", field="model")
        return live

    @property
    def current(self) -> Any:
        """The live ``Engine``; ``NotLoaded`` before the first model is installed."""
        return self.live.engine

    @property
    def ready(self) -> bool:
        return self._live is not None

    def swap(self, live: Live) -> Live | None:
        """Put ``live`` in place; return the previous one (still usable by in-flight requests)."""
        with self._lock:
            old, self._live = self._live, live
            for listener in self._listeners:
                try:
                    listener(live)
                except Exception:  # a listener must not undo a roll-out
                    log.exception("model swap listener failed")
        return old


class _NoReview:
    """Default review hook: nothing is queued, and the result says so only for abstentions."""

    def enqueue(self, answered: Answered) -> list[dict[str, Any] | None]:
        return [{"review": {"queued": False, "reason": "no review queue is configured"}} if a else None
                for a in answered.decisions.abstain.tolist()]


class _NoMetrics:
    def observe_predict(self, **_: Any) -> None:
        return None

    def observe_error(self, **_: Any) -> None:
        return None


def _default_runner(engine: Any, x: np.ndarray) -> np.ndarray:
    return engine.run(x)


class Runtime:
    """Everything one app serves with: config, live model, hooks. Lives in
    ``app.extensions["demur"]``.

    Example::

        runtime = app.extensions["demur"]
        runtime.install(Engine(load_bundle("build/v2"), graph="stacked"))   # roll-out
    """

    def __init__(self, config: ServeConfig, *, review: Any = None, metrics: Any = None,
                 registry: Any = None) -> None:
        self.config = config
        self.engines = EngineHolder()
        self.review = review if review is not None else _NoReview()
        self.metrics = metrics if metrics is not None else _NoMetrics()
        self.registry = registry
        self.runner: Callable[[Any, np.ndarray], np.ndarray] = _default_runner
        if config.batch_wait_ms > 0:  # concurrent requests share one graph call (serve/web/batching.py)
            self.runner = batching_runner(config)
        self.model_extras: list[Callable[[], dict[str, Any]]] = []
        self.started_at = time.time()
        bind = getattr(self.metrics, "bind_model", None)
        if callable(bind):
            self.engines.subscribe(lambda live: bind(live.engine.bundle, live.rule))

    # -- models ------------------------------------------------------------------
    def build_engine(self, bundle_path: str | None = None) -> Engine:
        """An unloaded ``Engine`` for ``bundle_path`` (default: the configured bundle)."""
        path = bundle_path or self.config.bundle
        if not path:
            raise BundleError("no bundle configured: pass the bundle directory to demur serve", field="bundle")
        cfg = self.config
        return Engine(load_bundle(path), graph=cfg.graph, intra_threads=cfg.ort_intra_threads,
                      inter_threads=cfg.ort_inter_threads, seed=cfg.seed)

    def prepare(self, engine: Any) -> Live:
        """Load ``engine`` if needed, derive the rule, run a smoke prediction; return the ``Live``.

        Raises (``BundleError``, ``ConfigError``, ``GraphRunError``) without touching the
        live model, so a bad bundle is refused while the old one keeps serving.
        """
        if not getattr(engine, "loaded", False):
            engine.load()
        manifest = engine.manifest
        rule = rule_from(manifest, self.config)
        level = float(self.config.interval_level or manifest.interval_level)
        model = render.model_ref(manifest.model_name, manifest.model_version, engine.checksum)
        live = Live(engine=engine, rule=rule, level=level, model=model, loaded_at=time.time())
        self._smoke(live)
        return live

    def _smoke(self, live: Live) -> None:
        """One prediction on the training centre of every feature; the model must
        answer with the documented shape and finite numbers."""
        spec = live.manifest.inputs
        x = np.asarray(spec.center, dtype=np.float32).reshape((1, *spec.shape))
        draws = np.asarray(self.runner(live.engine, x))
        k = live.manifest.outputs
        if draws.ndim != 3 or draws.shape[1:] != (1, k) or not np.isfinite(draws).all():
            raise BundleError(
                f"smoke prediction failed: expected finite draws of shape [S, 1, {k}]; got shape "
                f"{list(draws.shape)}", field="bundle")
        summary = summarise(live.manifest.task, draws, live.level, live.manifest.target)
        decide(summary, live.rule)

    def install(self, engine: Any) -> Live | None:
        """Prepare ``engine`` and make it live; return the model it replaced."""
        live = self.prepare(engine)
        old = self.engines.swap(live)
        log.info("serving %s %s (%s, %s draws, %s)", live.model["name"], live.model["version"],
                 live.model["checksum"][:12], live.engine.draws, live.engine.kind)
        return old

    def start(self) -> Live:
        """Build, load and install the configured bundle (call after any fork)."""
        engine = self.build_engine()
        self.install(engine)
        return self.engines.live

    # -- answering ---------------------------------------------------------------
    def predict(self, body: Any) -> dict[str, Any]:
        """A parsed predict body -> the response dict (see serve/core/render.py); raises ``DemurError``."""
        _, (answer,) = self.answer([body])
        if isinstance(answer, DemurError):
            raise answer
        return answer

    def answer(self, bodies: list[Any], runner: Callable[[Any, np.ndarray], np.ndarray] | None = None,
               *, caller: str | None = None) -> tuple[Live, list[dict[str, Any] | DemurError]]:
        """Answer several parsed predict bodies with ONE graph run; return the model that
        answered and, per body in order, its response dict or the ``DemurError`` it earned.

        Why together: the graph call, the summaries, the decision, the review write and the
        metrics each cost a fixed overhead per call; the HTTP front (serve/web/front.py) hands
        over every request that arrived in one pass of its event loop. A body that fails
        validation gets its own error and does not touch the others. ``runner`` overrides
        ``self.runner`` (the front batches itself and calls the engine directly).
        """
        t0 = time.perf_counter()
        live = self.engines.live
        manifest = live.manifest
        answers: list[dict[str, Any] | DemurError] = []
        valid: list[tuple[int, Any]] = []
        for body in bodies:
            try:
                valid.append((len(answers), validate_predict(body, manifest.inputs, self.config.max_cases)))
                answers.append({})
            except DemurError as exc:
                answers.append(exc)
        if not valid:
            return live, answers
        req = valid[0][1] if len(valid) == 1 else PredictRequest(
            x=np.concatenate([r.x for _, r in valid]), case_ids=[c for _, r in valid for c in r.case_ids])
        t1 = time.perf_counter()
        draws = (runner or self.runner)(live.engine, req.x)
        t2 = time.perf_counter()
        summary = summarise(manifest.task, draws, live.level, manifest.target)
        decisions = decide(summary, live.rule)
        results = render.results(summary, decisions, live.rule, manifest.labels, req.case_ids)
        self._annotate(Answered(live, req, summary, decisions, results, caller))
        rule = {"score": live.rule.score, "threshold": live.rule.threshold, "source": live.rule.source}
        draw_count = int(np.shape(draws)[0])
        start = 0
        for i, r in valid:
            answers[i] = {"model": live.model, "results": results[start:start + r.size], "draws": draw_count,
                          "decision_rule": rule}
            start += r.size
        try:
            self.metrics.observe_predict(x_raw=req.x, summary=summary, decisions=decisions,
                                         graph_seconds=t2 - t1, total_seconds=time.perf_counter() - t0)
        except Exception:  # metrics must never cost an answer
            log.exception("metrics hook failed")
        return live, answers

    def _annotate(self, answered: Answered) -> None:
        results = answered.results
        try:
            notes = self.review.enqueue(answered)
            if len(notes) != len(results):
                raise ValueError(f"review hook returned {len(notes)} annotations for {len(results)} cases")
        except Exception as exc:  # a failing queue must not lose the predictions
            log.exception("review hook failed")
            reason = f"review queue failed: {type(exc).__name__}"
            notes = [{"review": {"queued": False, "reason": reason}} if a else None
                     for a in answered.decisions.abstain.tolist()]
        for result, note in zip(results, notes):
            if note:
                result.update(note)

    def describe(self) -> dict[str, Any]:
        """The body of ``GET /v1/model``."""
        live = self.engines.live
        m = live.manifest
        spec = m.inputs
        calibration = m.decision.calibration
        out: dict[str, Any] = {
            "model": {**live.model, "created": m.created},
            "task": m.task,
            "labels": list(m.labels),
            "inputs": {"kind": spec.kind, "shape": list(spec.shape), "names": list(spec.names),
                       "low": list(spec.low), "high": list(spec.high)},
            "target": dict(m.target) if m.task == "regression" else None,
            "posterior": m.posterior,
            "graph": live.engine.kind,
            "draws": live.engine.draws,
            "interval_level": live.level,
            "decision_rule": {"score": live.rule.score, "threshold": live.rule.threshold,
                              "source": live.rule.source},
            "calibration": calibration,
            "limits": {"max_cases": self.config.max_cases, "max_body_bytes": self.config.max_body_bytes},
            "caution": CAUTION,
        }
        for extra in self.model_extras:
            try:
                out.update(extra())
            except Exception:
                log.exception("model description extra failed")
        return out


CAUTION = ("demur's answers are advice from a statistical model: it supports, never replaces, qualified "
           "human judgement. Abstained cases must be decided by a person.")


def json_response(payload: Any, status: int = 200, headers: dict[str, str] | None = None) -> Response:
    """An orjson-encoded JSON response (NaN/inf would become null; our payloads hold none)."""
    try:
        data = orjson.dumps(payload)
    except orjson.JSONEncodeError:  # e.g. a lone surrogate echoed from a hostile key
        data = json.dumps(payload, ensure_ascii=True).encode("ascii")
    response = Response(data, status=status, mimetype="application/json")
    if headers:
        response.headers.update(headers)
    return response


def _error_body(code: str, message: str, field: str | None) -> dict[str, Any]:
    return {"error": {"code": code, "message": message, "field": field}}


def _http_code(exc: HTTPException) -> str:
    return (exc.name or "error").lower().replace(" ", "_").replace("'", "")


def create_app(
    config: ServeConfig,
    *,
    engine: Any = None,
    review: Any = None,
    metrics: Any = None,
    registry: Any = None,
    plugins: Iterable[Any] = (),
    start: bool = True,
) -> Flask:
    """Build the app. ``engine``: an ``Engine`` (loaded or not) to serve instead of
    ``config.bundle``. ``start=False`` leaves the model unloaded (``/readyz``
    answers 503) until ``app.extensions["demur"].start()`` or ``.install(...)``.

    Create it in each worker process after any fork: loading opens the
    onnxruntime sessions, and each worker needs its own random stream.

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
        from demur.serve.review.router import ReviewRouter

        review = ReviewRouter.from_config(config)
    runtime = Runtime(config, review=review, metrics=metrics, registry=registry)
    app.extensions[EXTENSION] = runtime
    openapi = OPENAPI_PATH.read_bytes()

    @app.post("/v1/predict")
    def predict() -> Response:
        principal = authenticate("predict")
        if request.mimetype != "application/json":
            got = request.content_type or "no Content-Type"
            raise UnsupportedMediaType(f"Content-Type must be application/json; got {got}", field="Content-Type")
        length = request.content_length
        if length is not None and length > config.max_body_bytes:
            raise PayloadTooLarge(f"body is {length} bytes; the limit is {config.max_body_bytes}", field="body")
        body = parse_json(request.get_data(cache=False))
        caller = None if principal is _ANONYMOUS else principal.id  # open predict: no caller
        live, (answer,) = runtime.answer([body], caller=caller)
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
        live = runtime.engines.live  # NotLoaded -> 503
        return json_response({"status": "ready", "model": live.model, "draws": live.engine.draws})

    @app.get("/openapi.json")
    def openapi_document() -> Response:
        return Response(openapi, mimetype="application/json")

    _install_errors(app, runtime)

    @app.after_request
    def _name_model(response: Response) -> Response:
        live = g.get("demur_live") or runtime.engines._live
        if live is not None:
            response.headers["Demur-Model-Version"] = f"{live.model['name']}/{live.model['version']}"
            response.headers["Demur-Model-Checksum"] = live.model["checksum"]
        return response

    install_auth(app, config)
    install_admin(app, config)
    for component in (review, metrics, *plugins):
        init = getattr(component, "init_app", None)
        if callable(init):
            init(app)
    install_limits(app, config)
    if engine is not None:
        runtime.install(engine)
    elif start:
        runtime.start()
    return app


def _install_errors(app: Flask, runtime: Runtime) -> None:
    def answer(status: int, code: str, message: str, field: str | None,
               headers: dict[str, str] | None = None) -> Response:
        observe = getattr(runtime.metrics, "observe_error", None)
        if callable(observe):
            try:
                observe(status=status, code=code, endpoint=request.endpoint)
            except Exception:
                log.exception("metrics hook failed")
        return json_response(_error_body(code, message, field), status, headers)

    @app.errorhandler(DemurError)
    def _demur(exc: DemurError) -> Response:
        if exc.status >= 500:
            log.warning("%s: %s", exc.code, exc.message)
        headers = {}
        retry = getattr(exc, "retry_after_s", None)
        if retry is not None:
            headers["Retry-After"] = str(max(1, int(np.ceil(retry))))
        return answer(exc.status, exc.code, exc.message, exc.field, headers)

    @app.errorhandler(HTTPException)
    def _http(exc: HTTPException) -> Response:
        status = exc.code or 500
        headers = {}
        if status == 413:
            return answer(413, PayloadTooLarge.code,
                          f"body is larger than the limit of {runtime.config.max_body_bytes} bytes", "body")
        if status == 405:
            allowed = exc.valid_methods if hasattr(exc, "valid_methods") else None  # type: ignore[attr-defined]
            if allowed:
                headers["Allow"] = ", ".join(allowed)
            message = f"{request.method} is not allowed on {request.path}"
            if allowed:
                message += f"; use {', '.join(m for m in allowed if m not in ('HEAD', 'OPTIONS'))}"
            return answer(405, "method_not_allowed", message, "method", headers)
        if status == 404:
            return answer(404, "not_found", f"no route {request.path}; see /openapi.json", "path")
        if status == 400 and isinstance(exc, InvalidInput):  # pragma: no cover - InvalidInput is not HTTP
            return answer(400, exc.code, exc.message, exc.field)
        return answer(status, _http_code(exc), exc.description or exc.name, None)

    @app.errorhandler(Exception)
    def _unexpected(exc: Exception) -> Response:
        log.error("unhandled error on %s %s", request.method, request.path, exc_info=exc)
        return answer(500, "internal", "internal error; the server log has the details", None)
