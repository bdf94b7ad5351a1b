"""Two roll-outs at once on a 2-worker server: exactly one wins, the other gets 409, and
every worker ends on the winner (issue 20: 3 of 10 pairs once both answered 200 and one
was silently undone).

Each pair is fired from two threads released by one barrier, on fresh connections, so
the requests may land on the same worker (its own lock answers 409) or on both (the
workers' shared lock file answers 409). A roll-out of the test's tiny bundle holds the
lock for only some 10-30 ms (checks, then every worker's confirmation), so now and
then the second request of a pair arrives after the first was done: then the two are
not concurrent, and the second must have run *after* the first (its ``previous`` is
the first's bundle) and won. Either way no roll-out answered 200 is ever undone.
Bounded: 10 pairs, a timeout on every request.
"""

from __future__ import annotations

import threading
import time
from pathlib import Path
from typing import Any

import requests

from .conftest import TOKENS
from .harness import Server, record

ADMIN = {"Authorization": f"Bearer {TOKENS['admin']}"}
PAIRS = 10


def _fire_pair(url: str, targets: tuple[str, str]) -> list[tuple[str, int, dict[str, Any]]]:
    barrier = threading.Barrier(2)
    out: list[tuple[str, int, dict[str, Any]]] = []
    lock = threading.Lock()

    def post(target: str) -> None:
        with requests.Session() as s:
            s.get(url + "/healthz", timeout=10)  # connect first, so both bodies leave together
            barrier.wait(10)
            r = s.post(url + "/v1/admin/model", json={"bundle": target}, headers=ADMIN, timeout=60)
        with lock:
            out.append((target, r.status_code, r.json()))

    threads = [threading.Thread(target=post, args=(t,)) for t in targets]
    for t in threads:
        t.start()
    for t in threads:
        t.join(90)
    return out


def _all_workers_on(url: str, version: str, timeout_s: float = 60.0) -> set[str]:
    deadline = time.monotonic() + timeout_s
    while True:
        seen = set()
        for _ in range(12):
            with requests.Session() as s:  # a new connection each time: both workers get asked
                seen.add(s.get(url + "/readyz", timeout=10).json()["model"]["version"])
        if seen == {version} or time.monotonic() > deadline:
            return seen
        time.sleep(0.2)


def test_concurrent_rollouts_one_wins_everywhere(rel_bundles: dict[str, Path], tmp_path: Path) -> None:
    env = {"DEMUR_DATA_DIR": str(tmp_path / "data"), "DEMUR_BUNDLES_DIR": str(rel_bundles["root"]),
           "DEMUR_ADMIN_TOKENS": TOKENS["admin"], "DEMUR_REVIEW_TOKENS": TOKENS["review"]}
    versions = {"v1": "1", "v2": "2"}
    outcomes = []
    with Server(rel_bundles["current"], tmp_path / "server.log", env=env, workers=2, threads=4) as server:
        for k in range(PAIRS):
            pair = ("v2", "v1") if k % 2 == 0 else ("v1", "v2")
            answers = _fire_pair(server.url, pair)
            statuses = sorted(status for _, status, _ in answers)
            assert statuses in ([200, 409], [200, 200]), answers
            if statuses == [200, 409]:
                [(winner, _, body)] = [a for a in answers if a[1] == 200]
                [(_, _, refused)] = [a for a in answers if a[1] == 409]
                assert refused["error"]["field"] == "bundle", refused
                outcomes.append("conflict")
            else:  # one after the other: the later one saw the earlier one's bundle serving
                later = [a for a, b in ((answers[0], answers[1]), (answers[1], answers[0]))
                         if a[2]["previous"]["version"] == versions[b[0]]]
                assert len(later) == 1, ("both answered 200 but neither ran after the other", answers)
                winner, _, body = later[0]
                outcomes.append("sequential")
            assert body["model"]["version"] == versions[winner]
            assert body["workers"] == "all serving", body
            served = _all_workers_on(server.url, versions[winner])
            assert served == {versions[winner]}, (k, answers, served)
    conflicts = outcomes.count("conflict")
    record("concurrent roll-out pairs", requests=2 * PAIRS, errors=0, faults=PAIRS,
           note=f"{PAIRS} pairs: {conflicts} x (200 + 409), {PAIRS - conflicts} ran one after the other; "
                "every worker on the winner each time")
    print(f"roll-out pairs: {conflicts} concurrent (200 + 409), {PAIRS - conflicts} sequential")
    assert conflicts >= 1, "no pair overlapped: the test did not exercise the lock"
