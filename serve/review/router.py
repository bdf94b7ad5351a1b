"""The review router: the app's ``review`` hook, deciding which cases go to people.

For each answered case (``route``, called by ``Runtime.predict`` before the
response is sent):

- **abstained** -> enqueued with kind ``abstain``; the store has committed the
  item before the result says ``review_id``;
- **accepted** -> with probability ``audit_fraction``, enqueued with kind
  ``audit`` (the client is not told: an audit must not change how the
  answer is used). Choice: when the client gave a case id, it is
  deterministic, ``sha256(model checksum + ":" + case id)`` read as a number
  in [0, 1) below the fraction, so a retried request makes the same choice;
  without a case id, a ``random.Random`` stream (seeded from ``config.seed``
  when set, for tests) decides.

All of one request's items go to the store in one transaction. If the store
fails (``ReviewStoreUnavailable`` or anything else), the prediction is still
answered; the items are written to the local ``Spool`` and each abstained
result says::

    {"review": {"queued": false, "spooled": true, "pending_review_id": "...",
                "reason": "the review store is unavailable; ..."}}

``pending_review_id`` is the id the item will have once the replayer has
moved it into the store. ``failures`` counts abstained cases the store did
not take at once (``on_failure(n)`` is called too; the app wires it to the
metrics' ``review_enqueue_failed``). After a failure the store is not tried
on the request path again until the replayer finds it answering (at most
``spool_replay_s`` later), so an outage does not add the store's connect
timeout to every prediction.

Accuracy from decided items (``accuracy``): over decided audit items, the
fraction where the reviewer's label equals the model's prediction estimates
the live accuracy of *accepted* predictions; over decided abstained items,
the accuracy the model would have had had it answered. Intervals are exact
binomial (Clopper-Pearson) via ``scipy.stats.binomtest(...).proportion_ci(method="exact")``.
"""

from __future__ import annotations

import hashlib
import logging
import random
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from demur.serve.config import ServeConfig
from demur.serve.errors import ReviewStoreUnavailable
from demur.serve.review.store import NewItem, ReviewStore, new_item, open_store
from demur.serve.review.spool import Replayer, Spool, SpoolError

__all__ = ["SPOOL_FILE", "STORE_RETRY_MAX_S", "ReviewRouter", "accuracy_estimate", "audit_draw"]

log = logging.getLogger("demur.review")

SPOOL_FILE = "review-spool.sqlite3"
STORE_RETRY_MAX_S = 60.0
"""Longest the router spools without trying the store after a failure, when a replayer
watches the store (it ends the wait as soon as a replay succeeds)."""
ACCURACY_LEVEL = 0.95
_DESCRIBE_TTL_S = 5.0
_UNAVAILABLE = ("the review store is unavailable; the case is kept in this server's spool and will be "
                "queued when the store answers again")


def _grid(shape: tuple[int, ...]) -> list[int]:
    """[height, width] to draw an image input: its last two axes, or a square for a flat one (8x8 for 64)."""
    if len(shape) >= 2:
        return [int(shape[-2]), int(shape[-1])]
    n = int(shape[0]) if shape else 1
    side = int(round(n ** 0.5))
    return [side, side] if side * side == n else [1, n]


def audit_draw(checksum: str, case_id: str) -> float:
    """A number in [0, 1) fixed by (model checksum, client case id): the audit choice for a retried case."""
    digest = hashlib.sha256(f"{checksum}:{case_id}".encode("utf-8")).digest()
    return int.from_bytes(digest[:8], "big") / 2.0**64


def accuracy_estimate(agree: int, n: int, level: float = ACCURACY_LEVEL) -> dict[str, Any]:
    """Point estimate and exact binomial (Clopper-Pearson) interval for agree / n.

    ``{"n", "agree", "accuracy", "interval": {"level", "lower", "upper", "method"}}``;
    accuracy and bounds are ``None`` when n = 0.
    """
    out: dict[str, Any] = {"n": int(n), "agree": int(agree), "accuracy": None,
                           "interval": {"level": level, "lower": None, "upper": None, "method": "clopper-pearson"}}
    if n > 0:
        from scipy.stats import binomtest

        ci = binomtest(int(agree), int(n)).proportion_ci(confidence_level=level, method="exact")
        out["accuracy"] = agree / n
        out["interval"]["lower"] = float(ci.low)
        out["interval"]["upper"] = float(ci.high)
    return out


class ReviewRouter:
    """Sends abstained and audit-sampled cases to the review store, with a spool behind it.

    Example::

        router = ReviewRouter.from_config(config)        # SQLite under data_dir by default
        app = create_app(config, review=router)          # init_app registers /v1/reviews and /review
    """

    def __init__(self, store: ReviewStore, spool: Spool | None = None, *, audit_fraction: float = 0.0,
                 replay_s: float = 5.0, seed: int | None = None,
                 on_failure: Callable[[int], Any] | None = None) -> None:
        if not 0.0 <= audit_fraction <= 1.0:
            raise ValueError(f"audit_fraction must be in [0, 1]; got {audit_fraction}")
        self.store = store
        self.spool = spool
        self.audit_fraction = float(audit_fraction)
        self.on_failure = on_failure
        self.failures = 0
        """Abstained cases the store did not take at once (spooled, or lost if the spool failed too)."""
        self.spooled = 0
        self.unspooled = 0
        self.queued = 0
        self.audited = 0
        self._random = random.Random(seed)
        self._lock = threading.Lock()
        self._skip_until = 0.0
        self._replay_s = float(replay_s)
        self.replayer: Replayer | None = None
        if spool is not None:
            self.replayer = Replayer(spool, store, interval_s=replay_s, on_up=self._store_up)
        self._runtime: Any = None
        self._described: tuple[float, dict[str, Any]] | None = None

    @classmethod
    def from_config(cls, config: ServeConfig, *, on_failure: Callable[[int], Any] | None = None) -> ReviewRouter:
        """The store named by ``config.review_store_url`` (SQLite under ``data_dir`` by
        default) and a spool file in ``data_dir``. Nothing touches disk or network
        until the first item (PostgreSQL's pool connects in the background)."""
        store = open_store(config.review_store_url, lease_s=config.review_lease_s,
                           pool_size=max(2, config.threads + 1))
        spool = Spool(Path(config.data_dir) / SPOOL_FILE)
        return cls(store, spool, audit_fraction=config.audit_fraction, replay_s=config.spool_replay_s,
                   seed=config.seed, on_failure=on_failure)

    # ------------------------------------------------------------------ app hook
    def init_app(self, app: Any) -> None:
        """Register the reviewer API and page; wire failures to the app's metrics;
        add the review summary to ``GET /v1/model``; start replaying a non-empty spool."""
        from demur.serve.web.review_api import install_review_api

        self._runtime = app.extensions.get("demur")
        install_review_api(app, self)
        runtime = self._runtime
        if runtime is not None:
            if self.on_failure is None:
                hook = getattr(runtime.metrics, "review_enqueue_failed", None)
                if callable(hook):
                    self.on_failure = hook
            extras = getattr(runtime, "model_extras", None)
            if isinstance(extras, list):
                extras.append(lambda: {"review": self.describe()})
        try:
            if self.spool is not None and self.spool.size() > 0 and self.replayer is not None:
                self.replayer.start()
        except SpoolError as exc:
            log.error("review spool cannot be read at start: %s", exc)

    def enqueue(self, answered: Any) -> list[dict[str, Any] | None]:
        """The pipeline's review hook (serve/core/pipeline.py, ``ReviewHook``)."""
        return self.route(answered.results, answered.request, answered.summary, answered.decisions,
                          answered.live.model)

    def route(self, results: list[dict[str, Any]], cases: Any, summary: Any, decisions: Any,
              model: dict[str, str]) -> list[dict[str, Any] | None]:
        """One annotation per result: ``{"review_id": id}`` for a queued abstention,
        ``{"review": {"queued": false, ...}}`` for one that was not, ``None`` otherwise."""
        x = np.asarray(getattr(cases, "x", cases))
        view: dict[str, Any] | None = None  # built on the first picked case: most requests pick none
        picked: list[tuple[int, NewItem]] = []
        now = time.time()
        for i, result in enumerate(results):
            abstained = result.get("decision") == "abstain"
            cid = result.get("case_id")
            if not abstained and not self._audit(model["checksum"], cid):
                continue
            if view is None:
                view = self._view(model)
            picked.append((i, self._item("abstain" if abstained else "audit", result, x[i], model, view, now)))
        notes: list[dict[str, Any] | None] = [None] * len(results)
        if not picked:
            return notes
        items = [item for _, item in picked]
        abstained = [(i, item) for i, item in picked if item.kind == "abstain"]
        try:
            if time.monotonic() < self._skip_until:
                raise ReviewStoreUnavailable("the review store failed recently; waiting for the replayer")
            ids = self.store.enqueue(items)
        except Exception as exc:
            self._store_down(exc)
            return self._fallback(items, abstained, notes)
        with self._lock:
            self.queued += len(abstained)
            self.audited += len(items) - len(abstained)
        by_item = dict(zip((it.id for it in items), ids))
        for i, item in abstained:
            notes[i] = {"review_id": by_item[item.id]}
        return notes

    def _fallback(self, items: list[NewItem], abstained: list[tuple[int, NewItem]],
                  notes: list[dict[str, Any] | None]) -> list[dict[str, Any] | None]:
        n = len(abstained)
        spooled = False
        if self.spool is not None:
            try:
                self.spool.put(items)
                spooled = True
            except SpoolError as exc:
                log.error("review spool failed too; %d abstained case(s) are not queued: %s", n, exc)
        with self._lock:
            self.failures += n
            if spooled:
                self.spooled += len(items)
            else:
                self.unspooled += n
        if n and self.on_failure is not None:
            try:
                self.on_failure(n)
            except Exception:
                log.exception("review failure hook failed")
        if spooled and self.replayer is not None:
            self.replayer.start()
        for i, item in abstained:
            if spooled:
                notes[i] = {"review": {"queued": False, "spooled": True, "pending_review_id": item.id,
                                       "reason": _UNAVAILABLE}}
            else:
                notes[i] = {"review": {"queued": False, "spooled": False,
                                       "reason": "the review store and this server's spool are both "
                                                 "unavailable; this case was not queued"}}
        return notes

    def _store_down(self, exc: BaseException) -> None:
        """Spool without trying the store for a while. With a replayer, until it finds the
        store answering (``_store_up``), at most ``STORE_RETRY_MAX_S``: each try on the
        request path can wait out the store's connect timeout (3 s for PostgreSQL), and the
        HTTP front runs batches on its event loop, so a try every few seconds would stall
        the worker for most of an outage."""
        if not isinstance(exc, ReviewStoreUnavailable):
            log.error("review store enqueue failed unexpectedly: %r", exc)
        elif time.monotonic() >= self._skip_until:
            log.warning("review store unavailable; spooling: %s", getattr(exc, "message", exc))
        hold = self._replay_s if self.replayer is None else max(self._replay_s, STORE_RETRY_MAX_S)
        self._skip_until = time.monotonic() + hold

    def _store_up(self) -> None:
        self._skip_until = 0.0

    def _audit(self, checksum: str, case_id: Any) -> bool:
        if self.audit_fraction <= 0.0:
            return False
        if case_id is not None:
            return audit_draw(checksum, str(case_id)) < self.audit_fraction
        with self._lock:
            return self._random.random() < self.audit_fraction

    def _view(self, model: dict[str, str]) -> dict[str, Any]:
        """What the reviewer's page needs from the bundle that answered: input kind,
        shape, names and training range, labels, task."""
        manifest = None
        try:
            from flask import g, has_request_context

            live = g.get("demur_live") if has_request_context() else None
            if live is None and self._runtime is not None:
                live = self._runtime.slot.live
            if live is not None and live.model.get("checksum") == model.get("checksum"):
                manifest = live.manifest
        except Exception:
            manifest = None
        if manifest is None:
            return {}
        spec = manifest.inputs
        view: dict[str, Any] = {"task": manifest.task, "labels": list(manifest.labels), "kind": spec.kind,
                                "shape": list(spec.shape)}
        if spec.kind == "image":
            view["low"], view["high"] = [min(spec.low)], [max(spec.high)]
            view["grid"] = _grid(spec.shape)
        else:
            view["names"], view["low"], view["high"] = list(spec.names), list(spec.low), list(spec.high)
        return view

    @staticmethod
    def _item(kind: str, result: dict[str, Any], x: np.ndarray, model: dict[str, str],
              view: dict[str, Any], now: float) -> NewItem:
        task = view.get("task") or ("regression" if not isinstance(result.get("prediction"), str) else "classification")
        # The float32 values the model saw, in their shortest round-trip form (0.3, not 0.30000001192092896).
        case = {"values": [float(v) for v in np.asarray(x, dtype=np.float32).ravel().astype(str)],
                "shape": view.get("shape") or list(np.shape(x)),
                **{k: view[k] for k in ("kind", "grid", "names", "low", "high") if k in view}}
        summary = {k: result.get(k) for k in ("mean", "interval", "uncertainty", "score", "threshold", "reason")}
        summary["task"] = task
        if "variance" in result:
            summary["variance"] = result["variance"]
        if view.get("labels"):
            summary["labels"] = view["labels"]
        interval = None
        prediction = result.get("prediction")
        if task == "regression":
            iv = result.get("interval") or {}
            if isinstance(iv.get("lower"), (int, float)) and isinstance(iv.get("upper"), (int, float)):
                interval = (float(iv["lower"]), float(iv["upper"]))
            prediction = None if prediction is None else repr(float(prediction))
        cid = result.get("case_id")
        return new_item(kind=kind, model=model, case=case, summary=summary,
                        prediction=None if prediction is None else str(prediction), interval=interval,
                        client_case_id=None if cid is None else str(cid), now=now)

    # ------------------------------------------------------------------ reading
    def _check_up(self) -> None:
        """Fail fast while the store is known to be down (a scrape or ``GET /v1/model``
        must not wait for a connect timeout)."""
        if time.monotonic() < self._skip_until:
            raise ReviewStoreUnavailable("the review store failed recently; waiting for the replayer")

    def queue_depths(self) -> dict[str, int]:
        """Items per status (pending, claimed, decided) plus ``spooled`` here (metrics)."""
        self._check_up()
        counts = self.store.counts()
        out = {k: v for k, v in counts.items() if k != "total"}
        if self.spool is not None:
            try:
                out["spooled"] = self.spool.size()
            except SpoolError:
                pass
        return out

    def accuracy(self) -> dict[str, Any]:
        """Audit accuracy of accepted predictions and the would-be accuracy on abstentions."""
        stats = self.store.agreement()
        out: dict[str, Any] = {}
        for kind, key in (("audit", "accepted"), ("abstain", "abstained")):
            s = stats[kind]
            block = accuracy_estimate(s["agree"], s["labelled"])
            if s["valued"]:
                block["interval_coverage"] = accuracy_estimate(s["covered"], s["valued"])
            out[key] = block
        return out

    def describe(self) -> dict[str, Any]:
        """Queue counts and accuracy for ``GET /v1/model`` (cached a few seconds; never raises)."""
        cached = self._described
        if cached is not None and time.monotonic() - cached[0] < _DESCRIBE_TTL_S:
            return cached[1]
        try:
            self._check_up()
            out: dict[str, Any] = {"queue": self.queue_depths(), "accuracy": self.accuracy(),
                                   "audit_fraction": self.audit_fraction}
        except Exception as exc:
            return {"available": False, "reason": f"review store unavailable: {type(exc).__name__}",
                    "audit_fraction": self.audit_fraction}
        out["available"] = True
        self._described = (time.monotonic(), out)
        return out

    def stats(self) -> dict[str, int]:
        """This process's counters: queued, audited, failures, spooled, unspooled, replayed."""
        with self._lock:
            return {"queued": self.queued, "audited": self.audited, "failures": self.failures,
                    "spooled": self.spooled, "unspooled": self.unspooled,
                    "replayed": self.replayer.replayed if self.replayer is not None else 0}

    def close(self) -> None:
        """Stop the replayer and close the store."""
        if self.replayer is not None:
            self.replayer.stop()
        self.store.close()
