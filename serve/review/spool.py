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

One bad item never stalls the spool. The store sets aside an item it can
never hold (its dead-letter table; ``enqueue`` gives ``None`` for it) and
stores the rest; if a batch still fails with anything but an outage, the
replay goes item by item, and an item that fails alone while others get
through is moved to the spool's own dead-letter table
(``demur_spool_rejected``, with the reason), as is an entry that cannot be
read back. (When every item fails alone, the store is at fault, not the
items: they stay spooled.) The replayer thread survives any
exception: it logs it, counts it (``errors``, ``on_error``) and tries again
at the next tick.

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

from demur.serve.errors import DemurError, ReviewStoreUnavailable
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
                conn.execute("CREATE TABLE IF NOT EXISTS demur_spool_rejected ("
                             "seq INTEGER PRIMARY KEY, item TEXT NOT NULL, reason TEXT NOT NULL)")
                self._ready = True
            yield conn
        except sqlite3.Error as exc:
            raise SpoolError(f"review spool {self.path} failed: {exc}") from exc
        finally:
            conn.close()

    def put(self, items: Sequence[NewItem]) -> None:
        """Append items durably (one transaction); ``SpoolError`` if the disk refuses.
        Stored as ASCII JSON (``\\u`` escapes), so any text the client sent fits."""
        rows = [(_ascii(it.id), json.dumps(it.to_json(), separators=(",", ":"), default=repr)) for it in items]
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
        """The oldest ``limit`` readable entries as (sequence number, item); an entry that
        cannot be read back is moved to the spool's dead-letter table on the way."""
        with self._conn() as conn:
            rows = conn.execute("SELECT seq, item FROM demur_spool ORDER BY seq LIMIT ?", (limit,)).fetchall()
        out, bad = [], []
        for seq, text in rows:
            try:
                out.append((int(seq), NewItem.from_json(json.loads(text))))
            except (ValueError, TypeError, KeyError, IndexError) as exc:
                bad.append((int(seq), f"unreadable spool entry: {type(exc).__name__}: {exc}"))
        if bad:
            self._set_aside(bad)
        return out

    def rejected_size(self) -> int:
        """Entries set aside because the store refused them on their own or they cannot be read."""
        if not self.path.exists():
            return 0
        with self._conn() as conn:
            return int(conn.execute("SELECT COUNT(*) FROM demur_spool_rejected").fetchone()[0])

    def _set_aside(self, entries: Sequence[tuple[int, str]]) -> None:
        with self._conn() as conn:
            conn.execute("BEGIN IMMEDIATE")
            for seq, reason in entries:
                conn.execute("INSERT OR REPLACE INTO demur_spool_rejected (seq, item, reason) "
                             "SELECT seq, item, ? FROM demur_spool WHERE seq = ?", (_ascii(reason)[:500], seq))
                conn.execute("DELETE FROM demur_spool WHERE seq = ?", (seq,))
            conn.execute("COMMIT")
        log.error("review spool: %d entr%s set aside (demur_spool_rejected in %s): %s", len(entries),
                  "y" if len(entries) == 1 else "ies", self.path, _ascii(entries[0][1])[:200])

    def _remove(self, seqs: Sequence[int]) -> None:
        with self._conn() as conn:
            conn.execute("BEGIN IMMEDIATE")
            conn.executemany("DELETE FROM demur_spool WHERE seq = ?", [(seq,) for seq in seqs])
            conn.execute("COMMIT")

    def replay(self, store: ReviewStore, *, batch: int = DEFAULT_BATCH) -> int:
        """Move spooled items into ``store``, oldest first; return how many left the spool
        (stored, or set aside by the store as never storable).

        Stops at the first outage (raising ``ReviewStoreUnavailable``); items already
        moved stay moved, the rest wait for the next call. Any other failure of a batch
        is retried item by item; an item that fails alone is set aside here, so the
        items behind it still move.
        """
        if not self.path.exists():
            return 0
        moved = 0
        while True:
            entries = self.peek(batch)
            if not entries:
                return moved
            try:
                store.enqueue([item for _, item in entries])  # insert-if-absent: replay is idempotent
            except ReviewStoreUnavailable:
                raise
            except Exception as exc:  # a data error the store did not handle itself: one by one
                log.warning("review spool: a batch of %d failed (%s); replaying item by item",
                            len(entries), _ascii(repr(exc))[:200])
                moved += self._one_by_one(store, entries)
                continue
            self._remove([seq for seq, _ in entries])
            moved += len(entries)

    def _one_by_one(self, store: ReviewStore, entries: Sequence[tuple[int, NewItem]]) -> int:
        """Each item alone. Those that fail are set aside only if others got through (then
        the fault is in them); if none did, the fault is the store's: re-raise, keep all."""
        failed: list[tuple[int, str]] = []
        first: Exception | None = None
        for seq, item in entries:
            try:
                store.enqueue([item])
            except ReviewStoreUnavailable:
                raise
            except Exception as exc:
                first = first or exc
                reason = exc.message if isinstance(exc, DemurError) else f"{type(exc).__name__}: {exc}"
                failed.append((seq, f"the review store refused it: {reason}"))
                continue
            self._remove([seq])
        if failed and len(failed) == len(entries) and first is not None:
            raise first
        if failed:
            self._set_aside(failed)
        return len(entries)


def _ascii(text: str) -> str:
    return str(text).encode("ascii", "backslashreplace").decode("ascii")


class Replayer:
    """A daemon thread that replays the spool every ``interval_s`` seconds.

    ``on_replayed(n)`` is called after items moved (metrics); ``on_up()``
    after a replay pass found the store answering (the router uses it to try
    the store again on the request path); ``on_error()`` after a pass failed
    with anything but an outage (counted in ``errors``; the thread lives on).
    """

    def __init__(self, spool: Spool, store: ReviewStore, *, interval_s: float = 5.0,
                 on_replayed: Callable[[int], Any] | None = None,
                 on_up: Callable[[], Any] | None = None,
                 on_error: Callable[[], Any] | None = None) -> None:
        self.spool = spool
        self.store = store
        self.interval_s = max(0.05, float(interval_s))
        self.on_replayed = on_replayed
        self.on_up = on_up
        self.on_error = on_error
        self.replayed = 0
        self.errors = 0
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

    def stop(self, timeout_s: float = 5.0) -> None:
        self._stop.set()
        self._wake.set()
        thread = self._thread
        if thread is not None:
            thread.join(timeout_s)
        self._thread = None

    def run_once(self) -> int:
        """One replay pass; returns items moved (0 if the store is still down). Never raises."""
        try:
            return self._pass()
        except Exception:  # whatever it was, the next tick tries again
            self.errors += 1
            log.exception("review spool replay failed; retrying in %.1f s", self.interval_s)
            if self.on_error is not None:
                with contextlib.suppress(Exception):
                    self.on_error()
            return 0

    def _pass(self) -> int:
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
