"""The predict pipeline, free of any framework: one place where a parsed request becomes an answer.

Data flows one way::

    parsed body -> validation.validate_predict (InputSpec of the live model)
      -> runner(engine, x)             float32[S, B, K]
      -> summary.summarise -> decision.ServedRule.decide -> render.results
      -> review.enqueue(Answered)      one annotation per case, merged into its result
      -> metrics.observe_predict(...)  -> response dicts

Every HTTP front only turns bytes into a call of ``Runtime.answer`` and its result back
into bytes (serve/web/predict_http.py). The review queue and the metrics are hooks with a
typed protocol (``ReviewHook``, ``MetricsHook``), passed in by the app factory; nothing here
probes for attributes. The engine is built by a factory the app passes in, so this module
imports no onnxruntime.

Example::

    runtime = Runtime(config, load_engine=lambda path: Engine(load_bundle(path)))
    runtime.start()
    live, answers = runtime.answer([{"cases": [[0.0] * 64]}])
"""

from __future__ import annotations

import functools
import logging
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np

from demur.serve.config import ServeConfig
from demur.serve.core import render
from demur.serve.core.decision import DecisionRule, ServedRule, Verdicts, rule_from
from demur.serve.core.summary import Summary, summarise
from demur.serve.core.support import support_from_manifest
from demur.serve.core.validation import PredictRequest, validate_predict
from demur.serve.errors import BundleError, DemurError, GraphRunError, NotLoaded, OutputNotFinite

__all__ = [
    "CAUTION",
    "Answered",
    "Live",
    "MetricsHook",
    "ModelSlot",
    "ReviewHook",
    "Runtime",
]

log = logging.getLogger("demur.pipeline")

CAUTION = ("demur's answers are advice from a statistical model: it supports, never replaces, qualified "
           "human judgement. Abstained cases must be decided by a person.")


@dataclass(frozen=True)
class Live:
    """One served model: the loaded engine and what answering with it needs.
    Immutable; a roll-out replaces the whole object."""

    engine: Any
    served: ServedRule  # the one rule: support check, then score vs threshold (core/decision.py)
    level: float
    model: dict[str, str]
    loaded_at: float

    @property
    def rule(self) -> DecisionRule:
        return self.served.rule

    @property
    def support(self) -> Any:
        """The support check (demur.serve.core.support.SupportCheck), None for a bundle without one."""
        return self.served.support

    @property
    def manifest(self) -> Any:
        return self.engine.manifest

    @functools.cached_property
    def decision_rule(self) -> dict[str, Any]:
        """The rule in force as every answer and ``GET /v1/model`` show it, built once per model."""
        return {"score": self.rule.score, "threshold": self.rule.threshold, "source": self.rule.source}


@dataclass(frozen=True)
class Answered:
    """One graph run's cases, answered: what the review hook needs to queue them.

    ``request.x`` holds the validated raw inputs float32[B, *shape] and ``request.case_ids``
    the client ids (str or None); ``results`` the rendered per-case dicts the client receives
    (the reviewer sees the same figures); ``caller`` names the token that asked (its
    fingerprint), or None when predict is open.
    """

    live: Live
    request: PredictRequest
    summary: Summary
    decisions: Verdicts
    results: list[dict[str, Any]]
    caller: str | None = None


class ReviewHook(Protocol):
    """What the pipeline calls after deciding. ``enqueue`` returns one annotation per case,
    merged into that case's result: ``{"review_id": ...}``, ``{"review": {"queued": False,
    "reason": ...}}`` or None. It must not raise for a store fault (the pipeline still guards)."""

    def enqueue(self, answered: Answered) -> list[dict[str, Any] | None]: ...


class MetricsHook(Protocol):
    """Everything the pipeline and the fronts report (serve/adapters/metrics.py implements it).
    Callers go through ``Runtime.monitor``, which guards every call once."""

    def bind_model(self, bundle: Any, rule: DecisionRule) -> None: ...

    def observe_predict(self, *, x_raw: np.ndarray, summary: Summary, decisions: Verdicts,
                        graph_seconds: float, total_seconds: float) -> None: ...

    def observe_error(self, *, status: int, code: str, endpoint: str | None) -> None: ...

    def observe_request(self, route: str, method: str, status: int, seconds: float) -> None: ...

    def observe_connection_refused(self) -> None: ...


class _NoReview:
    """No queue configured: nothing is queued, and every abstention says so."""

    def enqueue(self, answered: Answered) -> list[dict[str, Any] | None]:
        return [{"review": {"queued": False, "reason": "no review queue is configured"}} if a else None
                for a in answered.decisions.abstain.tolist()]


class _NoMetrics:
    def bind_model(self, bundle: Any, rule: DecisionRule) -> None:
        return None

    def observe_predict(self, **_: Any) -> None:
        return None

    def observe_error(self, **_: Any) -> None:
        return None

    def observe_request(self, route: str, method: str, status: int, seconds: float) -> None:
        return None

    def observe_connection_refused(self) -> None:
        return None


class _Guarded:
    """The metrics hook behind one guard: a failing metric is logged, never costs an answer,
    a connection or a roll-out. Every caller (pipeline, fronts, error handler) goes through it."""

    def __init__(self, hook: MetricsHook) -> None:
        self.hook = hook

    def _call(self, fn: Callable[..., None], *args: Any, **kwargs: Any) -> None:
        try:
            fn(*args, **kwargs)
        except Exception:  # metrics must never cost an answer
            log.exception("metrics hook failed")

    def bind_model(self, bundle: Any, rule: DecisionRule) -> None:
        self._call(self.hook.bind_model, bundle, rule)

    def observe_predict(self, *, x_raw: np.ndarray, summary: Summary, decisions: Verdicts,
                        graph_seconds: float, total_seconds: float) -> None:
        self._call(self.hook.observe_predict, x_raw=x_raw, summary=summary, decisions=decisions,
                   graph_seconds=graph_seconds, total_seconds=total_seconds)

    def observe_error(self, *, status: int, code: str, endpoint: str | None) -> None:
        self._call(self.hook.observe_error, status=status, code=code, endpoint=endpoint)

    def observe_request(self, route: str, method: str, status: int, seconds: float) -> None:
        self._call(self.hook.observe_request, route, method, status, seconds)

    def observe_connection_refused(self) -> None:
        self._call(self.hook.observe_connection_refused)


class ModelSlot:
    """The slot holding the live model. Reads take no lock (one attribute read is
    atomic); ``swap`` is serialised so two roll-outs cannot interleave."""

    def __init__(self) -> None:
        self._live: Live | None = None
        self._lock = threading.Lock()
        self._listeners: list[Callable[[Live], None]] = []

    def subscribe(self, listener: Callable[[Live], None]) -> None:
        """Call ``listener(live)`` after every swap."""
        self._listeners.append(listener)

    @property
    def live(self) -> Live:
        """The live model; ``NotLoaded`` (503) before the first one is installed."""
        live = self._live
        if live is None:
            raise NotLoaded("no model is loaded yet; the server is starting", field="model")
        return live

    @property
    def current(self) -> Live | None:
        """The live model or None (for headers and sizing, which must not raise)."""
        return self._live

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


def _run_engine(engine: Any, x: np.ndarray) -> np.ndarray:
    return engine.run(x)


def _check_finite(draws: np.ndarray) -> None:
    """``OutputNotFinite`` naming the cases of ``draws`` [S, B, K] with a NaN or infinite draw (also
    given the standardised cases as [1, B, F]: a finite value far past the training range can
    standardise to infinity, (x - center) / scale in float32)."""
    with np.errstate(over="ignore", invalid="ignore"):
        total = draws.sum()
    if np.isfinite(total):  # one reduction: NaN and infinity propagate into a sum
        return
    cases = np.flatnonzero(~np.isfinite(draws).all(axis=(0, 2))).tolist()
    if not cases:  # every draw finite; only their sum overflowed
        return
    raise _not_finite(cases, f"{len(cases)} case(s)")


def _not_finite(cases: list[int], which: str) -> OutputNotFinite:
    return OutputNotFinite(
        f"the model's output is not a finite number for {which}: their inputs overflow the graph's float32 "
        "arithmetic (values far beyond the training data); send values in the range the model was trained on",
        field=f"cases[{cases[0]}]", cases=cases)


def _refuse_bodies(valid: list[tuple[int, PredictRequest]], exc: OutputNotFinite,
                   answers: list[dict[str, Any] | DemurError]) -> list[tuple[int, PredictRequest]]:
    """The bodies of ``valid`` holding none of ``exc.cases``; each other body gets its own 422 naming
    its first such case (its own index), so one body's overflow never refuses another's cases."""
    keep, start, bad = [], 0, set(exc.cases)
    for i, r in valid:
        mine = [j - start for j in range(start, start + r.size) if j in bad]
        start += r.size
        if not mine:
            keep.append((i, r))
            continue
        answers[i] = _not_finite(mine, f"case(s) {mine[:10]}")
    return keep


class Runtime:
    """Everything one server process answers with: config, the live model slot, the hooks.

    ``load_engine(path)`` returns an unloaded engine for a bundle directory (the app factory
    passes one over onnxruntime). ``model_extras`` add keys to the model description.
    """

    def __init__(self, config: ServeConfig, *, load_engine: Callable[[str], Any] | None = None,
                 review: ReviewHook | None = None, metrics: MetricsHook | None = None) -> None:
        self.config = config
        self.slot = ModelSlot()
        self.review: ReviewHook = review if review is not None else _NoReview()
        self.metrics: MetricsHook = metrics if metrics is not None else _NoMetrics()
        self.monitor: MetricsHook = _Guarded(self.metrics)  # how everyone reports: one guard
        self._load_engine = load_engine
        self.model_extras: list[Callable[[], dict[str, Any]]] = []
        self.started_at = time.time()
        self.slot.subscribe(lambda live: self.monitor.bind_model(live.engine.bundle, live.rule))

    # -- models ------------------------------------------------------------------
    def build_engine(self, bundle_path: str | None = None) -> Any:
        """An unloaded engine for ``bundle_path`` (default: the configured bundle)."""
        path = bundle_path or self.config.bundle
        if not path:
            raise BundleError("no bundle configured: pass the bundle directory to demur serve", field="bundle")
        if self._load_engine is None:
            raise BundleError("this runtime was built without an engine loader", field="bundle")
        return self._load_engine(path)

    def prepare(self, engine: Any) -> Live:
        """Load ``engine`` if needed, derive the rule, run a smoke prediction; return the ``Live``.

        Raises (``BundleError``, ``ConfigError``, ``GraphRunError``) without touching the
        live model, so a bad bundle is refused while the old one keeps serving.
        """
        if not engine.loaded:
            engine.load()
        manifest = engine.manifest
        rule = rule_from(manifest, self.config)
        level = float(self.config.interval_level or manifest.interval_level)
        model = render.model_ref(manifest.model_name, manifest.model_version, engine.checksum)
        live = Live(engine=engine, served=ServedRule(rule, support_from_manifest(manifest)), level=level,
                    model=model, loaded_at=time.time())
        self._smoke(live)
        return live

    def _smoke(self, live: Live) -> None:
        """One prediction on the training centre of every feature; the model must answer
        with the documented shape and finite numbers."""
        spec = live.manifest.inputs
        x = np.asarray(spec.center, dtype=np.float32).reshape((1, *spec.shape))
        draws = np.asarray(live.engine.run(x))
        k = live.manifest.outputs
        if draws.ndim != 3 or draws.shape[1:] != (1, k) or not np.isfinite(draws).all():
            raise BundleError(
                f"smoke prediction failed: expected finite draws of shape [S, 1, {k}]; got shape "
                f"{list(draws.shape)}", field="bundle")
        live.served.decide(summarise(live.manifest.task, draws, live.level, live.manifest.target), x)

    def install(self, engine: Any) -> Live | None:
        """Prepare ``engine`` and make it live; return the model it replaced."""
        live = self.prepare(engine)
        old = self.slot.swap(live)
        log.info("serving %s %s (%s, %s draws, %s)", live.model["name"], live.model["version"],
                 live.model["checksum"][:12], live.engine.draws, live.engine.kind)
        return old

    def start(self) -> Live:
        """Build, load and install the configured bundle (call after any fork)."""
        self.install(self.build_engine())
        return self.slot.live

    # -- answering ---------------------------------------------------------------
    def answer(self, bodies: list[Any], *, caller: str | None = None
               ) -> tuple[Live, list[dict[str, Any] | DemurError]]:
        """Answer several parsed predict bodies with ONE graph run; return the model that
        answered and, per body in order, its response dict or the ``DemurError`` it earned.

        Why together: the graph call, the summaries, the decision, the review write and the
        metrics each cost a fixed overhead per call; the HTTP front hands over every request
        that arrived in one pass of its event loop. A body that fails validation gets its own
        error and does not touch the others. ``caller``: the token fingerprint of the batch
        (the front batches per caller), for review quotas.
        """
        t0 = time.perf_counter()
        live = self.slot.live
        manifest = live.manifest
        answers: list[dict[str, Any] | DemurError] = []
        valid: list[tuple[int, PredictRequest]] = []
        for body in bodies:
            try:
                valid.append((len(answers), validate_predict(body, manifest.inputs, self.config.max_cases)))
                answers.append({})
            except DemurError as exc:
                answers.append(exc)
        for _ in range(2):  # a second pass only without the bodies whose cases the graph cannot carry
            if not valid:
                return live, answers
            req = valid[0][1] if len(valid) == 1 else PredictRequest(
                x=np.concatenate([r.x for _, r in valid]), case_ids=[c for _, r in valid for c in r.case_ids])
            try:
                answered = self.answer_request(req, caller=caller, live=live, started=t0)
                break
            except OutputNotFinite as exc:
                valid = _refuse_bodies(valid, exc, answers)
        else:  # pragma: no cover - the second pass holds only cases the first found finite
            raise GraphRunError("the graph's output changed between two runs on the same cases")
        draw_count = answered.summary.draws
        start = 0
        for i, r in valid:
            answers[i] = {"model": live.model, "results": answered.results[start:start + r.size],
                          "draws": draw_count, "decision_rule": live.decision_rule}
            start += r.size
        return live, answers

    def answer_request(self, req: PredictRequest, *, caller: str | None = None, live: Live | None = None,
                       started: float | None = None, rendered: bool = True) -> Answered:
        """Answer cases already validated at their boundary (``answer`` for HTTP bodies,
        demur.serve.offline.scoring for file rows) with one graph run: engine -> summary ->
        decision (support check first) -> render -> review hook -> metrics hook. The one
        place a case is decided, so a file scored offline gets the server's decisions.
        ``live``: the model to answer with (default: the live one); ``started``: the
        ``time.perf_counter()`` at which the request arrived, for the metrics.
        ``rendered=False`` skips the response dicts and with them the review hook, which
        reads them (``results`` is empty): for the offline scorer without a review queue,
        which writes its columns from ``summary`` and ``decisions``."""
        t0 = time.perf_counter() if started is None else started
        live = live if live is not None else self.slot.live
        manifest = live.manifest
        t1 = time.perf_counter()
        x_std = live.engine.standardise(req.x)   # once: the graph and the support check read it
        _check_finite(x_std.reshape(1, req.size, -1))   # a value that standardises past float32: no graph run
        draws = live.engine.run_standardised(x_std)
        t2 = time.perf_counter()
        if draws.ndim != 3 or draws.shape[1] != req.size:
            raise GraphRunError(f"the graph returned draws of shape {list(draws.shape)} for {req.size} cases")
        _check_finite(draws)
        summary = summarise(manifest.task, draws, live.level, manifest.target)
        decisions = live.served.decide(summary, req.x, x_std)
        if not rendered:
            answered = Answered(live, req, summary, decisions, [], caller)
        else:
            results = render.results(summary, decisions, live.rule, manifest.labels, req.case_ids)
            answered = Answered(live, req, summary, decisions, results, caller)
            self._annotate(answered)
        self.monitor.observe_predict(x_raw=req.x, summary=summary, decisions=decisions,
                                     graph_seconds=t2 - t1, total_seconds=time.perf_counter() - t0)
        return answered

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
        live = self.slot.live
        m = live.manifest
        spec = m.inputs
        out: dict[str, Any] = {
            "model": {**live.model, "created": m.created},
            "task": m.task,
            "labels": list(m.labels),
            "inputs": {"kind": spec.kind, "shape": list(spec.shape), "names": list(spec.names),
                       "low": list(spec.low), "high": list(spec.high)},
            "target": dict(m.target) if m.task == "regression" else None,
            "posterior": m.posterior,
            "graph": live.engine.kind,
            "computation": (m.raw.get("graphs", {}).get(live.engine.kind) or {}).get("computation"),
            "draws": live.engine.draws,
            "interval_level": live.level,
            "decision_rule": live.decision_rule,
            "calibration": m.decision.calibration,
            "support": live.support.describe() if live.support is not None else {
                "checked": False, "reason": "this bundle has no support record (exported before the support "
                                            "check existed): cases are not tested against the training data; "
                                            "re-export it"},
            "limits": {"max_cases": self.config.max_cases, "max_body_bytes": self.config.max_body_bytes},
            "caution": CAUTION,
        }
        for extra in self.model_extras:
            try:
                out.update(extra())
            except Exception:
                log.exception("model description extra failed")
        return out
