"""The local spool and its replayer (serve/review/spool.py): nothing spooled is lost, nothing lands twice.

Reference for durability: SQLite docs, "PRAGMA synchronous" (FULL: a commit is
synced before it returns) and "Write-Ahead Logging". Exactly-once comes from
the store's insert-if-absent (tested in test_review_store.py).
"""

from __future__ import annotations

import threading
import time
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

import pytest

from demur.serve.errors import ReviewStoreUnavailable
from demur.serve.review.store import NewItem, SqliteStore
from demur.serve.review.spool import Replayer, Spool, SpoolError
from tests.serve._review_helpers import item


class FlakyStore:
    """Wraps a real store; raises ReviewStoreUnavailable while ``down`` is set,
    or fails once right after committing (a crash between insert and spool delete)."""

    def __init__(self, inner: SqliteStore) -> None:
        self.inner = inner
        self.down = threading.Event()
        self.fail_after_commit = False
        self.lease_s = inner.lease_s

    def enqueue(self, items: Sequence[NewItem]) -> list[str]:
        if self.down.is_set():
            raise ReviewStoreUnavailable("down for the test")
        ids = self.inner.enqueue(items)
        if self.fail_after_commit:
            self.fail_after_commit = False
            raise ReviewStoreUnavailable("connection lost after commit")
        return ids

    def __getattr__(self, name: str) -> Any:
        return getattr(self.inner, name)


@pytest.fixture()
def store(tmp_path: Path) -> Iterator[SqliteStore]:
    s = SqliteStore(tmp_path / "reviews.sqlite3", lease_s=60)
    yield s
    s.close()


def test_put_peek_size_round_trip(tmp_path: Path) -> None:
    sp = Spool(tmp_path / "spool.sqlite3")
    assert sp.size() == 0  # no file yet: nothing waiting, nothing created
    items = [item(client_case_id=f"parcel-{i}") for i in range(5)]
    sp.put(items[:2])
    sp.put(items[2:])
    assert sp.size() == 5
    got = [it for _, it in sp.peek(10)]
    assert [g.id for g in got] == [i.id for i in items]
    assert got[0] == items[0]  # every field survives the JSON round trip


def test_spool_survives_reopening(tmp_path: Path) -> None:
    path = tmp_path / "spool.sqlite3"
    Spool(path).put([item()])
    assert Spool(path).size() == 1  # a new process (new object) sees it


def test_replay_moves_everything_once(tmp_path: Path, store: SqliteStore) -> None:
    sp = Spool(tmp_path / "spool.sqlite3")
    items = [item() for _ in range(450)]  # more than one replay batch
    sp.put(items)
    assert sp.replay(store) == 450
    assert sp.size() == 0
    assert store.counts()["total"] == 450
    assert sp.replay(store) == 0


def test_crash_between_insert_and_delete_still_lands_once(tmp_path: Path, store: SqliteStore) -> None:
    sp = Spool(tmp_path / "spool.sqlite3")
    items = [item() for _ in range(3)]
    sp.put(items)
    flaky = FlakyStore(store)
    flaky.fail_after_commit = True
    with pytest.raises(ReviewStoreUnavailable):
        sp.replay(flaky)  # committed in the store, but the spool kept them
    assert sp.size() == 3 and store.counts()["total"] == 3
    assert sp.replay(flaky) == 3  # replayed again: insert-if-absent on the id
    assert store.counts()["total"] == 3 and sp.size() == 0


def test_two_replayers_on_one_spool_land_each_item_once(tmp_path: Path, store: SqliteStore) -> None:
    """Two server processes sharing a data directory each run a replayer."""
    sp = Spool(tmp_path / "spool.sqlite3")
    sp.put([item() for _ in range(300)])
    def replayer() -> None:  # as Replayer does: a pass that meets a busy store is tried again
        mine, deadline = Spool(sp.path), time.monotonic() + 60
        while mine.size() and time.monotonic() < deadline:
            try:
                mine.replay(store)
            except ReviewStoreUnavailable:
                time.sleep(0.05)

    threads = [threading.Thread(target=replayer) for _ in range(2)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=60)
    assert store.counts()["total"] == 300 and sp.size() == 0


def test_replayer_thread_waits_for_the_store_then_moves_items(tmp_path: Path, store: SqliteStore) -> None:
    sp = Spool(tmp_path / "spool.sqlite3")
    flaky = FlakyStore(store)
    flaky.down.set()
    moved: list[int] = []
    ups: list[bool] = []
    rp = Replayer(sp, flaky, interval_s=0.05, on_replayed=moved.append, on_up=lambda: ups.append(True))
    sp.put([item() for _ in range(10)])
    rp.start()
    try:
        rp.start()  # idempotent
        time.sleep(0.3)
        assert sp.size() == 10 and store.counts()["total"] == 0 and not ups
        flaky.down.clear()
        deadline = time.monotonic() + 10
        while sp.size() and time.monotonic() < deadline:
            time.sleep(0.05)
    finally:
        rp.stop()
    assert not rp.running
    assert sp.size() == 0 and store.counts()["total"] == 10 and sum(moved) == 10 and ups
    assert rp.replayed == 10


def test_unwritable_spool_raises_spool_error(tmp_path: Path) -> None:
    (tmp_path / "file").write_text("x")
    with pytest.raises(SpoolError):
        Spool(tmp_path / "file" / "spool.sqlite3").put([item()])


# -- one bad item never stalls the spool ------------------------------------------------------


class PickyStore:
    """Wraps a real store; any batch holding an item whose case id starts with ``bomb`` raises
    a plain ``RuntimeError`` (a failure the store did not classify); ``crash`` makes every
    call raise ``KeyError`` (a bug, not an outage)."""

    def __init__(self, inner: SqliteStore) -> None:
        self.inner = inner
        self.crash = False
        self.lease_s = inner.lease_s

    def enqueue(self, items: Sequence[NewItem]) -> list[str | None]:
        if self.crash:
            raise KeyError("a bug in the store")
        if any((it.client_case_id or "").startswith("bomb") for it in items):
            raise RuntimeError("cannot take this item")
        return self.inner.enqueue(items)

    def __getattr__(self, name: str) -> Any:
        return getattr(self.inner, name)


def test_the_spool_drains_past_poisoned_items(tmp_path: Path) -> None:
    """Items the store can never hold (a lone surrogate, a NUL: set aside by the store) and an
    item the store fails on alone (set aside here) sit first in the oldest-first spool; every
    good item behind them still reaches the store, and the spool ends empty."""
    inner = SqliteStore(tmp_path / "r.sqlite3", lease_s=60)
    spool = Spool(tmp_path / "s.sqlite3")
    poison = [item(client_case_id="\ud800x"), item(client_case_id="nul\x00"), item(client_case_id="bomb-1")]
    good = [item(client_case_id=f"good-{i}") for i in range(5)]
    spool.put(poison + good)
    moved = spool.replay(PickyStore(inner), batch=3)
    assert spool.size() == 0 and moved == len(poison) + len(good)
    assert {it.client_case_id for it in inner.page()} == {f"good-{i}" for i in range(5)}
    assert inner.rejected_count() == 2  # the store's dead letters
    assert spool.rejected_size() == 1  # the one the store failed on alone
    inner.close()


def test_an_unreadable_spool_entry_is_set_aside(tmp_path: Path) -> None:
    inner = SqliteStore(tmp_path / "r.sqlite3", lease_s=60)
    spool = Spool(tmp_path / "s.sqlite3")
    spool.put([item(client_case_id="first")])
    with spool._conn() as conn:
        conn.execute("INSERT INTO demur_spool (id, item) VALUES ('x', '{not json')")
        conn.execute("""INSERT INTO demur_spool (id, item) VALUES ('y', '{"id": "y"}')""")
    spool.put([item(client_case_id="last")])
    assert spool.replay(inner) == 2 and spool.size() == 0 and spool.rejected_size() == 2
    assert {it.client_case_id for it in inner.page()} == {"first", "last"}
    inner.close()


def test_the_replayer_survives_any_exception(tmp_path: Path) -> None:
    """A store that fails every call with a bug (not an outage): each pass is logged and
    counted, the thread lives on, nothing is set aside (no item was at fault); once the store
    works again the spool drains."""
    inner = SqliteStore(tmp_path / "r.sqlite3", lease_s=60)
    store = PickyStore(inner)
    spool = Spool(tmp_path / "s.sqlite3")
    spool.put([item(client_case_id="wait-1"), item(client_case_id="wait-2")])
    errors: list[int] = []
    up = threading.Event()
    replayer = Replayer(spool, store, interval_s=0.05, on_error=lambda: errors.append(1), on_up=up.set)
    store.crash = True
    replayer.start()
    deadline = time.monotonic() + 10
    while len(errors) < 3 and time.monotonic() < deadline:  # the hook runs just after the count
        time.sleep(0.02)
    assert replayer.running and replayer.errors >= 3 and len(errors) >= 3
    assert spool.size() == 2 and spool.rejected_size() == 0 and not up.is_set()
    store.crash = False
    while spool.size() and time.monotonic() < deadline:
        time.sleep(0.02)
    replayer.stop()
    assert spool.size() == 0 and up.is_set()
    assert {it.client_case_id for it in inner.page()} == {"wait-1", "wait-2"}
    inner.close()
