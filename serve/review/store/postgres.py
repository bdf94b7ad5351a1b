"""The shared review queue on PostgreSQL (``postgresql://...``), for several replicas.

psycopg 3 with a ``psycopg_pool.ConnectionPool``; ``claim_next`` is one
``UPDATE ... WHERE id = (SELECT ... FOR UPDATE SKIP LOCKED LIMIT 1)``, so concurrent
claimers each get a different row without waiting on each other. A ``schema`` query
parameter (``postgresql://host/db?schema=NAME``, stripped before connecting) puts the
tables in their own schema; tests use a random one per test.

A deadlock (SQLSTATE 40P01) or serialisation failure (40001) is not an outage: the
transaction is run again in place (``SqlStore._run``: bounded, jittered). Only when
the retries are spent does it count as one (the router then spools: nothing is lost).
"""

from __future__ import annotations

import contextlib
import re
import time
from collections.abc import Callable, Iterator, Sequence
from typing import Any
from urllib.parse import parse_qsl, urlencode, urlsplit, urlunsplit

from demur.serve.errors import ConfigError, Conflict, DemurError, ReviewItemRejected, ReviewStoreUnavailable
from demur.serve.review.store.items import COLUMNS
from demur.serve.review.store.sql import (
    TRANSIENT_RETRIES,
    Migration,
    SqlStore,
    backfill_digests,
    backfill_priorities,
)

__all__ = ["MIGRATIONS", "PostgresStore", "postgres_errors"]

_SELECT = ", ".join(COLUMNS)

MIGRATIONS: tuple[Migration, ...] = (
    (  # 1: the items
        """CREATE TABLE IF NOT EXISTS {items} (
            id TEXT PRIMARY KEY,
            created DOUBLE PRECISION NOT NULL,
            kind TEXT NOT NULL CHECK (kind IN ('abstain', 'audit')),
            status TEXT NOT NULL CHECK (status IN ('pending', 'claimed', 'decided')),
            model_name TEXT NOT NULL,
            model_version TEXT NOT NULL,
            model_checksum TEXT NOT NULL,
            client_case_id TEXT,
            case_json TEXT NOT NULL,
            summary_json TEXT NOT NULL,
            prediction TEXT,
            interval_lower DOUBLE PRECISION,
            interval_upper DOUBLE PRECISION,
            reviewer TEXT,
            claim_deadline DOUBLE PRECISION,
            claims INTEGER NOT NULL DEFAULT 0,
            label TEXT,
            value DOUBLE PRECISION,
            note TEXT,
            decided DOUBLE PRECISION,
            decided_by TEXT,
            UNIQUE (client_case_id, model_checksum)
        )""",
        "CREATE INDEX IF NOT EXISTS demur_review_items_status_idx ON {items} (status, id)",
    ),
    (  # 2: the dead-letter table, for items the store can never hold as they are
        """CREATE TABLE IF NOT EXISTS {rejected} (
            id TEXT PRIMARY KEY,
            created DOUBLE PRECISION NOT NULL,
            rejected DOUBLE PRECISION NOT NULL,
            reason TEXT NOT NULL,
            item_json TEXT NOT NULL
        )""",
    ),
    (  # 3: one item per case key (case id, checksum, input digest), aliases
        "ALTER TABLE {items} ADD COLUMN IF NOT EXISTS case_digest TEXT",
        "ALTER TABLE {items} DROP CONSTRAINT IF EXISTS demur_review_items_client_case_id_model_checksum_key",
        backfill_digests,
        "CREATE UNIQUE INDEX IF NOT EXISTS demur_review_items_case_key "
        "ON {items} (client_case_id, model_checksum, case_digest)",
        """CREATE TABLE IF NOT EXISTS {aliases} (
            alias TEXT PRIMARY KEY,
            id TEXT NOT NULL,
            created DOUBLE PRECISION NOT NULL
        )""",
    ),
    (  # 4: the review priority (most_uncertain order)
        "ALTER TABLE {items} ADD COLUMN IF NOT EXISTS priority DOUBLE PRECISION",
        backfill_priorities,
        "CREATE INDEX IF NOT EXISTS demur_review_items_priority_idx ON {items} (status, kind, priority)",
    ),
)
"""Index i brings the schema from version i to i + 1; written in PostgreSQL's dialect."""


_SCHEMA_RE = re.compile(r"^[a-z_][a-z0-9_]{0,62}$")


@contextlib.contextmanager
def postgres_errors() -> Iterator[None]:
    """The one place psycopg's (and the pool's) exceptions become demur's."""
    import psycopg
    import psycopg_pool

    try:
        yield
    except DemurError:
        raise
    except psycopg.errors.IntegrityError as exc:
        raise Conflict(f"the review store refused a duplicate: {exc.diag.message_primary or exc}") from exc
    except psycopg.DataError as exc:  # SQLSTATE class 22, and the client's refusal of a NUL in text
        raise ReviewItemRejected(f"the PostgreSQL review store cannot hold this item: {_pg_message(exc)}") from exc
    except (UnicodeError, ValueError, OverflowError) as exc:  # adaptation: no encoding for the text
        raise ReviewItemRejected(f"the PostgreSQL review store cannot hold this item: {exc}") from exc
    except (psycopg.errors.DeadlockDetected, psycopg.errors.SerializationFailure) as exc:  # retries spent
        raise ReviewStoreUnavailable(f"the PostgreSQL review store kept failing with "
                                     f"'{_pg_message(exc)}' after {TRANSIENT_RETRIES} retries") from exc
    except (psycopg_pool.PoolTimeout, psycopg_pool.PoolClosed) as exc:
        raise ReviewStoreUnavailable(f"no PostgreSQL connection for the review store: {exc}") from exc
    except psycopg.Error as exc:  # OperationalError, InterfaceError, DatabaseError, ...
        raise ReviewStoreUnavailable(f"the PostgreSQL review store failed: {_pg_message(exc)}") from exc


def _pg_message(exc: Exception) -> str:
    return str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__


def _split_schema(url: str) -> tuple[str, str | None]:
    parts = urlsplit(url)
    query = parse_qsl(parts.query, keep_blank_values=True)
    schema = None
    kept = []
    for key, value in query:
        if key == "schema":
            schema = value
        else:
            kept.append((key, value))
    if schema is not None and not _SCHEMA_RE.match(schema):
        raise ConfigError(f"review store schema must match [a-z_][a-z0-9_]*; got '{schema}'", field="review_store")
    return urlunsplit(parts._replace(query=urlencode(kept))), schema


class PostgresStore(SqlStore):
    """The shared queue on PostgreSQL: a connection pool, ``SKIP LOCKED`` claims.

    The pool opens without waiting, so a server starts (and answers
    predictions, spooling abstentions) while PostgreSQL is down; the schema is
    created on the first operation that reaches it.
    """

    _p = "%s"
    migrations = MIGRATIONS

    def __init__(self, url: str, *, lease_s: float, pool_size: int = 4, timeout_s: float = 3.0,
                 connect_timeout_s: int = 3, clock: Callable[[], float] = time.time, order: str = "oldest") -> None:
        conninfo, schema = _split_schema(url)
        super().__init__(lease_s=lease_s, clock=clock, prefix=f'"{schema}".' if schema else "", order=order)
        import psycopg_pool

        self.schema = schema
        parts = urlsplit(conninfo)
        self._url_shown = f"{parts.scheme}://{parts.hostname or ''}:{parts.port or 5432}{parts.path}"
        self._pool = psycopg_pool.ConnectionPool(
            conninfo,
            min_size=1,
            max_size=max(1, pool_size),
            timeout=timeout_s,
            kwargs={"connect_timeout": connect_timeout_s, "autocommit": False},
            check=psycopg_pool.ConnectionPool.check_connection,
            open=False,
            name="demur-review",
        )
        self._pool.open(wait=False)

    def __repr__(self) -> str:
        return f"PostgresStore({self._url_shown!r}, schema={self.schema!r})"

    def _errors(self) -> contextlib.AbstractContextManager[None]:
        return postgres_errors()

    def _transient(self, exc: BaseException) -> bool:
        """SQLSTATE 40P01 (deadlock detected) and 40001 (serialization failure): PostgreSQL
        rolled the transaction back and asks for it to be run again (its manual, "Serialization
        Failure Handling"); never an outage."""
        import psycopg

        return super()._transient(exc) or isinstance(
            exc, (psycopg.errors.DeadlockDetected, psycopg.errors.SerializationFailure))

    @contextlib.contextmanager
    def _tx(self, *, write: bool) -> Iterator[Any]:
        with self._pool.connection() as conn:
            with conn.transaction():
                with conn.cursor() as cur:
                    yield cur

    def _migrate(self) -> None:
        with self._tx(write=True) as cur:
            # One migrator at a time across processes; released at commit.
            cur.execute("SELECT pg_advisory_xact_lock(hashtext(%s))", (f"demur-review-schema:{self.schema}",))
            if self.schema:
                cur.execute(f'CREATE SCHEMA IF NOT EXISTS "{self.schema}"')
            self._apply_migrations(cur)

    def _claim(self, cur: Any, reviewer: str, now: float, exclude: Sequence[str]) -> Sequence[Any] | None:
        cond = self._claimable(exclude)
        sql = self.sql(
            "UPDATE {items} SET status = 'claimed', reviewer = {p}, claim_deadline = {p}, claims = claims + 1 "
            f"WHERE id = (SELECT id FROM {{items}} WHERE {cond} ORDER BY {self.claim_order} LIMIT 1 "
            "FOR UPDATE SKIP LOCKED) "
            f"AND (status = 'pending' OR (status = 'claimed' AND claim_deadline < {{p}})) RETURNING {_SELECT}"
        )
        for _ in range(5):  # a row taken between the subquery and the update: try the next one
            cur.execute(sql, (reviewer, now + self.lease_s, now, *exclude, now))
            row = cur.fetchone()
            if row is not None:
                return row
            cur.execute(self.sql(f"SELECT 1 FROM {{items}} WHERE {cond} LIMIT 1"), (now, *exclude))
            if cur.fetchone() is None:
                return None
        return None

    def close(self) -> None:
        self._pool.close()
