"""Micro-batching: concurrent requests share one graph call.

Why: one onnxruntime call has a fixed overhead (argument checks, thread
hand-off, the random nodes' setup) of the same order as the arithmetic of a
single case, so a server that runs one call per request spends most of its
time on overhead. Requests that arrive together are gathered here -- for at
most ``wait_ms`` after the first one, or until ``max_rows`` cases -- run as ONE
call, and the ``[S, B, K]`` draws are split back along the batch axis.

Under load the wait rarely happens: while one batch runs, the next requests
queue up, and the worker takes everything waiting as soon as it is free.

Guarantees:

* order: each caller gets exactly the rows it sent, in its order;
* deadlines: a caller waits at most ``timeout_s`` (``request_timeout_s``);
  past it the call raises ``Overloaded`` and a batch that has not started yet
  skips the request;
* back-pressure: at most ``max_queue`` requests wait; one more raises
  ``Overloaded`` with ``retry_after_s`` at once (HTTP 503 + Retry-After)
  instead of queueing without bound;
* errors: an exception from the graph call reaches every caller of that batch;
* fork safety: the worker thread starts on first use in the process that uses
  it (a gunicorn worker after the fork), never inherited from a parent.

Sampling graphs draw fresh noise per call, so batched requests share one set
of S weight draws (exactly like the cases of one multi-case request).

Example::

    batcher = MicroBatcher(engine.run, wait_ms=1.0, max_rows=256, max_queue=512, timeout_s=10.0)
    draws = batcher.submit(x)        # float32[S, B, K], B = len(x); blocks until done
    batcher.close()
"""

from __future__ import annotations

import os
import threading
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from demur.serve.config import ServeConfig
from demur.serve.errors import Overloaded

__all__ = ["DEFAULT_ROWS", "ROWS_BY_KIND", "BatchStats", "MicroBatcher", "batching_runner", "rows_cap"]

RunFn = Callable[[np.ndarray], np.ndarray]


@dataclass(eq=False)  # identity: deque.remove must never compare the arrays (ambiguous truth value)
class _Pending:
    """One submitted request, waiting for its slice of a batch."""

    x: np.ndarray
    run_fn: RunFn
    deadline: float                     # time.monotonic() seconds
    done: threading.Event = field(default_factory=threading.Event)
    result: np.ndarray | None = None
    error: BaseException | None = None
    abandoned: bool = False             # the caller gave up (deadline); skip if not started
    enqueued: float = field(default_factory=time.monotonic)


@dataclass
class BatchStats:
    """Counters since start: graph calls, requests and rows they carried, refusals."""

    batches: int = 0
    requests: int = 0
    rows: int = 0
    rejected_full: int = 0
    expired: int = 0

    @property
    def mean_requests_per_batch(self) -> float:
        return self.requests / self.batches if self.batches else 0.0


class MicroBatcher:
    """Gathers concurrent ``submit`` calls into single ``run_fn`` calls on one worker thread.

    ``run_fn``: float[B, ...] -> float32[S, B, K] (e.g. ``Engine.run``).
    ``wait_ms``: longest time the first request of a batch waits for company.
    ``max_rows``: cases per batch (a larger single request runs alone, whole).
    ``max_queue``: requests allowed to wait; more raise ``Overloaded``.
    ``timeout_s``: each caller's deadline, from submission.
    """

    def __init__(self, run_fn: RunFn, wait_ms: float, max_rows: int, max_queue: int, timeout_s: float) -> None:
        if wait_ms < 0 or max_rows < 1 or max_queue < 1 or timeout_s <= 0:
            raise ValueError(f"need wait_ms >= 0, max_rows >= 1, max_queue >= 1, timeout_s > 0; got "
                             f"{wait_ms}, {max_rows}, {max_queue}, {timeout_s}")
        self.run_fn = run_fn
        self.wait_s = float(wait_ms) / 1000.0
        self.max_rows = int(max_rows)
        self.max_queue = int(max_queue)
        self.timeout_s = float(timeout_s)
        self.stats = BatchStats()
        self._queue: deque[_Pending] = deque()
        self._cond = threading.Condition()
        self._closed = False
        self._thread: threading.Thread | None = None
        self._pid = -1
        self._batch_s = 0.0  # moving average of a batch's run time, for Retry-After

    # -- callers -------------------------------------------------------------
    def submit(self, x: Any, *, run_fn: RunFn | None = None, timeout_s: float | None = None) -> np.ndarray:
        """Run ``x`` (float[B, ...]) in the next batch; return its draws float32[S, B, K].

        ``run_fn`` overrides the batcher's for this request (requests are only
        batched with others that use an equal ``run_fn``, e.g. the same engine).
        Raises ``Overloaded`` when the queue is full or the deadline passes.
        """
        x = np.asarray(x)
        if x.ndim < 1 or x.shape[0] < 1:
            raise ValueError(f"x must be [B, ...] with B >= 1; got shape {list(x.shape)}")
        wait = self.timeout_s if timeout_s is None else float(timeout_s)
        item = _Pending(x=x, run_fn=run_fn or self.run_fn, deadline=time.monotonic() + wait)
        with self._cond:
            if self._closed:
                raise Overloaded("the server is shutting down; retry on another instance", retry_after_s=1.0)
            if len(self._queue) >= self.max_queue:
                self.stats.rejected_full += 1
                raise Overloaded(f"{len(self._queue)} requests are already waiting (queue_max_requests = "
                                 f"{self.max_queue}); retry shortly", retry_after_s=self._retry_after())
            self._ensure_worker()
            self._queue.append(item)
            self._cond.notify()
        if not item.done.wait(max(0.0, item.deadline - time.monotonic())):
            with self._cond:
                item.abandoned = True
                self.stats.expired += 1
            if not item.done.is_set():
                raise Overloaded(f"no result within request_timeout_s = {wait:g} s; the server is busy",
                                 retry_after_s=self._retry_after())
        if item.error is not None:
            raise item.error
        assert item.result is not None
        return item.result

    def close(self, timeout_s: float = 5.0) -> None:
        """Refuse new requests, finish the queued ones, stop the worker thread."""
        with self._cond:
            self._closed = True
            self._cond.notify_all()
            thread = self._thread
        if thread is not None and thread.is_alive() and thread is not threading.current_thread():
            thread.join(timeout_s)

    @property
    def queued(self) -> int:
        """Requests waiting now (not counting a batch being run)."""
        return len(self._queue)

    # -- the worker -----------------------------------------------------------
    def _retry_after(self) -> float:
        batches_ahead = 1 + len(self._queue) // max(1, int(self.stats.mean_requests_per_batch or 1))
        return max(1.0, batches_ahead * self._batch_s)

    def _ensure_worker(self) -> None:
        """Start the worker in this process (called with the lock held)."""
        if self._thread is not None and self._thread.is_alive() and self._pid == os.getpid():
            return
        self._pid = os.getpid()
        self._thread = threading.Thread(target=self._loop, name="demur-batcher", daemon=True)
        self._thread.start()

    def _take(self) -> list[_Pending] | None:
        """Block for the next batch; ``None`` once closed and drained."""
        with self._cond:
            while not self._queue:
                if self._closed:
                    return None
                self._cond.wait()
            first = self._queue[0]
            until = first.enqueued + self.wait_s  # under load the first has waited already: no extra wait
            while True:
                batch, rows = self._compatible(first)
                left = until - time.monotonic()
                if rows >= self.max_rows or self._closed or left <= 0:
                    break
                self._cond.wait(left)  # a new request or the end of the wait wakes us
            for item in batch:
                self._queue.remove(item)
            return batch

    def _compatible(self, first: _Pending) -> tuple[list[_Pending], int]:
        """Queued requests that can join ``first``'s batch (same run_fn and case shape), up to max_rows."""
        batch, rows = [], 0
        for item in self._queue:
            if item.run_fn != first.run_fn or item.x.shape[1:] != first.x.shape[1:]:
                continue
            n = int(item.x.shape[0])
            if batch and rows + n > self.max_rows:
                break
            batch.append(item)
            rows += n
        return batch, rows

    def _loop(self) -> None:
        while True:
            batch = self._take()
            if batch is None:
                return
            now = time.monotonic()
            live = []
            for item in batch:
                if item.abandoned or item.deadline <= now:
                    item.error = Overloaded("the request's deadline passed before its batch ran",
                                            retry_after_s=self._retry_after())
                    item.done.set()
                else:
                    live.append(item)
            if live:
                self._run(live)

    def _run(self, batch: list[_Pending]) -> None:
        t0 = time.perf_counter()
        try:
            x = batch[0].x if len(batch) == 1 else np.concatenate([item.x for item in batch], axis=0)
            draws = batch[0].run_fn(x)
            start = 0
            for item in batch:
                n = int(item.x.shape[0])
                item.result = draws[:, start:start + n]
                start += n
        except BaseException as exc:  # every caller of the batch gets the graph's error
            for item in batch:
                item.error = exc
        finally:
            elapsed = time.perf_counter() - t0
            self._batch_s = 0.9 * self._batch_s + 0.1 * elapsed if self._batch_s else elapsed
            self.stats.batches += 1
            self.stats.requests += len(batch)
            self.stats.rows += sum(int(item.x.shape[0]) for item in batch)
            for item in batch:
                item.done.set()


ROWS_BY_KIND = {"flip": 64}
"""Cases per merged graph call when ``batch_max_rows`` is 0, by graph kind; others get
``DEFAULT_ROWS``. Measured with two workers side by side (engine only, 64-256-256-10 MLP,
S = 32): the flip graph gives 14.0k rows/s at 64 rows a call and 11.9k at 256 (its
[S * B, width] activations spill the shared cache), the stacked graph 22.2k and 23.5k."""

DEFAULT_ROWS = 256


def rows_cap(config: ServeConfig, kind: str | None) -> int:
    """Most cases merged into one graph call: the configured cap, or the kind's measured one."""
    return config.batch_max_rows or ROWS_BY_KIND.get(kind or "", DEFAULT_ROWS)


def batching_runner(config: ServeConfig) -> Callable[[Any, np.ndarray], np.ndarray]:
    """A ``Runtime.runner`` ``(engine, x) -> draws`` that gathers concurrent requests per engine.

    Settings from ``config``: ``batch_wait_ms``, ``batch_max_rows``,
    ``queue_max_requests``, ``request_timeout_s``. The batcher is reachable as
    ``runner.batcher`` (stats, close).
    """
    batcher = MicroBatcher(_unbound, config.batch_wait_ms, rows_cap(config, None), config.queue_max_requests,
                           config.request_timeout_s)

    def runner(engine: Any, x: np.ndarray) -> np.ndarray:
        return batcher.submit(x, run_fn=engine.run)

    runner.batcher = batcher  # type: ignore[attr-defined]
    return runner


def _unbound(x: np.ndarray) -> np.ndarray:  # pragma: no cover - every submit passes run_fn
    raise RuntimeError("batching_runner submits always name the engine's run")
