"""Prometheus metrics: what the server has done, and whether the model is still fit to decide.

Every name starts with ``demur_`` and follows Prometheus conventions (base
units, ``_total`` counters, ``_seconds`` histograms). The metrics live in a
``CollectorRegistry`` handed in by the app (``registry=``), so every test
builds a fresh one.

==================================  =========  =========================================
name                                type       meaning
==================================  =========  =========================================
demur_http_requests_total           counter    requests by route, method and status
demur_http_request_duration_seconds histogram  wall time per request, by route
demur_http_errors_total             counter    error answers by error code
demur_cases_total                   counter    cases decided, by decision (accept/abstain)
demur_abstentions_total             counter    abstentions by reason: ``score`` (uncertainty above the
                                               threshold) or ``outside_training_data`` (support check)
demur_graph_run_duration_seconds    histogram  onnxruntime time per batch
demur_predict_duration_seconds      histogram  predict path time per batch (graph + summary + decision)
demur_batch_cases                   histogram  cases per predict batch
demur_decision_score                histogram  the decision score per case, label ``score``
demur_mutual_information_nats       histogram  mutual information per case (nats)
demur_decision_threshold            gauge      threshold in force, label ``score``
demur_calibrated_abstain_ratio      gauge      abstention rate expected from calibration
demur_model_info                    info       name, version, checksum of the served bundle
demur_abstain_ratio                 gauge      abstentions / decisions over the recent window
demur_abstain_window_cases          gauge      decisions in that window
demur_abstain_window_abstentions    gauge      abstentions in that window
demur_drift_feature_psi             gauge      PSI per input feature, label ``feature`` (at most 256: past that, a
                                               fixed random sample of the features, serve/core/drift.py)
demur_drift_psi_max                 gauge      largest feature PSI
demur_drift_score_ks                gauge      KS statistic, recent scores vs calibration scores
demur_drift_score_ks_critical       gauge      KS value noise alone exceeds with probability 0.001
demur_drift_window_cases            gauge      cases in the drift window
demur_review_queue_cases            gauge      review items by status (from the review router)
demur_review_enqueue_failures_total counter    abstentions the review queue did not accept
demur_review_not_queued_total       counter    abstentions not queued on purpose, label ``reason``:
                                               backlog_full, quota, rejected (set aside)
demur_review_replay_errors_total    counter    spool replay passes that failed (not outages)
demur_review_pending_ceiling        gauge      the ceiling on pending review items (0: none)
==================================  =========  =========================================

Label values come from fixed sets, whatever a client sends: ``method`` is one of
``METHODS`` or ``other``; ``route`` is a route template of the app (or ``/v1/predict``,
``unmatched``), anything else ``other``; ``status`` is a three-digit code; ``reason``
and ``code`` are names defined here and in serve/errors.py. (Prometheus keeps one series
per label set; a label a client can choose is a memory leak on the server and on
Prometheus, see prometheus.io/docs/practices/naming, "Labels".)

The abstention window is count-based: the last ``config.abstain_window``
decisions (default 1000), so ``demur_abstain_ratio`` gives an instant view
while ``rate(demur_cases_total[...])`` gives the time-based one.
The drift window is the last ``config.drift_window`` cases (default 500);
see serve/core/drift.py. PSI needs a full-ish window to mean anything (an empty
bin in a small window costs about 0.7 on its own), so alerts also require
``demur_drift_window_cases`` to be large enough.

Several worker processes (``demur serve --workers N``) use prometheus-client's
multiprocess mode, switched on when ``config.metrics_multiprocess_dir`` is
set: counters and histograms are summed over workers, exactly. Windows are
per process:

- abstention window: each worker publishes its window's decisions and
  abstentions (``livesum``); ``demur_abstain_ratio`` is computed at scrape time
  from the pooled sums, so it is the ratio over every live worker's last
  ``abstain_window`` decisions;
- drift: each worker keeps its own window and publishes its PSI and KS (and
  the KS critical value for its window) when it answers a scrape and, while
  it serves, at most once a second (``PUBLISH_EVERY_S``: a worker's figures
  are at most its last second of cases behind); the scrape shows the largest value over live
  workers (``livemax``), an alarm on the worst worker. Workers take connections from one shared socket, so each
  window is a sample of the same recent traffic; ``demur_drift_window_cases``
  is the smallest window among them (``livemin``).
- model info, threshold and calibrated ratio come from the worker that
  answers the scrape (all workers load the same bundle).

Why multiprocess rather than threads only: onnxruntime releases the GIL
while a graph runs, so threads in one process already overlap graph runs,
but summaries, decisions and JSON encoding hold it; on hosts with more cores
than one process can keep busy, workers scale further. Both are supported;
one process with threads is the default and gives exact windows.

Example::

    metrics = Metrics(config, registry=CollectorRegistry())
    metrics.bind_model(bundle, rule)          # or create_app(...): binds to the app's live model
    metrics.observe_predict(x_raw, summary, decisions, graph_seconds=0.004, total_seconds=0.006)
    body, content_type = metrics.exposition()
"""

from __future__ import annotations

import glob
import logging
import os
import threading
import time
from collections.abc import Callable, Iterable, Iterator, Mapping
from typing import Any

import numpy as np
from prometheus_client import CONTENT_TYPE_LATEST, CollectorRegistry, Counter, Gauge, Histogram, generate_latest
from prometheus_client import values as _prom_values
from prometheus_client.core import GaugeMetricFamily, InfoMetricFamily, Metric
from prometheus_client.multiprocess import MultiProcessCollector, mark_process_dead

from demur.serve.adapters.audit_metrics import AuditCollector, Certificate
from demur.serve.config import ServeConfig
from demur.serve.core.abstention import AbstainWindow
from demur.serve.core.drift import DriftMonitor
from demur.serve.errors import DemurError

__all__ = [
    "BATCH_BUCKETS",
    "LATENCY_BUCKETS_S",
    "METHODS",
    "PREFIX",
    "PUBLISH_EVERY_S",
    "SCORE_BUCKETS",
    "Metrics",
    "calibrated_abstain_ratio",
    "clear_multiprocess_dir",
    "enable_multiprocess",
    "worker_exit",
]

PREFIX = "demur"

LATENCY_BUCKETS_S = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)
BATCH_BUCKETS = (1, 2, 4, 8, 16, 32, 64, 128, 256, 512, 1024)
SCORE_BUCKETS = (1e-6, 3e-6, 1e-5, 3e-5, 1e-4, 3e-4, 0.001, 0.003, 0.01, 0.03, 0.1, 0.2, 0.35, 0.5, 0.75,
                 1.0, 1.5, 2.5, 5.0)
"""Decision scores and mutual information are >= 0; MI for K classes is at most ln K (2.30 nats for 10).
Log-spaced at the low end: a confident model's MI on clean inputs is often 1e-5 nats or less."""

METHODS = frozenset({"GET", "HEAD", "POST", "PUT", "DELETE", "PATCH", "OPTIONS"})
"""HTTP methods kept as ``method`` label values; any other method is counted as ``other``."""
_BASE_ROUTES = frozenset({"/v1/predict", "unmatched"})
_NOT_QUEUED = ("backlog_full", "quota", "rejected")

PUBLISH_EVERY_S = 1.0
"""In multiprocess mode a worker writes its drift figures for the others' scrapes at most this often."""

_ENV = "PROMETHEUS_MULTIPROC_DIR"

log = logging.getLogger("demur.metrics")


def enable_multiprocess(path: str) -> None:
    """Switch prometheus-client to multiprocess mode, writing into ``path``. Idempotent.

    prometheus-client chooses its value storage from ``PROMETHEUS_MULTIPROC_DIR``
    when it is first imported; ``demur serve`` imports it before it knows the
    setting, so this sets the variable and swaps the storage class. Call it
    before any metric is created (``Metrics`` does, from the config).
    """
    os.makedirs(path, exist_ok=True)
    os.environ[_ENV] = path
    if not getattr(_prom_values.ValueClass, "_multiprocess", False):
        _prom_values.ValueClass = _prom_values.MultiProcessValue()


def clear_multiprocess_dir(path: str) -> None:
    """Remove the previous run's files; the server calls this once, before workers start."""
    os.makedirs(path, exist_ok=True)
    for f in glob.glob(os.path.join(path, "*.db")):
        os.remove(f)


def worker_exit(pid: int, path: str) -> None:
    """Drop a dead worker's ``live*`` gauges (gunicorn's ``child_exit`` hook calls this)."""
    mark_process_dead(pid, path)


class Metrics:
    """The app's metrics. Constructors store; ``bind_model`` says which bundle is served.

    ``config`` supplies the window sizes and the multiprocess directory;
    ``registry`` is where the metrics live (a fresh ``CollectorRegistry`` when
    not given); ``review`` is the review router, read at scrape time for queue
    depths (optional; ``attach`` takes the app's review router when none is given).
    """

    def __init__(self, config: ServeConfig, *, registry: CollectorRegistry | None = None, review: Any = None) -> None:
        self.config = config
        self.registry = registry if registry is not None else CollectorRegistry()
        self.multiprocess_dir = config.metrics_multiprocess_dir or ""
        if self.multiprocess_dir:
            enable_multiprocess(self.multiprocess_dir)
        self._review = review
        self._runtime: Any = None
        self._model: dict[str, str] = {}
        self._rule: Any = None
        self._calibrated_ratio: float | None = None
        self._certificate: Certificate | None = None
        self._audit = AuditCollector(self._audit_tallies, lambda: self._certificate)
        self._drift: DriftMonitor | None = None
        self._feature_names: list[str] = []
        self._published_at = -float("inf")
        self._lock = threading.Lock()
        self._window = AbstainWindow(config.abstain_window)  # count-based, under self._lock
        # Labelled children, looked up once per label set: ``labels()`` costs
        # about 10 us a call (argument checks, a lock), several times per
        # request. Safe to keep because these metrics are never cleared.
        self._children: dict[tuple[Any, ...], Any] = {}
        self._routes: frozenset[str] = _BASE_ROUTES
        self._route_source: Callable[[], Iterable[str]] | None = None
        self._build(self.registry)
        self.registry.register(_StateCollector(self, pooled_from=None))

    # ------------------------------------------------------------------ metric objects
    def _build(self, reg: CollectorRegistry) -> None:
        p = PREFIX
        self.requests = Counter(f"{p}_http_requests",
                                "HTTP requests answered, by route template, method and status.",
                                ["route", "method", "status"], registry=reg)
        self.request_seconds = Histogram(f"{p}_http_request_duration_seconds",
                                         "Wall time to answer a request (seconds).",
                                         ["route"], buckets=LATENCY_BUCKETS_S, registry=reg)
        self.cases = Counter(f"{p}_cases", "Cases decided, by decision (accept or abstain).", ["decision"],
                             registry=reg)
        self.abstentions = Counter(f"{p}_abstentions",
                                   "Abstentions by reason: score (above the threshold) or outside_training_data "
                                   "(the support check, serve/core/support.py).", ["reason"], registry=reg)
        self.graph_seconds = Histogram(f"{p}_graph_run_duration_seconds",
                                       "onnxruntime time per predict batch (seconds).",
                                       buckets=LATENCY_BUCKETS_S, registry=reg)
        self.predict_seconds = Histogram(f"{p}_predict_duration_seconds",
                                         "Predict path time per batch: graph run, summaries, decisions (seconds).",
                                         buckets=LATENCY_BUCKETS_S, registry=reg)
        self.batch_cases = Histogram(f"{p}_batch_cases", "Cases per predict batch.", buckets=BATCH_BUCKETS,
                                     registry=reg)
        self.score = Histogram(f"{p}_decision_score", "Decision score per case (unit depends on the score).",
                               ["score"], buckets=SCORE_BUCKETS, registry=reg)
        self.mutual_information = Histogram(f"{p}_mutual_information_nats",
                                            "Mutual information between prediction and weights per case (nats).",
                                            buckets=SCORE_BUCKETS, registry=reg)
        self.errors = Counter(f"{p}_http_errors", "Error answers, by error code (see serve/errors.py).", ["code"],
                              registry=reg)
        self.enqueue_failures = Counter(f"{p}_review_enqueue_failures",
                                        "Abstained cases the review queue did not accept at once (spooled or lost).",
                                        registry=reg)
        self._connections_refused = Counter(f"{p}_http_connections_refused",
                                            "Connections the loop front refused (worker_connections reached).",
                                            registry=reg)
        self.not_queued = Counter(f"{p}_review_not_queued",
                                  "Abstained cases not queued on purpose, by reason (backlog_full: the pending "
                                  "ceiling; quota: the caller's per-minute quota; rejected: set aside as unstorable).",
                                  ["reason"], registry=reg)
        for reason in _NOT_QUEUED:  # every series from 0, so increase() sees the first event
            self.not_queued.labels(reason)
        self.replay_errors = Counter(f"{p}_review_replay_errors",
                                     "Spool replay passes that failed with anything but a store outage.", registry=reg)
        # per-process windows, published for the multiprocess merge
        self.abstain_window_cases = Gauge(f"{p}_abstain_window_cases",
                                          "Decisions in the recent abstention window (summed over workers).",
                                          multiprocess_mode="livesum", registry=reg)
        self.abstain_window_abstentions = Gauge(f"{p}_abstain_window_abstentions",
                                                "Abstentions in the recent abstention window (summed over workers).",
                                                multiprocess_mode="livesum", registry=reg)
        self.feature_psi = Gauge(f"{p}_drift_feature_psi",
                                 "Population Stability Index of a feature, recent window vs training reference "
                                 "(largest over workers).", ["feature"], multiprocess_mode="livemax", registry=reg)
        self.psi_max = Gauge(f"{p}_drift_psi_max", "Largest feature PSI (largest over workers).",
                             multiprocess_mode="livemax", registry=reg)
        self.score_ks = Gauge(f"{p}_drift_score_ks",
                              "Two-sample Kolmogorov-Smirnov statistic, recent decision scores vs calibration-time "
                              "scores (largest over workers).", multiprocess_mode="livemax", registry=reg)
        self.score_ks_critical = Gauge(f"{p}_drift_score_ks_critical",
                                       "KS statistic that sampling noise alone exceeds with probability 0.001, "
                                       "for this window and reference size (largest over workers).",
                                       multiprocess_mode="livemax", registry=reg)
        self.drift_window_cases = Gauge(f"{p}_drift_window_cases",
                                        "Cases in the drift window (smallest over workers).",
                                        multiprocess_mode="livemin", registry=reg)

    # ------------------------------------------------------------------ binding
    def bind_model(self, bundle: Any, rule: Any) -> None:
        """Serve ``bundle`` (a ``demur.serve.core.bundle.Bundle``) with decision ``rule``; resets the drift window."""
        m = bundle.manifest
        with self._lock:
            self._model = {"name": m.model_name, "version": m.model_version, "checksum": bundle.checksum}
            self._rule = rule
            ref = dict(m.drift_reference or {})
            score_ref = ref.get("score") or {}
            if score_ref.get("name") not in (None, rule.score):
                ref["score"] = {}  # scores on another scale: no KS rather than a wrong one
            feats = ref.get("features") or {}
            edges, indices = feats.get("edges", []), feats.get("indices")
            monitored = list(range(m.inputs.size)) if indices is None else [int(i) for i in indices]
            if edges and (len(edges) != len(monitored) or any(not 0 <= i < m.inputs.size for i in monitored)):
                log.warning("drift_reference has %d features but the inputs have %d; feature drift is off",
                            len(edges), m.inputs.size)
                ref["features"], monitored = {}, []
            self._drift = DriftMonitor(ref, self.config.drift_window) if ref else None
            self._feature_names = [m.inputs.names[i] for i in monitored]
            self._calibrated_ratio = calibrated_abstain_ratio(m, rule)
            # the certificate covers the calibrated rule only: none for an overridden threshold or score
            same_rule = rule.threshold == m.decision.threshold and rule.score == m.decision.score
            cert = m.decision.certificate if m.task == "classification" and same_rule else None
            self._certificate = None if cert is None else Certificate(bundle.checksum, *cert)
        if not self.multiprocess_dir:  # (the client cannot clear labels in multiprocess mode)
            self.feature_psi.clear()
        self.refresh()

    def _audit_tallies(self) -> list[Any]:
        """The shared store's per-model audit tallies (none without a review router)."""
        store = getattr(self._review, "store", None)
        return [] if store is None else list(store.audit_tallies())

    def _bind_from_runtime(self, rule: Any = None) -> None:
        """Bind to the app's live model (after ``attach``); no-op before one is live."""
        runtime = self._runtime
        live = runtime.slot.current if runtime is not None else None
        if live is not None:
            self.bind_model(live.engine.bundle, rule if rule is not None else live.rule)

    # ------------------------------------------------------------------ observing
    def observe_error(self, *, status: int, code: str, endpoint: str | None) -> None:
        """The app's hook for every error answer: counted by its machine code."""
        self.errors.labels(code=str(code)).inc()

    def observe_predict(self, x_raw: np.ndarray, summary: Any, decisions: Any,
                        graph_seconds: float, total_seconds: float) -> None:
        """Record one answered predict batch (vectorised over its B cases); the app calls it.

        ``x_raw``: float[B, ...] inputs before standardisation (flattened per case);
        ``summary``: a ``demur.serve.core.summary`` summary; ``decisions``: ``demur.serve.core.decision.Verdicts``;
        ``graph_seconds`` / ``total_seconds``: wall time of the graph run and of the whole batch.
        """
        abstain = np.asarray(decisions.abstain, dtype=bool).ravel()
        scores = np.asarray(decisions.score, dtype=np.float64).ravel()
        b = int(abstain.size)
        if b == 0:
            return
        n_abstain = int(abstain.sum())
        if n_abstain:
            self._child(self.cases, "abstain").inc(n_abstain)
            outside = getattr(decisions, "outside", None)
            n_outside = int(np.count_nonzero(outside)) if outside is not None else 0
            if n_outside:
                self._child(self.abstentions, "outside_training_data").inc(n_outside)
            if n_abstain - n_outside:
                self._child(self.abstentions, "score").inc(n_abstain - n_outside)
        if b - n_abstain:
            self._child(self.cases, "accept").inc(b - n_abstain)
        self.graph_seconds.observe(float(graph_seconds))
        self.predict_seconds.observe(float(total_seconds))
        self.batch_cases.observe(b)
        score_name = self._rule.score if self._rule is not None else "unknown"
        _observe_each(self._child(self.score, score_name), scores)
        mi = getattr(summary, "mutual_information", None)
        if mi is not None:
            _observe_each(self.mutual_information, np.asarray(mi, dtype=np.float64).ravel())
        with self._lock:
            self._window.push(abstain)
            cases, abst = self._window.cases, self._window.abstentions
        self.abstain_window_cases.set(cases)
        self.abstain_window_abstentions.set(abst)
        drift = self._drift
        if drift is not None:
            drift.observe(np.asarray(x_raw, dtype=np.float64).reshape(b, -1), scores)
            if self.multiprocess_dir:  # other workers answer scrapes: publish now and then
                now = time.monotonic()
                with self._lock:
                    due = now - self._published_at >= PUBLISH_EVERY_S
                    if due:
                        self._published_at = now
                if due:
                    self._publish_drift()

    def observe_request(self, route: str, method: str, status: int, seconds: float) -> None:
        """Record one answered HTTP request (the app's ``after_request`` hook calls this).
        ``route`` and ``method`` are mapped onto fixed sets (see the module docstring)."""
        if route not in self._routes:
            route = self._route_label(route)
        if method not in METHODS:
            method = "other"
        code = int(status) if 100 <= int(status) <= 599 else 0
        self._child(self.requests, route, method, str(code)).inc()
        self._child(self.request_seconds, route).observe(max(0.0, float(seconds)))

    def _route_label(self, route: str) -> str:
        """``route`` if it is one of the app's route templates, else ``other``. The app's
        routes are listed again only when an unknown name shows up (blueprints register late)."""
        if self._route_source is not None:
            self._routes = _BASE_ROUTES | set(self._route_source())
        return route if route in self._routes else "other"

    def _child(self, metric: Any, *values: str) -> Any:
        """``metric.labels(*values)``, cached (a dict read after the first call)."""
        key = (id(metric), *values)
        child = self._children.get(key)
        if child is None:
            child = self._children[key] = metric.labels(*values)
        return child

    def observe_connection_refused(self) -> None:
        """A connection the loop front refused (worker_connections reached)."""
        self._connections_refused.inc()
    def review_event(self, name: str, n: int = 1) -> None:
        """The review router's events: ``backlog_full`` / ``quota`` / ``rejected`` (cases not
        queued, ``n`` of them) and ``replay_error``; any other name is ignored."""
        if n <= 0:
            return
        if name == "replay_error":
            self.replay_errors.inc(n)
        elif name in _NOT_QUEUED:
            self._child(self.not_queued, name).inc(n)

    def review_enqueue_failed(self, n: int = 1) -> None:
        """Count abstained cases that the review queue did not accept at once."""
        if n > 0:
            self.enqueue_failures.inc(n)

    # ------------------------------------------------------------------ reading
    def abstain_ratio(self) -> float:
        """Abstentions / decisions in this process' window (0 before any decision)."""
        with self._lock:
            return self._window.ratio

    def refresh(self) -> None:
        """Bring this process' drift gauges up to date (called at scrape time)."""
        if not self._model:
            self._bind_from_runtime()
        self._publish_drift()

    def _publish_drift(self) -> None:
        drift = self._drift
        if drift is None:
            return
        psi = drift.feature_psi()
        names = self._feature_names if len(self._feature_names) == psi.size else [f"x{j}" for j in range(psi.size)]
        for name, value in zip(names, psi.tolist()):
            self.feature_psi.labels(feature=name).set(value)
        self.psi_max.set(float(psi.max()) if psi.size else 0.0)
        ks = drift.score_ks()
        self.score_ks.set(0.0 if np.isnan(ks) else ks)
        crit = drift.score_ks_critical()
        self.score_ks_critical.set(1.0 if np.isnan(crit) else crit)  # KS <= 1: no alert without data
        self.drift_window_cases.set(drift.filled)

    def exposition(self) -> tuple[bytes, str]:
        """The body and content type of ``GET /metrics`` (text exposition format 0.0.4)."""
        self.refresh()
        if not self.multiprocess_dir:
            return generate_latest(self.registry), CONTENT_TYPE_LATEST
        scrape = CollectorRegistry(auto_describe=False)
        merged = MultiProcessCollector(None, path=self.multiprocess_dir)
        scrape.register(_StateCollector(self, pooled_from=merged))
        return generate_latest(scrape), CONTENT_TYPE_LATEST

    # ------------------------------------------------------------------ composition
    def attach(self, runtime: Any, *, review: Any = None, routes: Callable[[], Iterable[str]] | None = None) -> None:
        """Bind to ``runtime``'s live model at scrape time; read queue depths from ``review`` (the
        review router, or None) unless one was given at construction; ``routes()`` lists the
        app's route templates, the only ``route`` label values besides ``/v1/predict`` and
        ``unmatched``. serve/web/metrics_http.py calls it when it serves ``GET /metrics``."""
        self._runtime = runtime
        self._route_source = routes
        if self._review is None:
            self._review = review


def calibrated_abstain_ratio(manifest: Any, rule: Any) -> float | None:
    """The abstention rate the calibration expects, or ``None`` when it cannot be known.

    Taken from the calibration record when it states one; otherwise the share
    of the reference (held-out) scores above the threshold in force, which is
    the same figure measured on the calibration-time score distribution.
    """
    stated = manifest.decision.expected_abstain_rate
    same_rule = rule.threshold == manifest.decision.threshold and rule.score == manifest.decision.score
    if stated is not None and same_rule:
        return stated
    score = (manifest.drift_reference or {}).get("score") or {}
    values = np.asarray(score.get("values", []), dtype=np.float64)
    if values.size and score.get("name") == rule.score:
        return float(np.mean(values > rule.threshold))
    return None


def _observe_each(hist: Any, values: np.ndarray) -> None:
    """``hist.observe`` for every finite value (the client's public API only).

    Measured cost, prometheus-client 0.21, this 2-core machine: per value about 4 us in one
    process and 7 us in multiprocess mode (a locked write to the shared file for the sum and
    one for the bucket): a one-case request pays about what the former batched write into the
    client's private bucket fields paid (4-13 us against 7-8 us), a 64-case batch about
    0.2-0.4 ms per histogram more (190 / 410 us against 27 / 36 us). Kept on the public API:
    a client upgrade cannot silently break the counts.
    """
    for v in values[np.isfinite(values)].tolist():
        hist.observe(v)


class _StateCollector:
    """Scrape-time figures: model info, threshold, calibrated ratio, the abstention
    ratio and the review queue. With ``pooled_from`` (multiprocess), it also
    passes the merged worker metrics through and pools the abstention window."""

    def __init__(self, metrics: Metrics, pooled_from: MultiProcessCollector | None) -> None:
        self._m = metrics
        self._merged = pooled_from

    def collect(self) -> Iterator[Metric]:
        m = self._m
        if self._merged is not None:
            families = list(self._merged.collect())
            yield from families
            cases = _family_sum(families, f"{PREFIX}_abstain_window_cases")
            abst = _family_sum(families, f"{PREFIX}_abstain_window_abstentions")
            ratio = abst / cases if cases else 0.0
        else:
            ratio = m.abstain_ratio()
        yield GaugeMetricFamily(f"{PREFIX}_abstain_ratio",
                                "Abstentions / decisions over the recent count-based window.", value=ratio)
        if m._model:
            info = InfoMetricFamily(f"{PREFIX}_model", "The served bundle: name, version and checksum (manifest seal).")
            info.add_metric([], m._model)
            yield info
        if m._rule is not None:
            th = GaugeMetricFamily(f"{PREFIX}_decision_threshold",
                                   "Threshold in force: abstain when score > threshold.",
                                   labels=["score", "source"])
            th.add_metric([m._rule.score, m._rule.source], float(m._rule.threshold))
            yield th
        if m._calibrated_ratio is not None:
            yield GaugeMetricFamily(f"{PREFIX}_calibrated_abstain_ratio",
                                    "Abstention rate expected from calibration (held-out scores above the threshold).",
                                    value=m._calibrated_ratio)
        ceiling = getattr(m._review, "max_pending", None)
        if isinstance(ceiling, int):
            yield GaugeMetricFamily(f"{PREFIX}_review_pending_ceiling",
                                    "Pending review items above which abstentions are not queued (0: no ceiling).",
                                    value=float(ceiling))
        depths = _review_depths(m._review)
        if depths is not None:
            q = GaugeMetricFamily(f"{PREFIX}_review_queue_cases", "Review items by status.", labels=["status"])
            for status, n in sorted(depths.items()):
                q.add_metric([str(status)], float(n))
            yield q
        yield from m._audit.collect()


def _family_sum(families: Iterable[Metric], name: str) -> float:
    return float(sum(s.value for f in families if f.name == name for s in f.samples if s.name == name))


def _review_depths(review: Any) -> Mapping[str, int] | None:
    """Queue depth by status from the review router, or ``None`` when there is none or it fails."""
    if review is None:
        return None
    fn = getattr(review, "queue_depths", None)
    if fn is None:
        return None
    try:
        return dict(fn())
    except (DemurError, OSError):  # a scrape must not fail because the review store is down
        return None
