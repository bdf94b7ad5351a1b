"""Review items: what goes into the queue, what comes out, and the interface every store keeps.

An item's id sorts by creation time (48-bit milliseconds, then 80 random bits, hex), so
the queue is served oldest first. The id is made by the caller before the store is
tried, so an item spooled during an outage keeps it when the replayer stores it.

The same case twice (``case_key``): a client's case id, the model checksum and a digest of
the float32 inputs the model saw. A store holds one item per case key; an item sent
again under another id (a retried request, a spooled copy replayed after the store
came back) is not stored twice, and its id becomes an *alias* of the stored item, so
every id a client was ever given resolves (``ReviewStore.get``).
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import re
import secrets
import threading
import time
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Protocol, runtime_checkable

from demur.serve.core.audit import AuditTally
from demur.serve.errors import NotFound

__all__ = [
    "KINDS",
    "MAX_EXCLUDE",
    "MAX_ID_CHARS",
    "MAX_NOTE_CHARS",
    "REVIEW_ORDERS",
    "SCHEMA_VERSION",
    "STATUSES",
    "Enqueued",
    "NewItem",
    "ReviewItem",
    "ReviewStore",
    "ascii_json",
    "case_digest",
    "check_id",
    "is_item_id",
    "iso_time",
    "new_id",
    "new_item",
    "review_priority",
    "row_to_item",
    "unstorable",
]

KINDS = ("abstain", "audit")
STATUSES = ("pending", "claimed", "decided")
SCHEMA_VERSION = 4
"""1: items; 2: the dead-letter table; 3: the case digest (one item per case key) and aliases;
4: the review priority (``review_priority``) for ``review_order = "most_uncertain"``."""
REVIEW_ORDERS = ("oldest", "most_uncertain")
"""How people are handed items (``claim_next``): ``oldest`` first, or ``most_uncertain``: audit
items first, oldest first (they must stay a uniform sample of accepted cases, so people decide
them in an order that does not depend on the model), then abstentions by decreasing mutual
information between the prediction and the weights (BALD, Houlsby et al. 2011: the cases whose
label tells the posterior most), oldest first among equals."""
MAX_ID_CHARS = 64
MAX_NOTE_CHARS = 2000
MAX_EXCLUDE = 100

COLUMNS = (
    "id", "created", "kind", "status", "model_name", "model_version", "model_checksum",
    "client_case_id", "case_json", "summary_json", "prediction", "interval_lower", "interval_upper",
    "reviewer", "claim_deadline", "claims", "label", "value", "note", "decided", "decided_by",
)
"""Columns in the order every SELECT of an item returns them (``row_to_item`` relies on it)."""
TEXT_COLUMNS = ("id", "kind", "model_name", "model_version", "model_checksum", "client_case_id", "prediction")
"""Text columns of an item; ``case_json`` / ``summary_json`` are ASCII-escaped JSON, safe by construction."""


_id_lock = threading.Lock()
_last_id = 0


def new_id(now: float | None = None) -> str:
    """A 32-hex-digit id that sorts by creation time: 48-bit ms, then 80 random bits.

    Within one process ids are strictly increasing (an id made in the same
    millisecond as the previous one is the previous one plus one), so the
    queue keeps request order.
    """
    global _last_id
    ms = int((time.time() if now is None else now) * 1000) & ((1 << 48) - 1)
    value = (ms << 80) | secrets.randbits(80)
    with _id_lock:
        if value <= _last_id and (_last_id >> 80) == ms:
            value = _last_id + 1
        _last_id = value
    return f"{value:032x}"


@dataclass(frozen=True)
class NewItem:
    """A case to put in the queue.

    ``case``: {"values": [float] (prod(shape) raw inputs, C order), "shape": [int],
    "kind": "image"|"tabular", "names": [str], "low": [float], "high": [float]}
    (names and training range from the bundle, so the reviewer's page and the
    export need nothing else). ``summary``: the model's view, as in the
    predict response (mean, interval, uncertainty, score, threshold, labels).
    ``prediction``: the predicted label (classification) or the mixture mean
    as text (regression), kept to measure accuracy once a person decides.
    ``interval``: (lower, upper) for regression, to measure interval coverage.
    """

    id: str
    created: float
    kind: str
    model_name: str
    model_version: str
    model_checksum: str
    case: dict[str, Any]
    summary: dict[str, Any]
    prediction: str | None = None
    interval: tuple[float, float] | None = None
    client_case_id: str | None = None

    @property
    def digest(self) -> str:
        """``case_digest(self.case)``: with the client's case id and the model checksum, the case key."""
        return case_digest(self.case)

    def to_json(self) -> dict[str, Any]:
        return {
            "id": self.id, "created": self.created, "kind": self.kind,
            "model": {"name": self.model_name, "version": self.model_version, "checksum": self.model_checksum},
            "case": self.case, "summary": self.summary, "prediction": self.prediction,
            "interval": list(self.interval) if self.interval is not None else None,
            "client_case_id": self.client_case_id,
        }

    @classmethod
    def from_json(cls, data: dict[str, Any]) -> NewItem:
        model = data["model"]
        interval = data.get("interval")
        return cls(
            id=str(data["id"]), created=float(data["created"]), kind=str(data["kind"]),
            model_name=str(model["name"]), model_version=str(model["version"]),
            model_checksum=str(model["checksum"]), case=data["case"], summary=data["summary"],
            prediction=data.get("prediction"),
            interval=(float(interval[0]), float(interval[1])) if interval else None,
            client_case_id=data.get("client_case_id"),
        )


def new_item(
    *,
    kind: str,
    model: dict[str, str],
    case: dict[str, Any],
    summary: dict[str, Any],
    prediction: str | None,
    interval: tuple[float, float] | None = None,
    client_case_id: str | None = None,
    now: float | None = None,
) -> NewItem:
    """A ``NewItem`` with a fresh id and creation time. ``model``: {name, version, checksum}."""
    if kind not in KINDS:
        raise ValueError(f"kind must be one of {KINDS}; got {kind!r}")
    created = time.time() if now is None else now
    return NewItem(
        id=new_id(created), created=created, kind=kind, model_name=model["name"],
        model_version=model["version"], model_checksum=model["checksum"], case=case, summary=summary,
        prediction=prediction, interval=interval, client_case_id=client_case_id,
    )


def review_priority(summary: dict[str, Any]) -> float | None:
    """The number ``most_uncertain`` orders abstentions by: the case's mutual information (nats)
    from the model's summary, or None when it has none (such items come after the others)."""
    try:
        value = float(summary["uncertainty"]["mutual_information"])
    except (KeyError, TypeError, ValueError):
        return None
    return value if value == value and abs(value) != float("inf") else None


def iso_time(t: float | None) -> str | None:
    """UNIX seconds as ISO 8601 UTC with milliseconds (``None`` stays ``None``)."""
    if t is None:
        return None
    return _dt.datetime.fromtimestamp(t, _dt.timezone.utc).isoformat(timespec="milliseconds")


@dataclass(frozen=True)
class ReviewItem:
    """An item as stored. ``status`` is the effective one: an expired claim reads as pending."""

    id: str
    created: float
    kind: str
    status: str
    model_name: str
    model_version: str
    model_checksum: str
    client_case_id: str | None
    case: dict[str, Any]
    summary: dict[str, Any]
    prediction: str | None
    interval: tuple[float, float] | None
    reviewer: str | None
    claim_deadline: float | None
    claims: int
    label: str | None
    value: float | None
    note: str | None
    decided: float | None
    decided_by: str | None

    def to_json(self) -> dict[str, Any]:
        """The item as the reviewer API shows it (times as ISO 8601, UTC)."""
        return {
            "id": self.id,
            "kind": self.kind,
            "status": self.status,
            "created": iso_time(self.created),
            "model": {"name": self.model_name, "version": self.model_version, "checksum": self.model_checksum},
            "client_case_id": self.client_case_id,
            "case": self.case,
            "summary": self.summary,
            "prediction": self.prediction,
            "claim": None if self.status != "claimed" else {
                "reviewer": self.reviewer, "deadline": iso_time(self.claim_deadline)},
            "claims": self.claims,
            "decision": None if self.status != "decided" else {
                "label": self.label, "value": self.value, "note": self.note,
                "decided": iso_time(self.decided), "reviewer": self.decided_by},
        }

    def brief(self) -> dict[str, Any]:
        """What a listing shows: no inputs, no model output."""
        return {
            "id": self.id, "kind": self.kind, "status": self.status, "created": iso_time(self.created),
            "model": {"name": self.model_name, "version": self.model_version},
            "client_case_id": self.client_case_id,
        }


def row_to_item(row: Sequence[Any], now: float) -> ReviewItem:
    """A stored row (``COLUMNS`` order) as a ``ReviewItem``, its status read at ``now``."""
    d = dict(zip(COLUMNS, row))
    status, reviewer, deadline = d["status"], d["reviewer"], d["claim_deadline"]
    if status == "claimed" and deadline is not None and deadline < now:
        status, reviewer, deadline = "pending", None, None
    lo, hi = d["interval_lower"], d["interval_upper"]
    return ReviewItem(
        id=d["id"], created=float(d["created"]), kind=d["kind"], status=status,
        model_name=d["model_name"], model_version=d["model_version"], model_checksum=d["model_checksum"],
        client_case_id=d["client_case_id"], case=json.loads(d["case_json"]),
        summary=json.loads(d["summary_json"]), prediction=d["prediction"],
        interval=(float(lo), float(hi)) if lo is not None and hi is not None else None,
        reviewer=reviewer, claim_deadline=deadline, claims=int(d["claims"]),
        label=d["label"], value=d["value"], note=d["note"], decided=d["decided"], decided_by=d["decided_by"],
    )


def case_digest(case: dict[str, Any]) -> str:
    """SHA-256 (hex, 32 digits) of the case's input values as the model saw them
    (float32 in shortest round-trip text): "the same inputs" for idempotency."""
    values = case.get("values") if isinstance(case, dict) else None
    text = json.dumps(values, separators=(",", ":"), default=repr)
    return hashlib.sha256(text.encode("utf-8", "backslashreplace")).hexdigest()[:32]


@dataclass(frozen=True)
class Enqueued:
    """What the store did with one item: ``id`` is the stored item's id (the item's own,
    or the existing item's for the same case key, the item's id then being its alias);
    ``reused``: the client's case id was already queued for this model with *other*
    inputs, so this is a new item (the predict answer says so)."""

    id: str
    reused: bool = False


_ID_RE = re.compile(r"^[A-Za-z0-9_-]{1,64}$")


def is_item_id(value: Any) -> bool:
    """1-64 characters of [A-Za-z0-9_-]: the id alphabet."""
    return isinstance(value, str) and _ID_RE.match(value) is not None


def check_id(item_id: str) -> None:
    """``NotFound`` for anything that cannot be an item id (no query is made for it)."""
    if not is_item_id(item_id):
        raise NotFound(f"no review item with id '{str(item_id)[:MAX_ID_CHARS]}'", field="id")


def unstorable(item: NewItem) -> str | None:
    """Why ``item`` can never be stored as it is, or ``None``. The same answer on every
    backend (PostgreSQL's text cannot hold NUL; a lone surrogate has no UTF-8 form), so
    a queue can move between them."""
    if item.kind not in KINDS:
        return f"kind must be one of {KINDS}; got {item.kind!r}"
    if not isinstance(item.id, str) or not _ID_RE.match(item.id):
        return f"item id must be 1-64 characters of [A-Za-z0-9_-]; got {str(item.id)[:80]!r}"
    for name in TEXT_COLUMNS:
        value = getattr(item, name)
        if value is None:
            continue
        if not isinstance(value, str):
            return f"{name} must be text; got {type(value).__name__}"
        if "\x00" in value:
            return f"{name} holds a NUL character at position {value.index(chr(0))}"
        try:
            value.encode("utf-8")
        except UnicodeEncodeError as exc:
            return f"{name} is not valid Unicode: {exc.reason} at position {exc.start}"
    try:
        json.dumps(item.case)
        json.dumps(item.summary)
    except (TypeError, ValueError) as exc:
        return f"case or summary cannot be written as JSON: {exc}"
    return None


def ascii_json(item: NewItem) -> str:
    """The item as ASCII-only JSON (for the dead-letter table: whatever broke the item cannot break this)."""
    try:
        return json.dumps(item.to_json(), ensure_ascii=True, default=repr)
    except (TypeError, ValueError):
        return json.dumps({"id": repr(item.id), "unreadable": True})


@runtime_checkable
class ReviewStore(Protocol):
    """What the router, the reviewer API and the spool need from a queue."""

    lease_s: float

    def enqueue(self, items: Sequence[NewItem]) -> list[str | None]:
        """``[e.id if e else None for e in enqueue_items(items)]``: the stored ids in order."""

    def enqueue_items(self, items: Sequence[NewItem]) -> list[Enqueued | None]:
        """Insert each item unless present (same id, an alias of a stored item, or the
        same case key); commit all in one transaction; for a present one record the
        item's id as an alias of the stored item. ``None`` for an item set aside in the
        dead-letter table because it can never be stored. Raises
        ``ReviewStoreUnavailable`` only for an outage; a deadlock or serialisation
        failure between concurrent writers is retried in place."""

    def rejected(self, limit: int = 50) -> list[dict[str, Any]]:
        """Items set aside (the dead-letter table), oldest first:
        ``{"id", "created", "rejected", "reason", "item"}``."""

    def rejected_count(self) -> int:
        """How many items are set aside."""

    def get(self, item_id: str) -> ReviewItem:
        """The item with this id or alias (its ``id`` is then the stored one), or ``NotFound``."""

    def page(self, status: str | None = None, *, kind: str | None = None,
             limit: int = 50, after: str | None = None) -> list[ReviewItem]:
        """Items oldest first, ``limit`` at most, ids greater than ``after`` (a page cursor)."""

    def claim_next(self, reviewer: str, *, exclude: Sequence[str] = ()) -> ReviewItem | None:
        """Atomically claim the oldest claimable item for ``lease_s`` seconds, or ``None``."""

    def decide(self, item_id: str, reviewer: str, *, label: str | None = None, value: float | None = None,
               note: str | None = None, admin: bool = False) -> ReviewItem:
        """Record the decision; ``Conflict`` unless ``reviewer`` holds the claim (or ``admin``)."""

    def release(self, item_id: str, reviewer: str, *, admin: bool = False) -> ReviewItem:
        """Give a claim back: the item is pending again."""

    def counts(self) -> dict[str, int]:
        """Items per effective status (pending, claimed, decided) and ``total``."""

    def pending_count(self) -> int:
        """Items waiting for a person (``counts()["pending"]``, cheaper: read for the ceiling)."""

    def audit_tallies(self) -> list[AuditTally]:
        """Per model checksum, decided items with a label (or a value) by kind, and how many of
        them the model had right (label equals prediction; value inside the interval): the
        audit series of /metrics (serve/adapters/audit_metrics.py)."""

    def agreement(self) -> dict[str, dict[str, int]]:
        """Per kind, over decided items: ``decided``, ``labelled`` (with a label),
        ``agree`` (label equals the model's prediction), ``valued`` (with a
        value, regression), ``covered`` (value inside the model's interval)."""

    def ping(self) -> None:
        """Raise ``ReviewStoreUnavailable`` unless the store answers."""

    def close(self) -> None:
        """Release connections."""
