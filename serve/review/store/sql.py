"""The SQL both review stores share: enqueue, claim, decide, release, pages and counts.

Queries are templates with named fields filled by ``SqlStore.sql``: ``{p}`` is the
driver's parameter marker (``?`` for sqlite3, ``%s`` for psycopg) and ``{items}``,
``{rejected}``, ``{aliases}``, ``{version}`` are the (possibly schema-qualified) table
names. Column types and DDL differ per backend and live with each backend's
migrations (serve/review/store/sqlite.py, postgres.py), written out in its dialect.

Enqueue is insert-if-absent on the item id, on an alias, and on the case key (client
case id, model checksum, input digest: serve/review/store/items.py). Items are written
in case-key order, so two replicas enqueueing the same cases in opposite orders take
their row locks in the same order; a deadlock or serialisation failure that still
happens is retried in place (``TRANSIENT_RETRIES`` times, jittered backoff), never
reported as an outage.
"""

from __future__ import annotations

import contextlib
import json
import random
import threading
import time
from collections.abc import Callable, Sequence
from typing import Any

from demur.serve.core.audit import AuditTally
from demur.serve.errors import ConfigError, Conflict, NotFound, ReviewItemRejected
from demur.serve.review.store.items import (COLUMNS, KINDS, MAX_EXCLUDE, REVIEW_ORDERS, SCHEMA_VERSION,
                                            STATUSES, Enqueued, NewItem, ReviewItem, ascii_json, case_digest,
                                            check_id, is_item_id, iso_time, new_id, review_priority,
                                            row_to_item, unstorable)

__all__ = ["TRANSIENT_RETRIES", "Migration", "SqlStore", "backfill_digests", "backfill_priorities"]

TRANSIENT_RETRIES = 8
"""Attempts after the first for a transaction that met a deadlock or serialisation failure."""
_BACKOFF_S = 0.005
"""First backoff (seconds); doubled per attempt, each wait drawn uniformly in [0, bound] (full jitter)."""
_MAX_REASON_CHARS = 500
_SELECT = ", ".join(COLUMNS)
_INSERTED = COLUMNS[:13]

Migration = tuple[str | Callable[[Any, Any], None], ...]
"""One schema version's steps: SQL templates (table names only) or callables ``(store, cursor)``."""


class _Raced(Exception):
    """An insert skipped for a conflicting row that the next read could not see: retry."""


class SqlStore:
    """The operations; subclasses give transactions, error conversion, migrations and the claim."""

    _p = "?"
    migrations: tuple[Migration, ...] = ()

    def __init__(self, *, lease_s: float, clock: Callable[[], float] = time.time, prefix: str = "",
                 order: str = "oldest") -> None:
        if lease_s <= 0:
            raise ConfigError(f"review lease must be > 0 seconds; got {lease_s}", field="review_lease_s")
        if order not in REVIEW_ORDERS:
            raise ConfigError(f"review order must be one of {list(REVIEW_ORDERS)}; got {order!r}", field="review_order")
        self.lease_s = float(lease_s)
        self.order = order
        self._clock = clock
        self._names = {name: f"{prefix}demur_{table}" for name, table in (
            ("items", "review_items"), ("rejected", "review_rejected"), ("aliases", "review_aliases"),
            ("version", "schema_version"))}
        self._ready = False
        self._ready_lock = threading.Lock()
        self.retried = 0
        """Transactions retried after a deadlock or serialisation failure (this process)."""

    # -- subclass hooks
    def _tx(self, *, write: bool) -> contextlib.AbstractContextManager[Any]:  # pragma: no cover
        raise NotImplementedError

    def _errors(self) -> contextlib.AbstractContextManager[None]:  # pragma: no cover
        raise NotImplementedError

    def _migrate(self) -> None:  # pragma: no cover
        raise NotImplementedError

    def _claim(self, cur: Any, reviewer: str, now: float, exclude: Sequence[str]) -> Sequence[Any] | None:
        raise NotImplementedError  # pragma: no cover

    def _transient(self, exc: BaseException) -> bool:
        """A failure that a fresh transaction may not meet (deadlock, serialisation)."""
        return isinstance(exc, _Raced)

    # -- helpers
    def sql(self, template: str) -> str:
        """A query template with ``{p}`` and the table names filled in."""
        return template.format(p=self._p, **self._names)

    def _marks(self, n: int) -> str:
        return ", ".join([self._p] * n)

    def _rows(self, sql: str, params: Sequence[Any] = ()) -> list[Any]:
        """Every row ``sql`` (already templated) returns, read in one transaction."""
        def read(cur: Any) -> list[Any]:
            cur.execute(sql, tuple(params))
            return cur.fetchall()

        return self._run(read, write=False)

    def _run(self, fn: Callable[[Any], Any], *, write: bool) -> Any:
        """``fn(cursor)`` in one transaction, driver errors converted; a transient
        conflict reruns the whole transaction (bounded, jittered)."""
        with self._errors():
            self._ensure_schema()
            attempt = 0
            while True:
                try:
                    with self._tx(write=write) as cur:
                        return fn(cur)
                except Exception as exc:
                    if attempt >= TRANSIENT_RETRIES or not self._transient(exc):
                        raise
                    attempt += 1
                    self.retried += 1
                    time.sleep(random.uniform(0.0, _BACKOFF_S * 2 ** attempt))

    def _ensure_schema(self) -> None:
        if not self._ready:
            with self._ready_lock:
                if not self._ready:
                    self._migrate()
                    self._ready = True

    def _apply_migrations(self, cur: Any) -> None:
        """Bring the schema to ``SCHEMA_VERSION`` inside the caller's transaction."""
        cur.execute(self.sql("CREATE TABLE IF NOT EXISTS {version} (version INTEGER NOT NULL)"))
        cur.execute(self.sql("SELECT MAX(version) FROM {version}"))
        current = cur.fetchone()[0] or 0
        if current > SCHEMA_VERSION:
            raise ConfigError(f"review store {self!r} has schema version {current}; this demur knows up to "
                              f"{SCHEMA_VERSION}: upgrade demur", field="review_store")
        for version in range(current, SCHEMA_VERSION):
            for step in self.migrations[version]:
                if callable(step):
                    step(self, cur)
                else:
                    cur.execute(step.format(**self._names))
        if current < SCHEMA_VERSION:  # one row: the version the tables now have
            cur.execute(self.sql("DELETE FROM {version}"))
            cur.execute(self.sql("INSERT INTO {version} (version) VALUES ({p})"), (SCHEMA_VERSION,))

    def _fetch(self, cur: Any, item_id: str) -> Sequence[Any] | None:
        cur.execute(self.sql(f"SELECT {_SELECT} FROM {{items}} WHERE id = {{p}}"), (item_id,))
        return cur.fetchone()

    def _resolve(self, cur: Any, item_id: str) -> str:
        """The stored id for an item id or an alias; the id itself when neither is known."""
        cur.execute(self.sql("SELECT id FROM {aliases} WHERE alias = {p}"), (item_id,))
        row = cur.fetchone()
        return str(row[0]) if row else item_id

    # -- enqueue
    def enqueue(self, items: Sequence[NewItem]) -> list[str | None]:
        return [None if e is None else e.id for e in self.enqueue_items(items)]

    def enqueue_items(self, items: Sequence[NewItem]) -> list[Enqueued | None]:
        if not items:
            return []
        out: dict[str, Enqueued | None] = {}
        rejected: list[tuple[NewItem, str]] = []
        good: list[NewItem] = []
        for it in items:
            problem = unstorable(it)
            if problem is None:
                good.append(it)
            else:
                rejected.append((it, problem))
        try:
            out.update(self._insert(good))
        except ReviewItemRejected:  # an item the driver refused: find it, store the others
            for it in good:
                try:
                    out.update(self._insert([it]))
                except ReviewItemRejected as exc:
                    rejected.append((it, exc.message))
        if rejected:
            self._set_aside(rejected)
            out.update({it.id: None for it, _ in rejected})
        return [out[it.id] for it in items]

    def _insert(self, items: Sequence[NewItem]) -> dict[str, Enqueued]:
        """Insert-if-absent, all in one transaction, in case-key order; item id -> outcome."""
        if not items:
            return {}
        ordered = sorted(items, key=lambda it: (it.client_case_id is None, it.client_case_id or "",
                                                it.model_checksum, it.digest, it.id))
        return self._run(lambda cur: {it.id: self._insert_one(cur, it) for it in ordered}, write=True)

    def _insert_one(self, cur: Any, it: NewItem) -> Enqueued:
        lo, hi = it.interval if it.interval is not None else (None, None)
        digest = it.digest
        cur.execute(self.sql(
            f"INSERT INTO {{items}} ({', '.join(_INSERTED)}, case_digest, priority, claims) "
            f"VALUES ({self._marks(len(_INSERTED) + 2)}, 0) ON CONFLICT DO NOTHING"), (
            it.id, it.created, it.kind, "pending", it.model_name, it.model_version, it.model_checksum,
            it.client_case_id, json.dumps(it.case, separators=(",", ":")),
            json.dumps(it.summary, separators=(",", ":")), it.prediction, lo, hi, digest,
            review_priority(it.summary),
        ))
        if cur.rowcount == 1:
            reused = False
            if it.client_case_id is not None:
                cur.execute(self.sql("SELECT 1 FROM {items} WHERE client_case_id = {p} AND model_checksum = {p} "
                                     "AND id <> {p} LIMIT 1"), (it.client_case_id, it.model_checksum, it.id))
                reused = cur.fetchone() is not None
            return Enqueued(it.id, reused)
        cur.execute(self.sql("SELECT id FROM {items} WHERE id = {p}"), (it.id,))
        if cur.fetchone() is not None:  # this very item, stored before (a replay)
            return Enqueued(it.id)
        stored = self._resolve(cur, it.id)
        if stored != it.id:  # already recorded as an alias (a replay of a duplicate)
            return Enqueued(stored)
        cur.execute(self.sql("SELECT id FROM {items} WHERE client_case_id = {p} AND model_checksum = {p} "
                             "AND case_digest = {p}"), (it.client_case_id, it.model_checksum, digest))
        row = cur.fetchone()
        if row is None:
            raise _Raced(f"item {it.id} conflicted with a row no longer visible")
        cur.execute(self.sql("INSERT INTO {aliases} (alias, id, created) VALUES ({p}, {p}, {p}) "
                             "ON CONFLICT DO NOTHING"), (it.id, row[0], self._clock()))
        return Enqueued(str(row[0]))

    def _set_aside(self, rejected: Sequence[tuple[NewItem, str]]) -> None:
        """Write items into the dead-letter table, ASCII only (JSON with \\u escapes, the
        reason with backslash escapes), so whatever broke the item cannot break this write."""
        sql = self.sql("INSERT INTO {rejected} (id, created, rejected, reason, item_json) "
                       "VALUES ({p}, {p}, {p}, {p}, {p}) ON CONFLICT DO NOTHING")
        now = self._clock()
        rows = []
        for it, reason in rejected:
            rid = it.id if is_item_id(it.id) else new_id(now)
            text = reason.encode("ascii", "backslashreplace").decode("ascii").replace("\x00", "\\x00")
            rows.append((rid, float(it.created), now, text[:_MAX_REASON_CHARS], ascii_json(it)))

        def write(cur: Any) -> None:
            for row in rows:
                cur.execute(sql, row)

        self._run(write, write=True)

    # -- reading
    def rejected(self, limit: int = 50) -> list[dict[str, Any]]:
        sql = self.sql("SELECT id, created, rejected, reason, item_json FROM {rejected} "
                       "ORDER BY created, id LIMIT {p}")

        return [{"id": r[0], "created": iso_time(r[1]), "rejected": iso_time(r[2]), "reason": r[3],
                 "item": json.loads(r[4])} for r in self._rows(sql, (int(limit),))]

    def rejected_count(self) -> int:
        return self._count(self.sql("SELECT COUNT(*) FROM {rejected}"), ())

    def _count(self, sql: str, params: Sequence[Any]) -> int:
        def read(cur: Any) -> int:
            cur.execute(sql, tuple(params))
            return int(cur.fetchone()[0] or 0)

        return self._run(read, write=False)

    def get(self, item_id: str) -> ReviewItem:
        check_id(item_id)

        def read(cur: Any) -> Sequence[Any] | None:
            return self._fetch(cur, item_id) or self._fetch(cur, self._resolve(cur, item_id))

        row = self._run(read, write=False)
        if row is None:
            raise NotFound(f"no review item with id '{item_id}'", field="id")
        return row_to_item(row, self._clock())

    def page(self, status: str | None = None, *, kind: str | None = None,
             limit: int = 50, after: str | None = None) -> list[ReviewItem]:
        now = self._clock()
        where, params = ["1 = 1"], []
        if status is not None:
            if status not in STATUSES:
                raise ValueError(f"status must be one of {STATUSES}; got {status!r}")
            if status == "pending":
                where.append("(status = 'pending' OR (status = 'claimed' AND claim_deadline < {p}))")
                params.append(now)
            elif status == "claimed":
                where.append("status = 'claimed' AND claim_deadline >= {p}")
                params.append(now)
            else:
                where.append("status = 'decided'")
        if kind is not None:
            where.append("kind = {p}")
            params.append(kind)
        if after is not None:
            where.append("id > {p}")
            params.append(after)
        sql = self.sql(f"SELECT {_SELECT} FROM {{items}} WHERE {' AND '.join(where)} ORDER BY id LIMIT {{p}}")

        return [row_to_item(r, now) for r in self._rows(sql, (*params, int(limit)))]

    # -- the review flow
    def claim_next(self, reviewer: str, *, exclude: Sequence[str] = ()) -> ReviewItem | None:
        exclude = tuple(exclude)[:MAX_EXCLUDE]
        now = self._clock()
        row = self._run(lambda cur: self._claim(cur, reviewer, now, exclude), write=True)
        return None if row is None else row_to_item(row, now)

    @property
    def claim_order(self) -> str:
        """The ORDER BY of a claim (``REVIEW_ORDERS``); ids sort by creation time."""
        if self.order == "most_uncertain":
            return ("CASE WHEN kind = 'audit' THEN 0 WHEN priority IS NULL THEN 2 ELSE 1 END, "
                    "CASE WHEN kind = 'audit' THEN 0 ELSE priority END DESC, id")
        return "id"

    def _claimable(self, exclude: Sequence[str]) -> str:
        cond = "(status = 'pending' OR (status = 'claimed' AND claim_deadline < {p}))"
        if exclude:
            cond += f" AND id NOT IN ({', '.join(['{p}'] * len(exclude))})"
        return cond

    def decide(self, item_id: str, reviewer: str, *, label: str | None = None, value: float | None = None,
               note: str | None = None, admin: bool = False) -> ReviewItem:
        check_id(item_id)
        if (label is None) == (value is None):
            raise ValueError("a decision carries exactly one of label or value")
        now = self._clock()
        who = "status <> 'decided'" if admin else "status = 'claimed' AND reviewer = {p}"
        sql = self.sql("UPDATE {items} SET status = 'decided', label = {p}, value = {p}, note = {p}, "
                       f"decided = {{p}}, decided_by = {{p}}, claim_deadline = NULL WHERE id = {{p}} AND {who}")

        def write(cur: Any) -> tuple[int, Sequence[Any] | None]:
            target = self._resolve(cur, item_id)
            params: tuple[Any, ...] = (label, value, note, now, reviewer, target)
            cur.execute(sql, params if admin else params + (reviewer,))
            return cur.rowcount, self._fetch(cur, target)

        changed, row = self._run(write, write=True)
        return self._after_change(item_id, row, changed, reviewer, now, "decide")

    def release(self, item_id: str, reviewer: str, *, admin: bool = False) -> ReviewItem:
        check_id(item_id)
        now = self._clock()
        who = "status = 'claimed'" if admin else "status = 'claimed' AND reviewer = {p}"
        sql = self.sql("UPDATE {items} SET status = 'pending', reviewer = NULL, claim_deadline = NULL "
                       f"WHERE id = {{p}} AND {who}")

        def write(cur: Any) -> tuple[int, Sequence[Any] | None]:
            target = self._resolve(cur, item_id)
            cur.execute(sql, (target,) if admin else (target, reviewer))
            return cur.rowcount, self._fetch(cur, target)

        changed, row = self._run(write, write=True)
        return self._after_change(item_id, row, changed, reviewer, now, "release")

    def _after_change(self, item_id: str, row: Sequence[Any] | None, changed: int, reviewer: str,
                      now: float, verb: str) -> ReviewItem:
        if row is None:
            raise NotFound(f"no review item with id '{item_id}'", field="id")
        stored = dict(zip(COLUMNS, row))
        if changed == 1:
            return row_to_item(row, now)
        if stored["status"] == "decided":
            raise Conflict(f"cannot {verb} item '{item_id}': it is already decided", field="id")
        if stored["status"] == "claimed" and stored["reviewer"] != reviewer:
            raise Conflict(f"cannot {verb} item '{item_id}': it is claimed by another reviewer", field="id")
        raise Conflict(f"cannot {verb} item '{item_id}': it is not claimed by you; claim it first", field="id")

    # -- counts
    def counts(self) -> dict[str, int]:
        now = self._clock()
        sql = self.sql(
            "SELECT "
            "SUM(CASE WHEN status = 'pending' OR (status = 'claimed' AND claim_deadline < {p}) THEN 1 ELSE 0 END), "
            "SUM(CASE WHEN status = 'claimed' AND claim_deadline >= {p} THEN 1 ELSE 0 END), "
            "SUM(CASE WHEN status = 'decided' THEN 1 ELSE 0 END), COUNT(*) FROM {items}"
        )

        def read(cur: Any) -> Sequence[Any]:
            cur.execute(sql, (now, now))
            return cur.fetchone()

        pending, claimed, decided, total = (int(v or 0) for v in self._run(read, write=False))
        return {"pending": pending, "claimed": claimed, "decided": decided, "total": total}

    def pending_count(self) -> int:
        # Two counts over the (status, id) index instead of one scan of the table:
        # about 7 ms instead of 50 ms at 50,000 items (SQLite, measured), read once a
        # second on the request path for the pending ceiling.
        now = self._clock()

        def read(cur: Any) -> int:
            cur.execute(self.sql("SELECT COUNT(*) FROM {items} WHERE status = 'pending'"))
            pending = int(cur.fetchone()[0] or 0)
            cur.execute(self.sql("SELECT COUNT(*) FROM {items} WHERE status = 'claimed' AND claim_deadline < {p}"),
                        (now,))
            return pending + int(cur.fetchone()[0] or 0)

        return self._run(read, write=False)

    def agreement(self) -> dict[str, dict[str, int]]:
        sql = self.sql(
            "SELECT kind, COUNT(*), "
            "SUM(CASE WHEN label IS NOT NULL THEN 1 ELSE 0 END), "
            "SUM(CASE WHEN label IS NOT NULL AND label = prediction THEN 1 ELSE 0 END), "
            "SUM(CASE WHEN value IS NOT NULL THEN 1 ELSE 0 END), "
            "SUM(CASE WHEN value IS NOT NULL AND value >= interval_lower AND value <= interval_upper "
            "THEN 1 ELSE 0 END) "
            "FROM {items} WHERE status = 'decided' GROUP BY kind"
        )

        out = {kind: {"decided": 0, "labelled": 0, "agree": 0, "valued": 0, "covered": 0} for kind in KINDS}
        for kind, n, labelled, agree, valued, covered in self._rows(sql):
            out[kind] = {"decided": int(n), "labelled": int(labelled or 0), "agree": int(agree or 0),
                         "valued": int(valued or 0), "covered": int(covered or 0)}
        return out

    def audit_tallies(self) -> list[AuditTally]:
        sql = self.sql(
            "SELECT model_checksum, kind, "
            "SUM(CASE WHEN label IS NOT NULL OR value IS NOT NULL THEN 1 ELSE 0 END), "
            "SUM(CASE WHEN (label IS NOT NULL AND label = prediction) OR (value IS NOT NULL "
            "AND value >= interval_lower AND value <= interval_upper) THEN 1 ELSE 0 END) "
            "FROM {items} WHERE status = 'decided' GROUP BY model_checksum, kind"
        )

        by_model: dict[str, dict[str, int]] = {}
        for checksum, kind, decided, right in self._rows(sql):
            row = by_model.setdefault(str(checksum), {})
            row[f"{kind}_decided"] = int(decided or 0)
            row[f"{kind}_right"] = int(right or 0)
        return [AuditTally(checksum, audit_decided=r.get("audit_decided", 0), audit_agree=r.get("audit_right", 0),
                           abstain_decided=r.get("abstain_decided", 0),
                           abstain_model_right=r.get("abstain_right", 0))
                for checksum, r in sorted(by_model.items())]

    def ping(self) -> None:
        def read(cur: Any) -> None:
            cur.execute("SELECT 1")
            cur.fetchone()

        self._run(read, write=False)


def _backfill(store: SqlStore, cur: Any, column: str, source: str, where: str,
              compute: Callable[[str], Any]) -> None:
    """Migration step: set ``column`` of every item matching ``where`` to ``compute(source JSON)``;
    a value that cannot be computed (``ValueError``) or is None is left NULL."""
    cur.execute(store.sql(f"SELECT id, {source} FROM {{items}} WHERE {where}"))
    for item_id, text in cur.fetchall():
        try:
            value = compute(text)
        except ValueError:
            continue
        if value is not None:
            cur.execute(store.sql(f"UPDATE {{items}} SET {column} = {{p}} WHERE id = {{p}}"), (value, item_id))


def backfill_digests(store: SqlStore, cur: Any) -> None:
    """Migration step (schema 3): the case digest of every stored item that has a client case id."""
    _backfill(store, cur, "case_digest", "case_json", "client_case_id IS NOT NULL",
              lambda text: case_digest(json.loads(text)))


def backfill_priorities(store: SqlStore, cur: Any) -> None:
    """Migration step (schema 4): the review priority of every pending or claimed item."""
    _backfill(store, cur, "priority", "summary_json", "status <> 'decided'",
              lambda text: review_priority(json.loads(text)))
