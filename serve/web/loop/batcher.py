"""The loop front's predict batch: every admitted predict request that arrived in one pass of
the event loop, answered with one ``Runtime.answer`` call per caller.

Why: one graph call, one summary, one decision, one review write and one metrics update
cost a fixed overhead each; shared by the batch, the CPU per one-case request fell from
1.8 ms (a thread per request) to 0.36 ms in the side-by-side run of ``demur bench``.

Guarantees:

* every request added is delivered exactly one answer, whatever fails: a body that fails
  validation gets its own 4xx, a failing batch gives its requests a 500 in the one JSON
  shape, and one answer that cannot be encoded never touches the others;
* requests that waited past ``request_timeout_s`` get a 503 + Retry-After, not a late answer;
* work for a client that went away is skipped;
* at most ``rows_cap`` cases per graph call (a larger single request runs alone, whole).

Same input, different batch: the graph runs float32 matrix products whose summation order
depends on the batch size, so figures can differ in the last digits (about 1e-7 relative)
with what else was in the batch; decisions near the threshold can flip only within that.
"""

from __future__ import annotations

import asyncio
import logging
import time
from collections.abc import Callable
from typing import Any

from demur.serve.config import ServeConfig
from demur.serve.core.pipeline import Runtime
from demur.serve.errors import DemurError, Overloaded, internal_error
from demur.serve.web.predict_http import Admitted, Headers, refusal, reply

__all__ = ["DEFAULT_ROWS", "ROWS_BY_KIND", "Batcher", "rows_cap"]

log = logging.getLogger("demur.front")

ROWS_BY_KIND = {"flip": 64}
"""Cases per merged graph call when ``batch_max_rows`` is 0, by graph kind; others get
``DEFAULT_ROWS``. Measured with two workers side by side (engine only, 64-256-256-10 MLP,
S = 32): the flip graph gives 14.0k rows/s at 64 rows a call and 11.9k at 256 (its
[S * B, width] activations spill the shared cache), the stacked graph 22.2k and 23.5k."""

DEFAULT_ROWS = 256

Deliver = Callable[[Any, Any, int, Headers, bytes], None]
"""``deliver(connection, request, status, headers, body)``: write one answer."""


def rows_cap(config: ServeConfig, kind: str | None) -> int:
    """Most cases merged into one graph call: the configured cap, or the kind's measured one."""
    return config.batch_max_rows or ROWS_BY_KIND.get(kind or "", DEFAULT_ROWS)


_INTERNAL = internal_error()


class Batcher:
    """The pending predict requests of one worker and their flush."""

    def __init__(self, runtime: Runtime, loop: asyncio.AbstractEventLoop, deliver: Deliver) -> None:
        self.runtime = runtime
        self.config = runtime.config
        self.loop = loop
        self.deliver = deliver
        self.pending: list[tuple[Any, Any, Admitted]] = []
        self.rows = 0
        self.wait_s = float(self.config.batch_wait_ms) / 1000.0
        self._handle: asyncio.Handle | asyncio.TimerHandle | None = None

    @property
    def waiting(self) -> int:
        return len(self.pending)

    def add(self, conn: Any, req: Any, admitted: Admitted) -> None:
        self.pending.append((conn, req, admitted))
        self.rows += admitted.rows
        self._schedule(0.0 if self.rows >= self._cap() else self.wait_s)

    def _schedule(self, delay: float) -> None:
        """Flush after ``delay`` s (0: once this pass of the loop has read what arrived)."""
        if self._handle is not None:
            if delay > 0 or not isinstance(self._handle, asyncio.TimerHandle):
                return  # a flush is due no later than asked
            self._handle.cancel()  # a timed wait, overtaken by a full batch
        self._handle = self.loop.call_later(delay, self.flush) if delay > 0 else self.loop.call_soon(self.flush)

    def _cap(self) -> int:
        live = self.runtime.slot.current
        return rows_cap(self.config, live.engine.kind if live is not None else None)

    def flush(self) -> None:
        """Answer everything pending. Never raises: a request left unanswered by a fault
        here gets a 500 (logged) rather than a client that times out."""
        self._handle = None
        pending, self.pending, self.rows = self.pending, [], 0
        answered: set[int] = set()
        try:
            self._flush(pending, answered)
        except Exception:
            log.exception("predict flush failed; answering the rest of the batch with 500")
        for i, (conn, req, _) in enumerate(pending):
            if i not in answered:
                self.send(conn, req, _INTERNAL, None)

    def _flush(self, pending: list[tuple[Any, Any, Admitted]], answered: set[int]) -> None:
        deadline = time.perf_counter() - self.config.request_timeout_s
        cap = self._cap()
        chunk: list[int] = []
        rows = 0
        for i, (conn, req, admitted) in enumerate(pending):
            if conn.transport is None:  # the client went away: no one to answer, skip the work
                answered.add(i)
                continue
            if req.t0 < deadline:
                self.send(conn, req, Overloaded(
                    f"the request waited longer than {self.config.request_timeout_s:g} s; retry later",
                    retry_after_s=1.0), None)
                answered.add(i)
                continue
            if chunk and rows + admitted.rows > cap:
                self._run(pending, chunk, answered)
                chunk, rows = [], 0
            chunk.append(i)
            rows += admitted.rows
        if chunk:
            self._run(pending, chunk, answered)

    def _run(self, pending: list[tuple[Any, Any, Admitted]], chunk: list[int], answered: set[int]) -> None:
        by_caller: dict[str | None, list[int]] = {}
        for i in chunk:
            by_caller.setdefault(pending[i][2].caller, []).append(i)
        for caller, members in by_caller.items():
            live: Any = None
            try:
                live, answers = self.runtime.answer([pending[i][2].body for i in members], caller=caller)
            except DemurError as exc:
                answers = [exc] * len(members)
            except Exception:
                log.exception("predict batch of %d request(s) failed", len(members))
                answers = [_INTERNAL] * len(members)
            for i, answer in zip(members, answers):
                conn, req, _ = pending[i]
                self.send(conn, req, answer, live)
                answered.add(i)

    def send(self, conn: Any, req: Any, answer: dict[str, Any] | DemurError, live: Any) -> None:
        try:
            status, headers, data = reply(answer, live if live is not None else self.runtime.slot.current)
        except Exception:
            log.exception("predict answer could not be built")
            status, headers, data = refusal(_INTERNAL)
        if isinstance(answer, DemurError):
            if answer.status >= 500:
                log.warning("%s: %s", answer.code, answer.message)
            self.runtime.monitor.observe_error(status=answer.status, code=answer.code, endpoint="predict")
        self.deliver(conn, req, status, headers, data)

    def close(self) -> None:
        if self._handle is not None:
            self._handle.cancel()
        if self.pending:
            self.flush()
