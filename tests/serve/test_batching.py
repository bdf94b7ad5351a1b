"""serve/web/batching.py: gathering concurrent requests into one graph call.

References: the stacked-draws graph is a fixed function of its input, and a
matrix product treats each row of the batch independently (definition of the
matrix product), so gathering rows into one call must give every caller the
same numbers as its own call (to float32 rounding of a differently blocked
product; tolerance 1e-5, common practice for float32). Ordering, deadlines and
back-pressure are checked with a gated fake graph, so nothing depends on timing.
"""

from __future__ import annotations

import threading
from typing import Any

import numpy as np
import pytest

from demur.serve.web import batching
from demur.serve.web.batching import MicroBatcher, batching_runner
from demur.serve.config import ServeConfig
from demur.serve.adapters.engine import Engine
from demur.serve.errors import GraphRunError, Overloaded

TIMEOUT = 10.0  # bound on every wait in this module (s)


def test_all_is_exact() -> None:
    assert sorted(batching.__all__) == ["BatchStats", "DEFAULT_ROWS", "MicroBatcher", "ROWS_BY_KIND",
                                        "batching_runner", "rows_cap"]


def test_rows_cap_is_the_setting_or_the_kind_default() -> None:
    assert batching.rows_cap(ServeConfig(batch_max_rows=17), "flip") == 17
    assert batching.rows_cap(ServeConfig(), "flip") == batching.ROWS_BY_KIND["flip"]
    assert batching.rows_cap(ServeConfig(), "stacked") == batching.DEFAULT_ROWS
    assert batching.rows_cap(ServeConfig(), None) == batching.DEFAULT_ROWS


class _Gate:
    """A fake graph: returns x as one draw ([1, B, F]); the first call blocks until released."""

    def __init__(self) -> None:
        self.entered = threading.Event()
        self.release = threading.Event()
        self.calls: list[int] = []

    def __call__(self, x: np.ndarray) -> np.ndarray:
        self.calls.append(len(x))
        if len(self.calls) == 1:
            self.entered.set()
            assert self.release.wait(TIMEOUT)
        return np.asarray(x, dtype=np.float32)[None]


def _submit_all(batcher: MicroBatcher, xs: list[np.ndarray], **kw: Any) -> tuple[list[Any], list[threading.Thread]]:
    results: list[Any] = [None] * len(xs)

    def one(i: int) -> None:
        try:
            results[i] = batcher.submit(xs[i], **kw)
        except Exception as exc:  # recorded for the assertions
            results[i] = exc

    threads = [threading.Thread(target=one, args=(i,)) for i in range(len(xs))]
    for t in threads:
        t.start()
    return results, threads


def _wait_queued(batcher: MicroBatcher, n: int) -> None:
    for _ in range(int(TIMEOUT / 0.005)):
        if batcher.queued >= n:
            return
        threading.Event().wait(0.005)
    raise AssertionError(f"expected {n} queued requests; have {batcher.queued}")


def test_batched_results_equal_unbatched_on_the_stacked_graph(tiny_bundle_factory) -> None:
    # reference: row independence of the matrix product (see module docstring)
    engine = Engine(tiny_bundle_factory(kind="stacked", draws=8), graph="stacked").load()
    rng = np.random.default_rng(0)
    xs = [rng.uniform(0, 16, size=(int(rng.integers(1, 5)), 64)) for _ in range(24)]
    expected = [engine.run(x) for x in xs]
    batcher = MicroBatcher(engine.run, wait_ms=20.0, max_rows=64, max_queue=64, timeout_s=TIMEOUT)
    results, threads = _submit_all(batcher, xs)
    for t in threads:
        t.join(TIMEOUT)
    batcher.close()
    for got, want in zip(results, expected):
        assert not isinstance(got, Exception), got
        assert got.shape == want.shape
        np.testing.assert_allclose(got, want, rtol=0, atol=1e-5)
    assert batcher.stats.requests == len(xs)
    assert batcher.stats.rows == sum(len(x) for x in xs)


def test_each_caller_gets_its_own_rows_in_order_when_gathered() -> None:
    gate = _Gate()
    batcher = MicroBatcher(gate, wait_ms=0.0, max_rows=1000, max_queue=100, timeout_s=TIMEOUT)
    first, t0 = _submit_all(batcher, [np.full((1, 3), -1.0)])
    assert gate.entered.wait(TIMEOUT)
    # while the first batch runs, 20 requests of 1..3 rows queue up; each row tagged (request, row)
    xs = [np.array([[i, j, 0.0] for j in range(1 + i % 3)]) for i in range(20)]
    results, threads = _submit_all(batcher, xs)
    _wait_queued(batcher, 20)
    gate.release.set()
    for t in [*t0, *threads]:
        t.join(TIMEOUT)
    batcher.close()
    for x, got in zip(xs, results):
        np.testing.assert_array_equal(got[0], x.astype(np.float32))
    assert gate.calls == [1, sum(len(x) for x in xs)]  # the 20 waiting requests ran as ONE call
    assert batcher.stats.batches == 2


def test_max_rows_splits_batches_without_splitting_a_request() -> None:
    gate = _Gate()
    batcher = MicroBatcher(gate, wait_ms=0.0, max_rows=4, max_queue=100, timeout_s=TIMEOUT)
    _, t0 = _submit_all(batcher, [np.zeros((1, 2))])
    assert gate.entered.wait(TIMEOUT)
    xs = [np.full((3, 2), float(i)) for i in range(3)] + [np.full((9, 2), 9.0)]  # 9 > max_rows runs alone
    results, threads = _submit_all(batcher, xs)
    _wait_queued(batcher, 4)
    gate.release.set()
    for t in [*t0, *threads]:
        t.join(TIMEOUT)
    batcher.close()
    assert all(n <= 4 or n == 9 for n in gate.calls[1:])
    assert sorted(gate.calls[1:]) == [3, 3, 3, 9]
    for x, got in zip(xs, results):
        np.testing.assert_array_equal(got[0], x.astype(np.float32))


def test_deadline_passes_overloaded() -> None:
    gate = _Gate()
    batcher = MicroBatcher(gate, wait_ms=0.0, max_rows=8, max_queue=8, timeout_s=TIMEOUT)
    with pytest.raises(Overloaded) as info:
        batcher.submit(np.zeros((1, 2)), timeout_s=0.05)  # the gated call never finishes in time
    assert info.value.status == 503 and info.value.retry_after_s >= 1.0
    gate.release.set()
    batcher.close()


def test_queue_full_is_overloaded_at_once_with_retry_after() -> None:
    gate = _Gate()
    batcher = MicroBatcher(gate, wait_ms=0.0, max_rows=1, max_queue=2, timeout_s=TIMEOUT)
    _, t0 = _submit_all(batcher, [np.zeros((1, 2))])
    assert gate.entered.wait(TIMEOUT)
    waiting, threads = _submit_all(batcher, [np.ones((1, 2)), np.ones((1, 2))])
    _wait_queued(batcher, 2)
    with pytest.raises(Overloaded) as info:
        batcher.submit(np.ones((1, 2)))
    assert "queue_max_requests = 2" in info.value.message
    assert info.value.retry_after_s >= 1.0
    assert batcher.stats.rejected_full == 1
    gate.release.set()
    for t in [*t0, *threads]:
        t.join(TIMEOUT)
    assert all(isinstance(r, np.ndarray) for r in waiting)  # the queued ones were still answered
    batcher.close()


def test_a_graph_error_reaches_every_caller_of_the_batch() -> None:
    def broken(x: np.ndarray) -> np.ndarray:
        raise GraphRunError("onnxruntime failed", field="graph")

    batcher = MicroBatcher(broken, wait_ms=5.0, max_rows=8, max_queue=8, timeout_s=TIMEOUT)
    results, threads = _submit_all(batcher, [np.zeros((1, 2))] * 3)
    for t in threads:
        t.join(TIMEOUT)
    batcher.close()
    assert all(isinstance(r, GraphRunError) for r in results)


def test_close_drains_then_refuses() -> None:
    gate = _Gate()
    batcher = MicroBatcher(gate, wait_ms=0.0, max_rows=8, max_queue=8, timeout_s=TIMEOUT)
    first, t0 = _submit_all(batcher, [np.zeros((1, 2))])
    assert gate.entered.wait(TIMEOUT)
    second, t1 = _submit_all(batcher, [np.ones((1, 2))])
    _wait_queued(batcher, 1)
    threads = t0 + t1
    closer = threading.Thread(target=batcher.close)
    closer.start()
    gate.release.set()
    for t in [*threads, closer]:
        t.join(TIMEOUT)
    assert all(isinstance(r, np.ndarray) for r in first + second)
    with pytest.raises(Overloaded):
        batcher.submit(np.zeros((1, 2)))


def test_requests_for_different_engines_are_not_mixed() -> None:
    calls: list[str] = []

    def make(tag: float) -> Any:
        def run(x: np.ndarray) -> np.ndarray:
            calls.append(str(tag))
            return np.full((1, len(x), 1), tag, dtype=np.float32)
        return run

    a, b = make(1.0), make(2.0)
    batcher = MicroBatcher(a, wait_ms=20.0, max_rows=64, max_queue=64, timeout_s=TIMEOUT)
    ra, ta = _submit_all(batcher, [np.zeros((1, 2))] * 4, run_fn=a)
    rb, tb = _submit_all(batcher, [np.zeros((1, 2))] * 4, run_fn=b)
    for t in [*ta, *tb]:
        t.join(TIMEOUT)
    batcher.close()
    assert all(float(r[0, 0, 0]) == 1.0 for r in ra) and all(float(r[0, 0, 0]) == 2.0 for r in rb)


def test_the_app_runs_predictions_through_the_batcher(tiny_bundle_factory, make_app) -> None:
    app = make_app(tiny_bundle_factory(kind="stacked", draws=8), batch_wait_ms=2.0)
    runner = app.extensions["demur"].runner
    assert isinstance(runner.batcher, MicroBatcher)
    before = runner.batcher.stats.requests
    response = app.test_client().post("/v1/predict", json={"cases": [[3.0] * 64, [7.0] * 64]})
    assert response.status_code == 200
    assert len(response.get_json()["results"]) == 2
    assert runner.batcher.stats.requests == before + 1
    runner.batcher.close()


def test_no_batcher_when_the_wait_is_zero(tiny_bundle_factory, make_app) -> None:
    app = make_app(tiny_bundle_factory(kind="stacked", draws=8), batch_wait_ms=0.0)
    assert not hasattr(app.extensions["demur"].runner, "batcher")


def test_batching_runner_reads_its_settings_from_config() -> None:
    cfg = ServeConfig(batch_wait_ms=3.0, batch_max_rows=17, queue_max_requests=5, request_timeout_s=2.5)
    b = batching_runner(cfg).batcher  # type: ignore[attr-defined]
    assert (b.wait_s, b.max_rows, b.max_queue, b.timeout_s) == (0.003, 17, 5, 2.5)
