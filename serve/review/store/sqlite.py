"""The embedded review queue: one SQLite file (``sqlite:///PATH``).

WAL journal (readers never block the writer), ``synchronous=FULL`` (a commit is on
disk before the call returns, so an acknowledged item survives a killed process), a
busy timeout, and every write in a ``BEGIN IMMEDIATE`` transaction, which takes the
write lock up front: two processes cannot both claim the same item, and writers never
deadlock (one waits for the other).
"""

from __future__ import annotations

import contextlib
import os
import sqlite3
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

from demur.serve.errors import Conflict, DemurError, ReviewItemRejected, ReviewStoreUnavailable
from demur.serve.review.store.sql import Migration, SqlStore, backfill_digests, backfill_priorities

__all__ = ["MIGRATIONS", "SqliteStore", "sqlite_errors"]

_ITEMS_COLUMNS = """
            id TEXT PRIMARY KEY,
            created REAL NOT NULL,
            kind TEXT NOT NULL CHECK (kind IN ('abstain', 'audit')),
            status TEXT NOT NULL CHECK (status IN ('pending', 'claimed', 'decided')),
            model_name TEXT NOT NULL,
            model_version TEXT NOT NULL,
            model_checksum TEXT NOT NULL,
            client_case_id TEXT,
            case_json TEXT NOT NULL,
            summary_json TEXT NOT NULL,
            prediction TEXT,
            interval_lower REAL,
            interval_upper REAL,
            reviewer TEXT,
            claim_deadline REAL,
            claims INTEGER NOT NULL DEFAULT 0,
            label TEXT,
            value REAL,
            note TEXT,
            decided REAL,
            decided_by TEXT"""
_V2_COLUMNS = ("id, created, kind, status, model_name, model_version, model_checksum, client_case_id, "
               "case_json, summary_json, prediction, interval_lower, interval_upper, reviewer, "
               "claim_deadline, claims, label, value, note, decided, decided_by")

MIGRATIONS: tuple[Migration, ...] = (
    (  # 1: the items
        f"CREATE TABLE IF NOT EXISTS {{items}} ({_ITEMS_COLUMNS},\n"
        "            UNIQUE (client_case_id, model_checksum)\n        )",
        "CREATE INDEX IF NOT EXISTS demur_review_items_status_idx ON {items} (status, id)",
    ),
    (  # 2: the dead-letter table, for items the store can never hold as they are
        """CREATE TABLE IF NOT EXISTS {rejected} (
            id TEXT PRIMARY KEY,
            created REAL NOT NULL,
            rejected REAL NOT NULL,
            reason TEXT NOT NULL,
            item_json TEXT NOT NULL
        )""",
    ),
    (  # 3: one item per case key (case id, checksum, input digest), aliases. SQLite cannot
       #    drop a table constraint, so the table is rebuilt (its documented recipe).
        f"CREATE TABLE demur_review_items_v3 ({_ITEMS_COLUMNS},\n            case_digest TEXT\n        )",
        f"INSERT INTO demur_review_items_v3 ({_V2_COLUMNS}) SELECT {_V2_COLUMNS} FROM {{items}}",
        "DROP TABLE {items}",
        "ALTER TABLE demur_review_items_v3 RENAME TO demur_review_items",
        "CREATE INDEX IF NOT EXISTS demur_review_items_status_idx ON {items} (status, id)",
        backfill_digests,
        "CREATE UNIQUE INDEX IF NOT EXISTS demur_review_items_case_key "
        "ON {items} (client_case_id, model_checksum, case_digest)",
        """CREATE TABLE IF NOT EXISTS {aliases} (
            alias TEXT PRIMARY KEY,
            id TEXT NOT NULL,
            created REAL NOT NULL
        )""",
    ),
    (  # 4: the review priority (most_uncertain order)
        "ALTER TABLE {items} ADD COLUMN priority REAL",
        backfill_priorities,
        "CREATE INDEX IF NOT EXISTS demur_review_items_priority_idx ON {items} (status, kind, priority)",
    ),
)
"""Index i brings the schema from version i to i + 1; written in SQLite's dialect."""


@contextlib.contextmanager
def sqlite_errors() -> Iterator[None]:
    """The one place sqlite3's exceptions become demur's."""
    try:
        yield
    except DemurError:
        raise
    except sqlite3.IntegrityError as exc:
        raise Conflict(f"the review store refused a duplicate: {exc}") from exc
    except sqlite3.DataError as exc:  # a value SQLite cannot hold (too big, ...)
        raise ReviewItemRejected(f"the SQLite review store cannot hold this item: {exc}") from exc
    except (UnicodeError, ValueError, OverflowError) as exc:  # a text or number no column can take
        raise ReviewItemRejected(f"the SQLite review store cannot hold this item: {exc}") from exc
    except sqlite3.Error as exc:  # OperationalError (locked, I/O, cannot open), DatabaseError, ...
        raise ReviewStoreUnavailable(f"the SQLite review store failed: {exc}") from exc
    except OSError as exc:  # its directory cannot be created
        raise ReviewStoreUnavailable(f"the SQLite review store cannot be opened: {exc}") from exc


class SqliteStore(SqlStore):
    """The embedded queue: one SQLite file, one connection per thread."""

    migrations = MIGRATIONS

    def __init__(self, path: str | os.PathLike[str], *, lease_s: float, busy_timeout_s: float = 10.0,
                 clock: Callable[[], float] = time.time, order: str = "oldest") -> None:
        super().__init__(lease_s=lease_s, clock=clock, order=order)
        self.path = Path(path)
        self._busy_timeout_s = busy_timeout_s
        self._local = threading.local()
        self._all: list[sqlite3.Connection] = []
        self._all_lock = threading.Lock()
        self._closed = False

    def __repr__(self) -> str:
        return f"SqliteStore({str(self.path)!r})"

    def _conn(self) -> sqlite3.Connection:
        conn = getattr(self._local, "conn", None)
        if conn is not None:
            return conn
        if self._closed:
            raise sqlite3.ProgrammingError("the store is closed")
        self.path.parent.mkdir(parents=True, exist_ok=True)
        conn = sqlite3.connect(self.path, timeout=self._busy_timeout_s, isolation_level=None,
                               check_same_thread=False)
        conn.execute(f"PRAGMA busy_timeout = {int(self._busy_timeout_s * 1000)}")
        conn.execute("PRAGMA journal_mode = WAL")
        conn.execute("PRAGMA synchronous = FULL")
        self._local.conn = conn
        with self._all_lock:
            self._all.append(conn)
        return conn

    def _errors(self) -> contextlib.AbstractContextManager[None]:
        return sqlite_errors()

    @contextlib.contextmanager
    def _tx(self, *, write: bool) -> Iterator[Any]:
        conn = self._conn()
        cur = conn.cursor()
        cur.execute("BEGIN IMMEDIATE" if write else "BEGIN")
        try:
            yield cur
        except BaseException:
            conn.rollback()
            raise
        else:
            conn.commit()
        finally:
            cur.close()

    def _migrate(self) -> None:
        with self._tx(write=True) as cur:
            self._apply_migrations(cur)

    def _claim(self, cur: Any, reviewer: str, now: float, exclude: Sequence[str]) -> Sequence[Any] | None:
        # BEGIN IMMEDIATE already holds the database's write lock: select then update is atomic.
        cur.execute(self.sql(f"SELECT id FROM {{items}} WHERE {self._claimable(exclude)} "
                             f"ORDER BY {self.claim_order} LIMIT 1"),
                    (now, *exclude))
        row = cur.fetchone()
        if row is None:
            return None
        cur.execute(self.sql("UPDATE {items} SET status = 'claimed', reviewer = {p}, claim_deadline = {p}, "
                             "claims = claims + 1 WHERE id = {p}"), (reviewer, now + self.lease_s, row[0]))
        return self._fetch(cur, row[0])

    def close(self) -> None:
        self._closed = True
        with self._all_lock:
            conns, self._all = self._all, []
        for conn in conns:
            with contextlib.suppress(sqlite3.Error):
                conn.close()
        self._local = threading.local()
