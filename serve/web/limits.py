"""Limits and hygiene in front of the graph: bounded admission, back-pressure,
security headers.

Why a gate: the graph run is CPU-bound, so running more requests at once than
there are cores only stretches every request's latency. ``AdmissionGate``
lets ``slots`` requests run the graph at once and at most ``queue`` more wait,
each for at most ``wait_s`` seconds; anything past that is refused at once
with ``Overloaded`` (HTTP 503 with ``Retry-After``), so a client or a load
balancer can go elsewhere instead of watching latency explode.

``install_limits(app, config)`` wires it into a Flask app built by
``demur.serve.web.app.create_app``: the gate around the predict view, the body-size cap,
debug off and security headers on every response.

Example::

    gate = AdmissionGate(slots=2, queue=64, wait_s=2.0)
    with gate.admit():
        draws = engine.run(x)
"""

from __future__ import annotations

import math
import os
import threading
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any

from demur.serve.config import ServeConfig
from demur.serve.errors import Overloaded

__all__ = ["SECURITY_HEADERS", "AdmissionGate", "gate_for", "install_limits"]

SECURITY_HEADERS: dict[str, str] = {
    "X-Content-Type-Options": "nosniff",
    "X-Frame-Options": "DENY",
    "Referrer-Policy": "no-referrer",
    "Cross-Origin-Opener-Policy": "same-origin",
    "Cross-Origin-Resource-Policy": "same-origin",
    "Permissions-Policy": "camera=(), microphone=(), geolocation=()",
    # One strict policy for every response: no inline script or style anywhere (the
    # reviewer page loads its script and style from /review/assets), nothing from
    # elsewhere, no framing, no forms posting anywhere.
    "Content-Security-Policy": (
        "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self' data:; "
        "connect-src 'self'; base-uri 'none'; form-action 'none'; frame-ancestors 'none'"
    ),
}
"""Headers added to every response (common practice; values from memory of the
OWASP secure-headers recommendations)."""

_GATED_ENDPOINTS_HINT = ("predict",)


class AdmissionGate:
    """At most ``slots`` holders at once; at most ``queue`` waiters, each waiting
    at most ``wait_s`` seconds. Thread-safe; one gate per worker process."""

    def __init__(self, slots: int, queue: int, wait_s: float) -> None:
        if slots < 1 or queue < 0 or wait_s < 0:
            raise ValueError(f"need slots >= 1, queue >= 0, wait_s >= 0; got {slots}, {queue}, {wait_s}")
        self.slots = slots
        self.queue = queue
        self.wait_s = wait_s
        self._sem = threading.BoundedSemaphore(slots)
        self._lock = threading.Lock()
        self._waiting = 0
        self.refused = 0

    @property
    def waiting(self) -> int:
        """Requests waiting for a slot right now."""
        return self._waiting

    def _retry_after(self) -> float:
        return max(1.0, math.ceil(self.wait_s))

    @contextmanager
    def admit(self) -> Iterator[None]:
        """Hold one slot for the ``with`` body, or raise ``Overloaded``."""
        if not self._sem.acquire(blocking=False):
            with self._lock:
                if self._waiting >= self.queue:
                    self.refused += 1
                    raise Overloaded(
                        f"server is at capacity: {self.slots} requests running and {self._waiting} waiting "
                        f"(limit {self.queue}); retry later",
                        retry_after_s=self._retry_after(),
                    )
                self._waiting += 1
            try:
                got = self._sem.acquire(timeout=self.wait_s)
            finally:
                with self._lock:
                    self._waiting -= 1
            if not got:
                with self._lock:
                    self.refused += 1
                raise Overloaded(
                    f"no capacity within {self.wait_s:g} s ({self.slots} requests running); retry later",
                    retry_after_s=self._retry_after(),
                )
        try:
            yield
        finally:
            self._sem.release()


def gate_for(config: ServeConfig, cpus: int | None = None) -> AdmissionGate:
    """The gate a worker process gets from its settings.

    With micro-batching on (``batch_wait_ms > 0``) the batcher bounds the
    queue in front of the graph itself (serve/web/batching.py) and needs the
    requests to arrive together, so the gate admits every thread and only
    guards against more. Without it the gate is the bound: slots are the
    cores one worker can use (cores shared among ``workers``, at least 1,
    at most ``threads``). Queue: ``queue_max_requests``; wait: half the
    per-request timeout, so a refused client still has time to retry.
    """
    if config.batch_wait_ms > 0:
        slots = config.threads
    else:
        cores = cpus or os.cpu_count() or 1
        slots = max(1, min(config.threads, math.ceil(cores / max(1, config.workers))))
    return AdmissionGate(slots=slots, queue=config.queue_max_requests, wait_s=config.request_timeout_s / 2)


def install_limits(app: Any, config: ServeConfig, *, endpoints: tuple[str, ...] = _GATED_ENDPOINTS_HINT) -> AdmissionGate:
    """Wire the gate, body cap, debug off and security headers into ``app``.

    ``Overloaded`` is answered by the app's one error handler (503 with
    ``Retry-After`` from ``retry_after_s``).

    The gate wraps every view whose endpoint name ends with one of
    ``endpoints`` (the predict view), so the app factory needs one call.
    Returns the gate (kept in ``app.extensions["demur_gate"]`` for tests and metrics).
    """
    gate = gate_for(config)
    app.extensions["demur_gate"] = gate
    app.debug = False
    app.config["MAX_CONTENT_LENGTH"] = config.max_body_bytes
    app.config["PROPAGATE_EXCEPTIONS"] = False

    for name, view in list(app.view_functions.items()):
        if name.split(".")[-1] in endpoints and not getattr(view, "_demur_gated", False):
            app.view_functions[name] = _gated(view, gate)

    # Built once: eight ``setdefault`` calls per response each scan the header
    # list, so the hook checks the (few) headers a view set once and adds the
    # missing ones in one ``extend``. A view's own value still wins (the review
    # page sets a stricter Content-Security-Policy).
    added = tuple({**SECURITY_HEADERS, "Cache-Control": "no-store"}.items())
    names = frozenset(key.lower() for key, _ in added)

    @app.after_request
    def _headers(response: Any) -> Any:
        headers = response.headers
        present = {key.lower() for key, _ in headers} & names
        headers.extend([item for item in added if item[0].lower() not in present] if present else added)
        return response

    return gate


def _gated(view: Callable[..., Any], gate: AdmissionGate) -> Callable[..., Any]:
    def gated(*args: Any, **kwargs: Any) -> Any:
        with gate.admit():
            return view(*args, **kwargs)

    gated.__name__ = getattr(view, "__name__", "gated")
    gated.__doc__ = view.__doc__
    gated._demur_gated = True  # type: ignore[attr-defined]
    return gated
