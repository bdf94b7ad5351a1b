"""A local durable spool for review items the store could not take, and its replayer.

When the review store is unreachable the prediction is still answered; the
abstained case must not be lost, so it is written here first: a small SQLite
file on the server's own disk (``<data_dir>/review-spool.sqlite3``), WAL
journal, ``synchronous=FULL`` (each put is on disk before the response goes
out). A ``Replayer`` thread moves spooled items into the store when it
answers again.

Exactly once: each spooled item carries the review id generated before the
store was tried, and the store's enqueue is insert-if-absent on that id (and
on the client's case id), so an item replayed twice, by a crash between
"inserted" and "removed from the spool" or by two server processes sharing
one spool, still appears once. Items are removed from the spool only after
the store committed them.

Example::

    spool = Spool("demur-data/review-spool.sqlite3")
    spool.put([item])                 # store down
    moved = spool.replay(store)       # later: number of items now in the store
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
import sqlite3
import threading
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

from demur.serve.errors import ReviewStoreUnavailable
from demur.serve.review.store import NewItem, ReviewStore

__all__ = ["Replayer", "Spool", "SpoolError"]

log = logging.getLogger("demur.review")

DEFAULT_BATCH = 200


class SpoolError(OSError):
    """The spool itself cannot be written (disk full, read-only, damaged file)."""


class Spool:
    """Append-only local store of ``NewItem`` JSON, oldest first."""

    def __init__(self, path: str | os.PathLike[str], *, busy_timeout_s: float = 10.0) -> None:
        self.path = Path(path)
        self._busy_timeout_s = busy_timeout_s
        self._ready = False

    def __repr__(self) -> str:
        return f"Spool({str(self.path)!r})"

    @contextlib.contextmanager
    def _conn(self) -> Iterator[sqlite3.Connection]:
        # A connection per call: the spool is touched only when the store fails,
        # and from several threads, so simplicity beats pooling here.
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            conn = sqlite3.connect(self.path, timeout=self._busy_timeout_s, isolation_level=None)
        except (OSError, sqlite3.Error) as exc:
            raise SpoolError(f"review spool {self.path} cannot be opened: {exc}") from exc
        try:
            conn.execute(f"PRAGMA busy_timeout = {int(self._busy_timeout_s * 1000)}")
            conn.execute("PRAGMA journal_mode = WAL")
            conn.execute("PRAGMA synchronous = FULL")
            if not self._ready:
                conn.execute("CREATE TABLE IF NOT EXISTS demur_spool ("
                             "seq INTEGER PRIMARY KEY AUTOINCREMENT, id TEXT NOT NULL, item TEXT NOT NULL)")
                self._ready = True
            yield conn
        except sqlite3.Error as exc:
            raise SpoolError(f"review spool {self.path} failed: {exc}") from exc
        finally:
            conn.close()

    def put(self, items: Sequence[NewItem]) -> None:
        """Append items durably (one transaction); ``SpoolError`` if the disk refuses."""
        rows = [(it.id, json.dumps(it.to_json(), separators=(",", ":"))) for it in items]
        with self._conn() as conn:
            conn.execute("BEGIN IMMEDIATE")
            conn.executemany("INSERT INTO demur_spool (id, item) VALUES (?, ?)", rows)
            conn.execute("COMMIT")

    def size(self) -> int:
        """Items waiting to be replayed."""
        if not self.path.exists():
            return 0
        with self._conn() as conn:
            return int(conn.execute("SELECT COUNT(*) FROM demur_spool").fetchone()[0])

    def peek(self, limit: int = DEFAULT_BATCH) -> list[tuple[int, NewItem]]:
        """The oldest ``limit`` entries as (sequence number, item)."""
        with self._conn() as conn:
            rows = conn.execute("SELECT seq, item FROM demur_spool ORDER BY seq LIMIT ?", (limit,)).fetchall()
        return [(int(seq), NewItem.from_json(json.loads(text))) for seq, text in rows]

    def replay(self, store: ReviewStore, *, batch: int = DEFAULT_BATCH) -> int:
        """Move spooled items into ``store``, oldest first; return how many moved.

        Stops at the first store failure (raising ``ReviewStoreUnavailable``);
        items already moved stay moved, the rest wait for the next call.
        """
        if not self.path.exists():
            return 0
        moved = 0
        while True:
            entries = self.peek(batch)
            if not entries:
                return moved
            store.enqueue([item for _, item in entries])  # insert-if-absent: replay is idempotent
            with self._conn() as conn:
                conn.execute("BEGIN IMMEDIATE")
                conn.executemany("DELETE FROM demur_spool WHERE seq = ?", [(seq,) for seq, _ in entries])
                conn.execute("COMMIT")
            moved += len(entries)


class Replayer:
    """A daemon thread that replays the spool every ``interval_s`` seconds.

    ``on_replayed(n)`` is called after items moved (metrics); ``on_up()``
    after a replay pass found the store answering (the router uses it to try
    the store again on the request path).
    """

    def __init__(self, spool: Spool, store: ReviewStore, *, interval_s: float = 5.0,
                 on_replayed: Callable[[int], Any] | None = None,
                 on_up: Callable[[], Any] | None = None) -> None:
        self.spool = spool
        self.store = store
        self.interval_s = max(0.05, float(interval_s))
        self.on_replayed = on_replayed
        self.on_up = on_up
        self.replayed = 0
        self._stop = threading.Event()
        self._wake = threading.Event()
        self._thread: threading.Thread | None = None
        self._lock = threading.Lock()

    @property
    def running(self) -> bool:
        return self._thread is not None and self._thread.is_alive()

    def start(self) -> None:
        """Start the thread (once; a no-op if it runs). Call after a fork, never before."""
        with self._lock:
            if self.running:
                return
            self._stop.clear()
            self._thread = threading.Thread(target=self._loop, name="demur-spool-replayer", daemon=True)
            self._thread.start()

    def wake(self) -> None:
        """Replay now instead of at the next tick."""
        self._wake.set()

    def stop(self, timeout_s: float = 5.0) -> None:
        self._stop.set()
        self._wake.set()
        thread = self._thread
        if thread is not None:
            thread.join(timeout_s)
        self._thread = None

    def run_once(self) -> int:
        """One replay pass; returns items moved (0 if the store is still down)."""
        try:
            if self.spool.size() == 0:
                return 0
            moved = self.spool.replay(self.store)
        except ReviewStoreUnavailable as exc:
            log.warning("review store still unavailable; %d item(s) stay spooled: %s",
                        self._size_or_unknown(), exc.message)
            return 0
        except SpoolError as exc:
            log.error("review spool cannot be read: %s", exc)
            return 0
        if moved:
            self.replayed += moved
            log.info("replayed %d spooled review item(s) into the store", moved)
            if self.on_replayed is not None:
                self.on_replayed(moved)
        if self.on_up is not None:
            self.on_up()
        return moved

    def _size_or_unknown(self) -> int:
        try:
            return self.spool.size()
        except SpoolError:
            return -1

    def _loop(self) -> None:
        while not self._stop.is_set():
            self._wake.wait(self.interval_s)
            self._wake.clear()
            if self._stop.is_set():
                return
            self.run_once()
