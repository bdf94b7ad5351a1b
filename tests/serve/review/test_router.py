"""The review router (serve/review/router.py): who goes to review, what happens when the store is down,
and the accuracy estimate from decided items.

References: the exact binomial interval of Clopper & Pearson (1934), in its beta-quantile form
(Brown, Cai & DasGupta 2001, "Interval Estimation for a Binomial Proportion", section 2.1):
lower = Beta(a/2; k, n-k+1), upper = Beta(1-a/2; k+1, n-k), checked with scipy.stats.beta;
the audit sample size against scipy.stats.binom quantiles.
"""

from __future__ import annotations

import threading
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from demur.serve.review.router import NOT_QUEUED, ReviewRouter, accuracy_estimate, audit_draw
from demur.serve.review.store import SqliteStore
from demur.serve.review.spool import Spool
from tests.serve._review_helpers import MODEL, SwitchStore, answered




@pytest.fixture()
def parts(tmp_path: Path) -> Iterator[tuple[SwitchStore, Spool]]:
    inner = SqliteStore(tmp_path / "reviews.sqlite3", lease_s=60)
    yield SwitchStore(inner), Spool(tmp_path / "spool.sqlite3")
    inner.close()


def test_abstentions_are_queued_before_the_answer(parts: tuple[SwitchStore, Spool]) -> None:
    store, spool = parts
    router = ReviewRouter(store, spool)
    x = np.arange(3 * 64, dtype=np.float32).reshape(3, 64)
    notes = router.enqueue(answered(["abstain", "accept", "abstain"], x))
    assert notes[1] is None
    for i in (0, 2):
        got = store.inner.get(notes[i]["review_id"])  # committed: readable now
        assert got.kind == "abstain" and got.case["values"] == x[i].tolist()
        assert got.model_checksum == MODEL["checksum"] and got.prediction == "7"
    assert router.stats()["queued"] == 2 and router.failures == 0


def test_store_down_spools_says_so_counts_and_replays_exactly_once(parts: tuple[SwitchStore, Spool]) -> None:
    store, spool = parts
    seen: list[int] = []
    router = ReviewRouter(store, spool, replay_s=60, on_failure=seen.append)
    x = np.zeros((2, 64), dtype=np.float32)
    store.down = True
    notes = router.enqueue(answered(["abstain", "abstain"], x, ["parcel-1", None]))
    for note in notes:
        review = note["review"]
        assert review["queued"] is False and review["spooled"] is True and "unavailable" in review["reason"]
    assert router.failures == 2 and seen == [2] and spool.size() == 2
    # The client retries parcel-1 while the store is still down: spooled again, with another id.
    router.enqueue(answered(["abstain"], x[:1], ["parcel-1"]))
    calls = store.calls
    assert calls == 1, "after a failure the store is not tried on the request path until the replayer finds it"
    store.down = False
    assert router.replayer is not None
    router.replayer.run_once()
    router.replayer.stop()
    counts = store.inner.counts()
    assert counts["total"] == 2, "two cases: parcel-1 (deduplicated on the case id) and the anonymous one"
    for note in notes:
        assert store.inner.get(note["review"]["pending_review_id"]).status == "pending"
    assert spool.size() == 0
    # the store is tried on the request path again
    again = router.enqueue(answered(["abstain"], x[:1]))
    assert "review_id" in again[0]


def test_while_the_store_stays_down_the_request_path_does_not_retry_it(parts: tuple[SwitchStore, Spool]) -> None:
    """A short replay interval does not bring the store back onto the request path: only the
    replayer's success does (or STORE_RETRY_MAX_S), so an outage costs one timeout, not one
    per interval."""
    store, spool = parts
    router = ReviewRouter(store, spool, replay_s=0.05)
    x = np.zeros((1, 64), dtype=np.float32)
    store.down = True
    router.enqueue(answered(["abstain"], x))
    assert router.replayer is not None
    router.replayer.stop()  # count only the request path's calls from here
    calls = store.calls
    threading.Event().wait(0.2)  # four replay intervals
    router.enqueue(answered(["abstain"], x))
    assert store.calls == calls and spool.size() == 2
    store.down = False
    router.replayer.run_once()
    assert "review_id" in router.enqueue(answered(["abstain"], x))[0]


def test_without_a_working_spool_the_answer_says_not_queued(tmp_path: Path, parts: tuple[SwitchStore, Spool]) -> None:
    store, _ = parts
    (tmp_path / "file").write_text("x")
    router = ReviewRouter(store, Spool(tmp_path / "file" / "spool.sqlite3"))
    store.down = True
    [note] = router.enqueue(answered(["abstain"]))
    assert note == {"review": {"queued": False, "spooled": False, "reason": note["review"]["reason"]}}
    assert router.stats()["unspooled"] == 1 and router.failures == 1


def test_audit_sampling_goes_to_review_silently(parts: tuple[SwitchStore, Spool]) -> None:
    store, spool = parts
    router = ReviewRouter(store, spool, audit_fraction=1.0)
    notes = router.enqueue(answered(["accept"] * 4))
    assert notes == [None] * 4  # the client is not told
    assert [i.kind for i in store.inner.page()] == ["audit"] * 4
    assert ReviewRouter(store, spool, audit_fraction=0.0).enqueue(answered(["accept"])) == [None]


def test_audit_choice_is_deterministic_per_case_id_and_near_the_fraction() -> None:
    """20,000 case ids at 5%: the count lies inside the central 99.99% of Binomial(20000, 0.05)."""
    n, p = 20_000, 0.05
    chosen = sum(audit_draw(MODEL["checksum"], f"parcel-{i}") < p for i in range(n))
    lo, hi = stats.binom.ppf([0.00005, 0.99995], n, p)
    assert lo <= chosen <= hi
    assert audit_draw("a", "parcel-1") == audit_draw("a", "parcel-1") != audit_draw("b", "parcel-1")


@pytest.mark.parametrize("k, n", [(0, 1), (1, 1), (7, 10), (95, 100), (0, 50), (412, 500)])
def test_accuracy_interval_is_clopper_pearson(k: int, n: int) -> None:
    """Beta-quantile form of the Clopper-Pearson interval (Brown, Cai & DasGupta 2001, sec. 2.1)."""
    a = 0.05
    est = accuracy_estimate(k, n)
    lower = 0.0 if k == 0 else stats.beta.ppf(a / 2, k, n - k + 1)
    upper = 1.0 if k == n else stats.beta.ppf(1 - a / 2, k + 1, n - k)
    assert est["accuracy"] == pytest.approx(k / n)
    assert est["interval"]["lower"] == pytest.approx(lower, abs=1e-9)
    assert est["interval"]["upper"] == pytest.approx(upper, abs=1e-9)


def test_accuracy_known_value_zero_of_one() -> None:
    """0 successes in 1 trial: the 95% exact upper bound is 1 - 0.025 = 0.975 (closed form 1 - (a/2)^(1/n))."""
    assert accuracy_estimate(0, 1)["interval"]["upper"] == pytest.approx(0.975)
    assert accuracy_estimate(0, 0)["accuracy"] is None


def test_router_accuracy_from_decided_items(parts: tuple[SwitchStore, Spool]) -> None:
    store, spool = parts
    router = ReviewRouter(store, spool, audit_fraction=1.0)
    router.enqueue(answered(["accept"] * 4 + ["abstain"] * 2))
    labels = {"audit": ["7", "7", "7", "1"], "abstain": ["2", "7"]}
    for _ in range(6):
        got = store.inner.claim_next("r")
        store.inner.decide(got.id, "r", label=labels[got.kind].pop())
    acc = router.accuracy()
    assert (acc["accepted"]["agree"], acc["accepted"]["n"]) == (3, 4)
    assert (acc["abstained"]["agree"], acc["abstained"]["n"]) == (1, 2)
    described = router.describe()
    assert described["available"] and described["queue"]["decided"] == 6
    store.down = True
    router._described = None
    assert router.describe()["available"] is False  # never raises


def test_from_config_uses_sqlite_under_data_dir(tmp_path: Path) -> None:
    from demur.serve.config import ServeConfig

    router = ReviewRouter.from_config(ServeConfig(data_dir=str(tmp_path / "d"), audit_fraction=0.02))
    try:
        assert isinstance(router.store, SqliteStore)
        assert router.store.path == tmp_path / "d" / "reviews.sqlite3"
        assert router.spool is not None and router.spool.path == tmp_path / "d" / "review-spool.sqlite3"
        assert router.audit_fraction == 0.02
        assert not (tmp_path / "d").exists(), "nothing touches disk before the first item"
    finally:
        router.close()


# --- limits: the pending ceiling and per-caller quotas -----------------------------------------


class Clock:
    def __init__(self) -> None:
        self.t = 1000.0

    def __call__(self) -> float:
        return self.t


def test_the_ceiling_holds_and_the_answer_says_backlog_full(parts: tuple[SwitchStore, Spool]) -> None:
    store, spool = parts
    events: list[tuple[str, int]] = []
    clock = Clock()
    router = ReviewRouter(store, spool, max_pending=5, on_event=lambda name, n: events.append((name, n)),
                          clock=clock)
    notes = router.enqueue(answered(["abstain"] * 3))
    assert all("review_id" in n for n in notes)
    notes = router.enqueue(answered(["abstain", "accept", "abstain", "abstain"]))  # room for 2
    assert "review_id" in notes[0] and notes[1] is None and "review_id" in notes[2]
    assert notes[3] == {"review": {"queued": False, "reason": "not queued: backlog full"}}
    assert router.enqueue(answered(["abstain"])) == [{"review": {"queued": False,
                                                                 "reason": "not queued: backlog full"}}]
    assert store.inner.counts()["pending"] == 5
    assert events == [("backlog_full", 1), ("backlog_full", 1)] and router.stats()["backlog_full"] == 2
    claimed = store.inner.claim_next("t-1")
    assert claimed is not None
    store.inner.decide(claimed.id, "t-1", label="1")
    clock.t += 1.0  # the next refresh sees the decided item gone from pending
    assert "review_id" in router.enqueue(answered(["abstain"]))[0]


def test_audits_never_take_room_from_abstentions(parts: tuple[SwitchStore, Spool]) -> None:
    store, spool = parts
    router = ReviewRouter(store, spool, max_pending=2, audit_fraction=1.0, clock=Clock())
    notes = router.enqueue(answered(["accept", "abstain", "accept", "abstain"]))
    assert notes[0] is None and notes[2] is None  # audits are dropped silently
    assert "review_id" in notes[1] and "review_id" in notes[3]
    assert [it.kind for it in store.inner.page()] == ["abstain", "abstain"]


def test_per_caller_quota_per_minute(parts: tuple[SwitchStore, Spool]) -> None:
    store, spool = parts
    clock = Clock()
    events: list[tuple[str, int]] = []
    router = ReviewRouter(store, spool, quota_per_min=3, clock=clock,
                          on_event=lambda name, n: events.append((name, n)))
    a = router.enqueue(answered(["abstain"] * 4, caller="t-aaaa"))
    assert [("review_id" in n) for n in a] == [True, True, True, False]
    assert a[3] == {"review": {"queued": False, "reason": "not queued: enqueue quota exceeded"}}
    assert all("review_id" in n for n in router.enqueue(answered(["abstain"] * 3, caller="t-bbbb")))
    clock.t += 60.0  # a new minute
    assert all("review_id" in n for n in router.enqueue(answered(["abstain"] * 3, caller="t-aaaa")))
    assert events == [("quota", 1)]


def test_an_unstorable_case_is_set_aside_and_the_rest_queued(parts: tuple[SwitchStore, Spool]) -> None:
    """Past the boundary (e.g. a caller of the pipeline that skips validation): the store
    rejects the one item, the others are queued, the answer says so, the event is counted."""
    store, spool = parts
    events: list[tuple[str, int]] = []
    router = ReviewRouter(store, spool, on_event=lambda name, n: events.append((name, n)))
    notes = router.enqueue(answered(["abstain"] * 3, case_ids=["fine-1", "bad\x00", "fine-2"]))
    assert "review_id" in notes[0] and "review_id" in notes[2]
    assert notes[1] == {"review": {"queued": False, "reason": NOT_QUEUED["rejected"]}}
    assert events == [("rejected", 1)] and store.inner.rejected_count() == 1 and spool.size() == 0
