"""The review router: the app's ``review`` hook, deciding which cases go to people.

For each answered case (``enqueue(answered)``, the pipeline's ``ReviewHook``, called
before the response is sent; see serve/core/pipeline.py):

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

``pending_review_id`` resolves once the replayer has moved the item into the
store: it is the item's own id, or, when the same case (case id, model checksum,
inputs) reached the store meanwhile under another id, an alias of that item
(``GET /v1/reviews/<id>`` answers either way; serve/review/store/__init__.py).

Idempotency is keyed by the case, not only its id: the same case id with the same
inputs gives the same item (a retried request); the same case id with *other* inputs
is queued as a new item and the answer says so:
``{"review_id": ..., "review": {"queued": true, "case_id_reused": true, "reason": ...}}``. ``failures`` counts abstained cases the store did
not take at once (``on_failure(n)`` is called too; the app wires it to the
metrics' ``review_enqueue_failed``). After a failure the store is not tried
on the request path again until the replayer finds it answering (at most
``spool_replay_s`` later), so an outage does not add the store's connect
timeout to every prediction.

Limits, so no client can flood the people who review:

- a **ceiling** on pending items (``config.review_max_pending``, default 50,000; 0
  turns it off). Above it the prediction is still answered and the abstention says
  ``{"review": {"queued": false, "reason": "not queued: backlog full"}}``. The
  pending count is read from the store once a second (``PENDING_REFRESH_S``; before
  every batch past half the ceiling) and this process's own enqueues are added in
  between, so with several workers the queue can pass the ceiling by at most what
  the others queue between one worker's read and its write (about a batch each);
- an optional **quota** per caller (``config.review_quota_per_min``: items per
  token fingerprint, ``Answered.caller``, per minute, counted per process; 0, the
  default, turns it off; an open predict endpoint is one caller): above it,
  ``"reason": "not queued: enqueue quota exceeded"``.

Refused cases are counted (``on_event("backlog_full" | "quota" | "rejected", n)``,
wired to the metrics), and audit samples are dropped silently before abstentions.

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
from demur.serve.core.pipeline import Answered
from demur.serve.errors import ReviewStoreUnavailable
from demur.serve.review.store import NewItem, ReviewStore, new_item, open_store
from demur.serve.review.spool import Replayer, Spool, SpoolError

__all__ = ["NOT_QUEUED", "PENDING_REFRESH_S", "SPOOL_FILE", "STORE_RETRY_MAX_S", "ReviewRouter",
           "accuracy_estimate", "audit_draw"]

log = logging.getLogger("demur.review")

SPOOL_FILE = "review-spool.sqlite3"
STORE_RETRY_MAX_S = 60.0
"""Longest the router spools without trying the store after a failure, when a replayer
watches the store (it ends the wait as soon as a replay succeeds)."""
PENDING_REFRESH_S = 1.0
"""How often (seconds) the router reads the store's pending count for the ceiling; ten
times as often once this process's figure is past half the ceiling."""
NOT_QUEUED = {
    "backlog_full": "not queued: backlog full",
    "quota": "not queued: enqueue quota exceeded",
    "rejected": "not queued: the case cannot be stored as sent; it is set aside for an operator",
}
"""Why an abstention was not queued, by event name (the metric's label): the ``reason`` shown."""
ACCURACY_LEVEL = 0.95
_MAX_CALLERS = 10_000
_DESCRIBE_TTL_S = 5.0
_REUSED = ("this case id was queued before for this model with other inputs; these inputs are a new "
           "review item (send a new case id for a new case)")
_UNAVAILABLE = ("the review store is unavailable; the case is kept in this server's spool and will be "
                "queued when the store answers again")


def _grid(shape: tuple[int, ...]) -> list[int]:
    """[height, width] to draw an image input: its last two axes, or a square for a flat one (8x8 for 64)."""
    if len(shape) >= 2:
        return [int(shape[-2]), int(shape[-1])]
    n = int(shape[0]) if shape else 1
    side = int(round(n ** 0.5))
    return [side, side] if side * side == n else [1, n]


def _not_queued(event: str) -> dict[str, Any]:
    return {"review": {"queued": False, "reason": NOT_QUEUED[event]}}


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
                 on_failure: Callable[[int], Any] | None = None, max_pending: int = 0,
                 quota_per_min: int = 0, on_event: Callable[[str, int], Any] | None = None,
                 clock: Callable[[], float] = time.monotonic) -> None:
        if not 0.0 <= audit_fraction <= 1.0:
            raise ValueError(f"audit_fraction must be in [0, 1]; got {audit_fraction}")
        self.store = store
        self.spool = spool
        self.audit_fraction = float(audit_fraction)
        self.on_failure = on_failure
        self.on_event = on_event
        self.max_pending = max(0, int(max_pending))
        self.quota_per_min = max(0, int(quota_per_min))
        self.refused: dict[str, int] = {name: 0 for name in NOT_QUEUED}
        """Cases not queued on purpose, by event: ``backlog_full``, ``quota``, ``rejected``."""
        self._clock = clock
        self._pending = 0
        self._pending_at = -float("inf")
        self._quota: dict[str | None, tuple[int, int]] = {}  # caller -> (minute, items queued in it)
        self._views: dict[str, dict[str, Any]] = {}
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
            self.replayer = Replayer(spool, store, interval_s=replay_s, on_up=self._store_up,
                                     on_error=lambda: self._event("replay_error", 1))
        self._described: tuple[float, dict[str, Any]] | None = None

    @classmethod
    def from_config(cls, config: ServeConfig, *, on_failure: Callable[[int], Any] | None = None) -> ReviewRouter:
        """The store named by ``config.review_store_url`` (SQLite under ``data_dir`` by
        default) and a spool file in ``data_dir``. Nothing touches disk or network
        until the first item (PostgreSQL's pool connects in the background)."""
        store = open_store(config.review_store_url, lease_s=config.review_lease_s,
                           pool_size=max(2, config.threads + 1), order=config.review_order)
        spool = Spool(Path(config.data_dir) / SPOOL_FILE)
        return cls(store, spool, audit_fraction=config.audit_fraction, replay_s=config.spool_replay_s,
                   seed=config.seed, on_failure=on_failure, max_pending=config.review_max_pending,
                   quota_per_min=config.review_quota_per_min)

    # ------------------------------------------------------------------ app hook
    def install(self, app: Any, runtime: Any, metrics: Any = None) -> None:
        """Register the reviewer API and page on ``app``; report failures and events to
        ``metrics`` (a ``demur.serve.adapters.metrics.Metrics``, or None); add the review
        summary to ``GET /v1/model`` through ``runtime.model_extras``; start replaying a
        non-empty spool. Called by ``create_app``, which owns the composition."""
        from demur.serve.web.review_api import install_review_api

        install_review_api(app, self)
        if metrics is not None:
            self.on_failure = self.on_failure or metrics.review_enqueue_failed
            self.on_event = self.on_event or metrics.review_event
        runtime.model_extras.append(lambda: {"review": self.describe()})
        try:
            if self.spool is not None and self.spool.size() > 0 and self.replayer is not None:
                self.replayer.start()
        except SpoolError as exc:
            log.error("review spool cannot be read at start: %s", exc)

    def enqueue(self, answered: Answered) -> list[dict[str, Any] | None]:
        """One annotation per case: ``{"review_id": id}`` for a queued abstention,
        ``{"review": {"queued": false, ...}}`` for one that was not, ``None`` otherwise.
        Never raises for a store fault (the items are spooled)."""
        abstain = answered.decisions.abstain.tolist()
        case_ids = answered.request.case_ids
        model = answered.live.model
        checksum = model["checksum"]
        notes: list[dict[str, Any] | None] = [None] * len(abstain)
        chosen = [(i, "abstain") for i, a in enumerate(abstain) if a]
        chosen += [(i, "audit") for i, a in enumerate(abstain) if not a and self._audit(checksum, case_ids[i])]
        if not chosen:
            return notes
        chosen = self._limit(chosen, answered.caller, notes)
        if not chosen:
            return notes
        view = self._view(answered.live)
        x = answered.request.x
        now = time.time()
        predictions, intervals = _typed(answered)
        items = [self._item(kind, answered.results[i], predictions[i], intervals[i], case_ids[i], x[i], model, view,
                            now, inclusion=self.audit_fraction if kind == "audit" else 1.0) for i, kind in chosen]
        abstained = [(i, item) for (i, kind), item in zip(chosen, items) if kind == "abstain"]
        try:
            if time.monotonic() < self._skip_until:
                raise ReviewStoreUnavailable("the review store failed recently; waiting for the replayer")
            outcomes = self.store.enqueue_items(items)
        except Exception as exc:
            self._store_down(exc)
            return self._fallback(items, abstained, notes)
        ids = [None if e is None else e.id for e in outcomes]
        by_item = dict(zip((it.id for it in items), outcomes))
        rejected = sum(1 for rid in ids if rid is None)
        n_abstained = sum(1 for _, it in abstained if by_item[it.id] is not None)
        with self._lock:
            self.queued += n_abstained
            self.audited += len(items) - len(abstained) - sum(
                1 for it in items if it.kind == "audit" and by_item[it.id] is None)
            self._pending += len(items) - rejected
        for i, item in abstained:
            done = by_item[item.id]
            if done is None:
                notes[i] = _not_queued("rejected")
            elif done.reused:
                notes[i] = {"review_id": done.id, "review": {"queued": True, "case_id_reused": True,
                                                             "reason": _REUSED}}
            else:
                notes[i] = {"review_id": done.id}
        if rejected:
            self._event("rejected", rejected)
        return notes

    def _limit(self, chosen: list[tuple[int, str]], caller: str | None,
               notes: list[dict[str, Any] | None]) -> list[tuple[int, str]]:
        """Keep what the ceiling and the caller's quota allow, abstentions first; annotate
        the refused abstentions in ``notes``; drop refused audits silently."""
        room = self._room(len(chosen))
        quota = self._quota_left(caller)
        keep = min(len(chosen), room, quota)
        if keep == len(chosen):
            self._take_quota(caller, keep)
            return chosen
        kept = chosen[:keep]  # abstentions come first in ``chosen``
        why = "backlog_full" if room <= quota else "quota"
        refused = [i for i, kind in chosen[keep:] if kind == "abstain"]
        for i in refused:
            notes[i] = _not_queued(why)
        self._take_quota(caller, keep)
        if refused:
            if why == "backlog_full" and not any(self.refused.values()):
                log.warning("review backlog is full (%d pending); abstentions are answered but not queued",
                            self._pending)
            self._event(why, len(refused))
        return kept

    def _room(self, wanted: int) -> int:
        """Items the ceiling still admits (a large number when there is none)."""
        if self.max_pending <= 0:
            return 1 << 62
        now = self._clock()
        near = 2 * (self._pending + wanted) > self.max_pending
        # past half the ceiling the store is asked before every batch: a fast worker queues several
        # batches in 0.1 s, and the others' items must be seen before this one adds to them
        every = 0.0 if near else PENDING_REFRESH_S
        if now - self._pending_at >= every and time.monotonic() >= self._skip_until:
            self._pending_at = now
            try:
                self._pending = int(self.store.pending_count())
            except Exception as exc:  # keep the last figure; the enqueue will meet the outage
                log.debug("pending count unavailable: %r", exc)
        return max(0, self.max_pending - self._pending)

    def _quota_left(self, caller: str | None) -> int:
        if self.quota_per_min <= 0:
            return 1 << 62
        minute = int(self._clock() // 60)
        with self._lock:
            start, used = self._quota.get(caller, (minute, 0))
        return self.quota_per_min - (used if start == minute else 0)

    def _take_quota(self, caller: str | None, n: int) -> None:
        if self.quota_per_min <= 0 or n <= 0:
            return
        minute = int(self._clock() // 60)
        with self._lock:
            start, used = self._quota.get(caller, (minute, 0))
            if len(self._quota) >= _MAX_CALLERS and caller not in self._quota:
                self._quota = {c: v for c, v in self._quota.items() if v[0] == minute}
            self._quota[caller] = (minute, (used if start == minute else 0) + n)

    def _event(self, name: str, n: int) -> None:
        if name in self.refused:
            with self._lock:
                self.refused[name] += n
        if self.on_event is not None:
            try:
                self.on_event(name, n)
            except Exception:
                log.exception("review event hook failed")

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
                self._pending += len(items)  # they will be pending once replayed
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

    def _view(self, live: Any) -> dict[str, Any]:
        """What the reviewer's page needs from the bundle that answered: input kind,
        shape, names and training range, labels, task (built once per model)."""
        checksum = live.model["checksum"]
        view = self._views.get(checksum)
        if view is not None:
            return view
        manifest = live.manifest
        spec = manifest.inputs
        view = {"task": manifest.task, "labels": list(manifest.labels), "kind": spec.kind,
                "shape": list(spec.shape)}
        if spec.kind == "image":
            view["low"], view["high"] = [min(spec.low)], [max(spec.high)]
            view["grid"] = _grid(tuple(spec.shape))
        else:
            view["names"], view["low"], view["high"] = list(spec.names), list(spec.low), list(spec.high)
        if len(self._views) > 16:
            self._views.clear()
        self._views[checksum] = view
        return view

    @staticmethod
    def _item(kind: str, result: dict[str, Any], prediction: str, interval: tuple[float, float] | None,
              case_id: str | None, x: np.ndarray, model: dict[str, str], view: dict[str, Any], now: float, *,
              inclusion: float) -> NewItem:
        """``result``: the rendered dict the client received, stored as the model's view the
        reviewer sees; ``prediction`` and ``interval`` come typed from the summary (``_typed``)."""
        task = view["task"]
        # The float32 values the model saw, in their shortest round-trip form (0.3, not 0.30000001192092896).
        case = {"values": [float(v) for v in np.asarray(x, dtype=np.float32).ravel().astype(str)],
                "shape": view["shape"], **{k: view[k] for k in ("kind", "grid", "names", "low", "high") if k in view}}
        summary = {k: result.get(k) for k in ("mean", "interval", "uncertainty", "score", "threshold", "reason")}
        summary["task"] = task
        # the chance this case was sent to people (audit_fraction for audits, 1 for abstentions):
        # the inclusion weight recertification needs (demur.serve.offline.recertify)
        summary["inclusion"] = float(inclusion)
        if "variance" in result:
            summary["variance"] = result["variance"]
        if view.get("labels"):
            summary["labels"] = view["labels"]
        return new_item(kind=kind, model=model, case=case, summary=summary, prediction=prediction,
                        interval=interval, client_case_id=case_id, now=now)

    # ------------------------------------------------------------------ reading
    def _check_up(self) -> None:
        """Fail fast while the store is known to be down (a scrape or ``GET /v1/model``
        must not wait for a connect timeout)."""
        if time.monotonic() < self._skip_until:
            raise ReviewStoreUnavailable("the review store failed recently; waiting for the replayer")

    def queue_depths(self) -> dict[str, int]:
        """Items per status (pending, claimed, decided), ``rejected`` (the store's dead
        letters), plus ``spooled`` and ``spool_rejected`` here (metrics)."""
        self._check_up()
        counts = self.store.counts()
        out = {k: v for k, v in counts.items() if k != "total"}
        out["rejected"] = self.store.rejected_count()
        if self.spool is not None:
            try:
                out["spooled"] = self.spool.size()
                out["spool_rejected"] = self.spool.rejected_size()
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
        """This process's counters: queued, audited, failures, spooled, unspooled, replayed,
        replay errors, and the cases not queued on purpose (backlog_full, quota, rejected)."""
        with self._lock:
            return {"queued": self.queued, "audited": self.audited, "failures": self.failures,
                    "spooled": self.spooled, "unspooled": self.unspooled,
                    "replayed": self.replayer.replayed if self.replayer is not None else 0,
                    "replay_errors": self.replayer.errors if self.replayer is not None else 0,
                    **self.refused}

    def close(self) -> None:
        """Stop the replayer and close the store."""
        if self.replayer is not None:
            self.replayer.stop()
        self.store.close()


def _typed(answered: Answered) -> tuple[list[str], list[tuple[float, float] | None]]:
    """Per case, from the typed summary: the prediction as stored (the label; a regression mean
    as its shortest round-trip text) and the regression interval (None for classifiers)."""
    summary = answered.summary
    if summary.task == "classification":
        labels = answered.live.manifest.labels
        return [labels[int(k)] for k in summary.prediction.tolist()], [None] * len(summary)
    means = summary.prediction.tolist()
    return ([repr(float(m)) for m in means],
            [(float(lo), float(hi)) for lo, hi in zip(summary.lower.tolist(), summary.upper.tolist())])
