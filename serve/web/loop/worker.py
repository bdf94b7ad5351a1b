"""The loop front: demur's gunicorn worker, answering ``POST /v1/predict`` on an event loop.

Why our own worker and not a stock one: a one-case request cost 1.8 ms of CPU in gunicorn's
threaded worker (HTTP parsing, the framework's dispatch and hooks, per-request summaries,
metrics and logging) against 0.36 ms here, where HTTP is parsed in C (httptools) and every
predict request that arrived in one pass of the loop shares one graph call (``Batcher``).
``demur bench`` measures it side by side; deploy/README.md, "Sizing", has the figures. This
is the one production front.

Why not a maintained ASGI server instead (issue 16): ``demur bench`` runs uvicorn (HTTP parsed
by httptools) under gunicorn's process management, with an asyncio batcher for predict and the
Flask app through a WSGI adapter (export/bench/asgi.py), against this front with the same
sizing, alternated in one run. The rule was to adopt it within 15% of this front's one-case
requests/s; it reached 56% (898 against 1,598 req/s, p99 53 against 33 ms; 1.07 ms of server
CPU per request against 0.60, where the difference goes was not profiled), while matching this
front on 64-case requests (5,030 against 4,870 rows/s). So this front stays.

The parts: ``connection`` (HTTP/1.1 framing, order, limits), ``batcher`` (the predict batch),
``bridge`` (every other route, run by the Flask app in a thread pool) and this module (the
worker's shared state, answers, access log, gunicorn process model). The predict checks and
headers are serve/web/predict_http.py's, the same the Flask route uses.

Process model: gunicorn's master supervises these workers like any other (heartbeat, SIGTERM
drains in-flight requests within ``graceful_timeout``, SIGHUP reloads the bundle via
serve/web/admin.py). The app, its onnxruntime sessions and its random stream are built in the
worker after the fork. The graph runs on the loop thread: the process is CPU-bound anyway, and
one worker per core keeps the cores busy.

Clients: the peer address, or, when the peer is one of ``trusted_proxies``, the right-most
address of ``X-Forwarded-For`` that is not a trusted proxy (and is a valid IP address).

Example (``demur serve`` uses this worker)::

    gunicorn -k demur.serve.web.loop.worker.FrontWorker 'demur.serve.web.server:app_from_environment()'
"""

from __future__ import annotations

import asyncio
import ipaddress
import logging
import os
import signal
import socket
import sys
import time
from concurrent.futures import ThreadPoolExecutor
from email.utils import formatdate
from http import HTTPStatus
from typing import Any

from gunicorn.workers import base

from demur.serve.errors import DemurError, internal_error
from demur.serve.web import predict_http
from demur.serve.web.auth import tokens_of
from demur.serve.web.limits import SECURITY_HEADERS
from demur.serve.web.loop.batcher import Batcher
from demur.serve.web.loop.bridge import call_app, environ_for
from demur.serve.web.loop.connection import Connection, Request

__all__ = ["PREDICT_PATH", "Front", "FrontWorker", "trusted_set"]

PREDICT_PATH = predict_http.PREDICT_PATH.encode("ascii")
"""The one route answered on the loop; every other path goes to the Flask app."""

HEARTBEAT_S = 0.5
SWEEP_LATE_S = 4 * HEARTBEAT_S
"""A sweep that comes this long after the previous one ran behind a held-up loop (``Front.sweep``)."""
ACCEPT_PAUSE_S = 0.5
REFUSAL_LOG_S = 1.0  # at most one log line a second about refused connections

log = logging.getLogger("demur.front")

_REASONS = {s.value: s.phrase.encode("latin-1") for s in HTTPStatus}
_STATIC_HEADERS = b"".join(f"{k}: {v}\r\n".encode("latin-1")
                           for k, v in {**SECURITY_HEADERS, "Cache-Control": "no-store"}.items())


def trusted_set(spec: str) -> frozenset[str]:
    """The configured proxy addresses (comma separated), normalised."""
    out = set()
    for item in spec.split(","):
        item = item.strip()
        if item:
            out.add(str(ipaddress.ip_address(item)))
    return frozenset(out)


def _head(headers: list[tuple[str, str]]) -> bytes:
    return b"".join(f"{k}: {v}\r\n".encode("latin-1") for k, v in headers)


class Front:
    """The shared state of one worker: the Flask app, the runtime, the predict batch."""

    def __init__(self, app: Any, worker: Any, loop: asyncio.AbstractEventLoop) -> None:
        # Imported here, in the worker: gunicorn's master imports this module to find the
        # worker class, and onnxruntime (which the app imports) must not be loaded before
        # the fork -- its threads do not survive it, and the child aborts at exit joining them.
        from demur.serve.web.app import runtime_of

        self.app = app
        self.runtime = runtime_of(app)
        self.tokens = tokens_of(app)
        config = self.runtime.config
        self.config = config
        self.loop = loop
        self.worker = worker
        cfg = worker.cfg
        self.max_body = int(config.max_body_bytes)
        self.limit_line = int(cfg.limit_request_line or 8190)
        self.limit_fields = int(cfg.limit_request_fields or 100)
        self.limit_field_size = int(cfg.limit_request_field_size or 8190)
        self.keepalive_s = float(cfg.keepalive or 0)
        self.max_connections = int(getattr(cfg, "worker_connections", 1000) or 1000)
        self.access = worker.log.access_log if cfg.accesslog else None
        self.pool = ThreadPoolExecutor(max_workers=max(1, int(config.threads)), thread_name_prefix="demur-wsgi")
        self.connections: set[Connection] = set()
        self.batch = Batcher(self.runtime, loop, self._deliver)
        self.trusted = trusted_set(config.trusted_proxies)
        self.server_name = "127.0.0.1"
        self.server_port = "0"
        self._date = (0, b"")
        self._stamp = ""
        self._refusal_logged = 0.0
        self.refused_connections = 0
        self.wsgi_busy = 0
        self.swept = time.monotonic()

    # -- connections ------------------------------------------------------------
    def accept(self, conn: Connection) -> bool:
        if len(self.connections) >= self.max_connections:
            self.refused_connections += 1
            now = time.monotonic()
            if now - self._refusal_logged >= REFUSAL_LOG_S:
                self._refusal_logged = now
                log.warning("refusing connection from %s: %d open (worker_connections %d); %d refused so far",
                            conn.peer[0] or "-", len(self.connections), self.max_connections,
                            self.refused_connections)
            self.runtime.monitor.observe_connection_refused()
            return False
        self.connections.add(conn)
        return True

    def client_of(self, peer: str, headers: list[tuple[bytes, bytes]]) -> str:
        """The client address to log and hand to the app (see the module docstring)."""
        if not self.trusted or peer not in self.trusted:
            return peer or "-"
        chain = [v for k, v in headers if k.lower() == b"x-forwarded-for"]
        hops = [h.strip() for v in chain for h in v.decode("latin-1").split(",")]
        for hop in reversed(hops):
            try:
                address = str(ipaddress.ip_address(hop))
            except ValueError:
                return peer  # a malformed chain: trust nothing in it
            if address not in self.trusted:
                return address
        return peer

    def sweep(self) -> None:
        """Close connections idle past the keep-alive time, and requests whose bytes have
        been arriving for longer than the request timeout (a client trickling a request).

        A sweep that runs late closes nothing. The loop was held up (a predict batch waiting
        on a stalled review store runs on it), and bytes that arrived meanwhile are still
        unread: a connection that looks idle may hold the client's next request, and closing
        it then resets that request. The next sweep comes after the loop has read them."""
        now = time.monotonic()
        late, self.swept = now - self.swept > SWEEP_LATE_S, now
        if late:
            return
        stall = self.config.request_timeout_s
        for conn in list(self.connections):
            if conn.transport is None:
                continue
            if (conn.idle and now - conn.last_active > self.keepalive_s) or (conn.in_message
                                                                            and now - conn.began > stall):
                conn.transport.close()

    # -- dispatch -----------------------------------------------------------------
    def dispatch(self, conn: Connection, req: Request) -> None:
        try:
            if req.path == PREDICT_PATH and req.method == b"POST":
                self._predict(conn, req)
                return
            future = self.loop.run_in_executor(self.pool, self._call_app, conn.peer[1], req)
            self.wsgi_busy += 1
            future.add_done_callback(lambda f: self._app_done(conn, req, f))
        except Exception:  # never leave a request without an answer
            log.exception("dispatch of %s failed", req.path[:100].decode("latin-1"))
            self._deliver(conn, req, *_internal())

    def _predict(self, conn: Connection, req: Request) -> None:
        try:
            admitted = predict_http.admit(req.header_text, req.body, tokens=self.tokens, config=self.config,
                                          waiting=self.batch.waiting)
        except DemurError as exc:
            self.batch.send(conn, req, exc, None)
            return
        self.batch.add(conn, req, admitted)

    # -- responses ----------------------------------------------------------------
    def _date_header(self) -> bytes:
        self._tick()
        return self._date[1]

    def _tick(self) -> None:
        """Date header and access-log stamp, formatted once a second (not per request)."""
        now = int(time.time())
        if self._date[0] != now:
            self._date = (now, f"Date: {formatdate(now, usegmt=True)}\r\n".encode("latin-1"))
            self._stamp = time.strftime("[%d/%b/%Y:%H:%M:%S %z]", time.localtime(now))

    def response(self, status: int, body: bytes, *, keep_alive: bool = True, version: str = "1.1",
                 extra: bytes = b"") -> bytes:
        """One JSON answer: status line, our static headers, ``extra``, framing, body."""
        head = b"HTTP/1.1 %d %s\r\nContent-Type: application/json\r\nContent-Length: %d\r\n" % (
            status, _REASONS.get(status, b"Unknown"), len(body))
        return b"".join((head, self._date_header(), _STATIC_HEADERS, extra, _connection(keep_alive, version),
                         b"\r\n", body))

    def _deliver(self, conn: Connection, req: Request, status: int, headers: list[tuple[str, str]],
                 body: bytes) -> None:
        try:
            data = self.response(status, body, keep_alive=req.keep_alive, version=req.version, extra=_head(headers))
        except Exception:  # e.g. a header value that is not latin-1: answer without it
            log.exception("answer headers could not be encoded")
            status, _, body = predict_http.refusal(internal_error())
            data = self.response(status, body, keep_alive=False)
        conn.finish(req.slot, data, close=not req.keep_alive)
        self.count(req.method, req.path, status, req.t0, len(body), req.client)

    def count(self, method: bytes, path: bytes, status: int, t0: float, size: int, client: str) -> None:
        """Request metrics and the access-log line of one request answered on the loop."""
        seconds = time.perf_counter() - t0 if t0 else 0.0
        if path == PREDICT_PATH:
            route, verb = "/v1/predict", "POST" if method == b"POST" else "other"
        else:
            route, verb = "other", "other"
        self.runtime.monitor.observe_request(route, verb, status, seconds)
        self.log_access(client, method, path, status, size, seconds)

    def count_refusal(self, path: bytes, status: int, t0: float, size: int, client: str) -> None:
        """A request refused while parsing (malformed, too large): counted and logged like any."""
        self.count(b"-", path, status, t0, size, client)

    def log_access(self, client: str, method: bytes, path: bytes, status: int, size: int, seconds: float) -> None:
        if self.access is None:
            return
        self._tick()
        # Method and path are client bytes: shown escaped, never as raw control characters.
        shown_path = path[:200].decode("latin-1").encode("unicode_escape").decode("ascii")
        shown_method = method[:20].decode("latin-1").encode("unicode_escape").decode("ascii")
        self.access.info('%s %s "%s %s" %d %d %dms', client, self._stamp, shown_method or "-",
                         shown_path or "-", status, size, int(seconds * 1000))

    # -- everything else: the Flask app -------------------------------------------
    def _call_app(self, peer_port: int, req: Request) -> tuple[int, list[tuple[str, str]], bytes]:
        return call_app(self.app, environ_for(req, peer_port, self.server_name, self.server_port))

    def _app_done(self, conn: Connection, req: Request, future: Any) -> None:
        self.wsgi_busy -= 1
        try:
            status, headers, body = future.result()
            lines = [b"HTTP/1.1 %d %s\r\n" % (status, _REASONS.get(status, b"Unknown")), self._date_header()]
            has_length = False
            for key, value in headers:
                if key.lower() == "content-length":
                    has_length = True
                lines.append(f"{key}: {value}\r\n".encode("latin-1"))
            if req.method == b"HEAD":
                body = b""
            if not has_length:
                lines.append(b"Content-Length: %d\r\n" % len(body))
            lines += [_connection(req.keep_alive, req.version), b"\r\n"]
            data = b"".join(lines) + body
        except Exception:
            log.exception("%s %s failed in the app", req.method[:20].decode("latin-1"),
                          req.path[:200].decode("latin-1"))
            self._deliver(conn, req, *_internal())
            return
        conn.finish(req.slot, data, close=not req.keep_alive)
        self.log_access(req.client, req.method, req.path, status, len(body), time.perf_counter() - req.t0)

    # -- shutdown -----------------------------------------------------------------
    def close(self) -> None:
        self.batch.close()
        self.pool.shutdown(wait=True, cancel_futures=False)


def _connection(keep_alive: bool, version: str) -> bytes:
    """The ``Connection`` header: close when we close; keep-alive said aloud to HTTP/1.0
    clients that asked for it (RFC 9112, 9.3 and appendix C.2.2)."""
    if not keep_alive:
        return b"Connection: close\r\n"
    return b"Connection: keep-alive\r\n" if version == "1.0" else b""


def _internal() -> tuple[int, list[tuple[str, str]], bytes]:
    status, _, body = predict_http.refusal(internal_error())
    return status, [], body


def _listen(loop: asyncio.AbstractEventLoop, front: Front, listener: socket.socket) -> None:
    """Accept ONE connection each time ``listener`` is readable.

    Why not ``loop.create_server``: it accepts up to its backlog of waiting connections at
    once, so the first worker to wake took all 32 of a load test's connections and the other
    core idled (measured: 64-case requests at half the rows/s of two balanced workers). One
    accept per wake-up lets every worker that is free take its share.
    """
    listener.setblocking(False)

    def accept() -> None:
        try:
            conn, _ = listener.accept()
        except (BlockingIOError, InterruptedError, ConnectionAbortedError):
            return  # another worker took it
        except OSError as exc:  # out of file descriptors: pause accepting instead of spinning
            log.error("accept failed (%s); pausing new connections for %.1f s", exc, ACCEPT_PAUSE_S)
            loop.remove_reader(listener.fileno())
            loop.call_later(ACCEPT_PAUSE_S, loop.add_reader, listener.fileno(), accept)
            return
        conn.setblocking(False)
        loop.create_task(loop.connect_accepted_socket(lambda: Connection(front), sock=conn))

    loop.add_reader(listener.fileno(), accept)


class FrontWorker(base.Worker):
    """gunicorn worker class: one asyncio loop per process, predict answered in batches.

    Settings it reads from gunicorn: ``keepalive`` (idle connection seconds),
    ``worker_connections``, ``limit_request_line``/``_fields``/``_field_size``,
    ``graceful_timeout``, ``accesslog``. ``threads`` is the size of the pool that runs the
    other routes.
    """

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.loop: asyncio.AbstractEventLoop | None = None
        self._quick = False

    def init_process(self) -> None:
        self.loop = asyncio.new_event_loop()
        asyncio.set_event_loop(self.loop)
        super().init_process()

    def init_signals(self) -> None:
        for sig in self.SIGNALS:
            signal.signal(sig, signal.SIG_DFL)
        assert self.loop is not None
        self.loop.add_signal_handler(signal.SIGTERM, self._exit)
        self.loop.add_signal_handler(signal.SIGQUIT, self._quit)
        self.loop.add_signal_handler(signal.SIGINT, self._quit)
        self.loop.add_signal_handler(signal.SIGUSR1, self.log.reopen_files)
        self.loop.add_signal_handler(signal.SIGWINCH, lambda: None)
        self.loop.add_signal_handler(signal.SIGABRT, self._abort)

    def _exit(self) -> None:
        self.alive = False

    def _quit(self) -> None:
        self._quick = True
        self.alive = False
        self.cfg.worker_int(self)

    def _abort(self) -> None:
        self.alive = False
        self.cfg.worker_abort(self)
        sys.exit(1)

    def run(self) -> None:
        assert self.loop is not None
        try:
            self.loop.run_until_complete(self._serve())
        finally:
            self.loop.close()
            for sock in self.sockets:
                try:
                    sock.close()
                except OSError:
                    pass

    async def _serve(self) -> None:
        loop = asyncio.get_running_loop()
        front = Front(self.wsgi, self, loop)
        listeners = [sock.sock for sock in self.sockets]
        for listener in listeners:
            name = listener.getsockname()
            if isinstance(name, tuple):
                front.server_name, front.server_port = str(name[0]), str(name[1])
            _listen(loop, front, listener)
        while self.alive:
            self.notify()
            if self.ppid != os.getppid():
                log.info("the gunicorn master is gone; worker %s stops", self.pid)
                break
            front.sweep()
            await asyncio.sleep(HEARTBEAT_S)
        for listener in listeners:
            loop.remove_reader(listener.fileno())
        deadline = time.monotonic() + (0 if self._quick else float(self.cfg.graceful_timeout))
        while time.monotonic() < deadline and (front.batch.pending or front.wsgi_busy
                                               or any(not c.idle for c in front.connections)):
            self.notify()
            await asyncio.sleep(0.05)
        front.close()
        for conn in list(front.connections):
            if conn.transport is not None:
                conn.transport.close()
