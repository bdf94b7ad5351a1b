"""The review queue: every abstained (or audit-sampled) case waits here for a person.

One small interface, ``ReviewStore`` (items.py), and two real backends behind
``open_store(url)``:

- ``SqliteStore`` (``sqlite:///PATH``, sqlite.py): the embedded default, a file in
  the server's data directory;
- ``PostgresStore`` (``postgresql://...``, postgres.py): for several replicas
  sharing one queue.

Both run the same SQL (sql.py); each writes its own migrations in its own dialect.

Lifecycle of an item::

    pending --claim_next--> claimed --decide--> decided
       ^                      |
       +------ release -------+
       +--- lease expires ----+   (lazily: an expired claim counts as pending
                                   and is claimable again; nothing sweeps)

A decision is accepted from the claimant (also after the lease ran out, as
long as nobody else claimed the item meanwhile) or from an admin; anything
else is a ``Conflict`` (409). Decided items are final.

Ids that always resolve. The caller makes an item's id before the store is tried,
so an item spooled during an outage keeps it. Enqueue is insert-if-absent on that
id and on the case key (client case id, model checksum, digest of the inputs the
model saw): the same case sent again is stored once, and the id it was sent under
is recorded as an *alias* of the stored item. ``get``, ``decide`` and ``release``
accept an alias, so a ``pending_review_id`` given while the store was cut
resolves after the replay even when the same case had been queued under another
id. The same case id with *other* inputs is a new item (``Enqueued.reused``).

Times are UNIX seconds (float, UTC) from the store's ``clock``.

Errors: each backend converts its driver's exceptions into ``demur.serve.errors``
in exactly one place (``sqlite_errors`` / ``postgres_errors``), and tells the
kinds apart, because they call for different handling:

- a **conflict between writers** (PostgreSQL deadlock, serialisation failure):
  retried in place, bounded, with jitter; never an outage;
- an **outage** (unreachable, locked, broken) -> ``ReviewStoreUnavailable``: the
  whole batch waits (the router spools it) and is retried later;
- a **data error** (text the database cannot encode: a lone surrogate, a NUL on
  PostgreSQL; a value out of range) -> ``ReviewItemRejected``: retrying cannot
  help, so ``enqueue`` sets that one item aside in the dead-letter table
  (``demur_review_rejected``: the item as ASCII-escaped JSON and the reason) and
  stores the rest of the batch. Its slot in the returned ids is ``None``.

Example::

    store = open_store("sqlite:///demur-data/reviews.sqlite3", lease_s=300)
    [rid] = store.enqueue([new_item(kind="abstain", model=..., case=..., summary=..., prediction="7")])
    item = store.claim_next("t-3f9c2a71be04")
    store.decide(item.id, "t-3f9c2a71be04", label="1", note="a 1 with a serif")
"""

from __future__ import annotations

import time
from collections.abc import Callable

from demur.serve.errors import ConfigError
from demur.serve.review.store.items import (KINDS, MAX_EXCLUDE, MAX_ID_CHARS, MAX_NOTE_CHARS, REVIEW_ORDERS,
                                           SCHEMA_VERSION, STATUSES, Enqueued, NewItem, ReviewItem, ReviewStore,
                                           case_digest, new_id, new_item, unstorable)
from demur.serve.review.store.postgres import PostgresStore
from demur.serve.review.store.sqlite import SqliteStore

# The package's public face: the items' names, the two stores and open_store.
__all__ = ["KINDS", "MAX_EXCLUDE", "MAX_ID_CHARS", "MAX_NOTE_CHARS", "REVIEW_ORDERS", "SCHEMA_VERSION", "STATUSES",
           "Enqueued", "NewItem", "PostgresStore", "ReviewItem", "ReviewStore", "SqliteStore", "case_digest",
           "new_id", "new_item", "open_store", "unstorable"]


def open_store(url: str, *, lease_s: float, pool_size: int = 4,
               clock: Callable[[], float] = time.time, order: str = "oldest") -> ReviewStore:
    """A store from a URL: ``sqlite:///relative/path``, ``sqlite:////absolute/path``,
    or ``postgresql://user@host:port/db[?schema=NAME]``. ``order``: one of ``REVIEW_ORDERS``."""
    if url.startswith("sqlite:///"):
        path = url[len("sqlite:///"):]
        if not path:
            raise ConfigError("review store URL 'sqlite:///' needs a file path", field="review_store")
        return SqliteStore(path, lease_s=lease_s, clock=clock, order=order)
    if url.startswith(("postgresql://", "postgres://")):
        return PostgresStore(url, lease_s=lease_s, pool_size=pool_size, clock=clock, order=order)
    shown = url.split("://", 1)[0] + "://..." if "://" in url else url[:40]
    raise ConfigError(f"review store must be 'sqlite:///PATH' or 'postgresql://...'; got '{shown}'",
                      field="review_store")
