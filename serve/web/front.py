"""The HTTP front: a gunicorn worker that answers ``POST /v1/predict`` on an event loop.

Why: with the threaded worker, a one-case request spent about 2.7 ms of CPU of
which the graph took 0.7; the rest was HTTP parsing, the web framework's
dispatch and hooks, and per-request summaries, metrics and logging. This
worker parses HTTP with ``httptools`` (the llhttp parser, in C) on one asyncio
loop per process and hands every predict request that arrived in one pass of
the loop to ``Runtime.answer`` at once: one graph call, one summary, one
decision, one review write and one metrics update for the lot. Everything
else (review API and page, /metrics, /v1/model, admin, health) goes to the
same Flask app as before, run in a thread pool, so there is one definition
of every other route.

What a predict request meets, in order (the Flask route checks the same):
``Authorization`` (serve/web/auth.py) -> ``Content-Type: application/json`` ->
body size -> JSON -> the admission bound (at most ``queue_max_requests``
waiting, else 503 + ``Retry-After``) -> the next batch, which starts after at
most ``batch_wait_ms`` or as soon as ``batch_max_rows`` cases are waiting
(by default a cap per graph kind, ``demur.serve.web.batching.rows_cap``).
Errors have the app's one shape ``{"error": {"code", "message", "field"}}``;
malformed HTTP gets a 400 in that shape and the connection is closed.

Responses carry the same headers as the Flask app's (security headers,
``Cache-Control: no-store``, ``Demur-Model-Version`` / ``-Checksum``,
``WWW-Authenticate`` on 401, ``Retry-After`` on 503). Every request is counted
in the request metrics and written to the access log (client, time, method,
path without query, status, bytes, ms).

Process model: gunicorn's master supervises these workers like any other
(heartbeat, SIGTERM drains in-flight requests within ``graceful_timeout``,
SIGHUP reloads the bundle via serve/web/admin.py). The app, and with it the
onnxruntime sessions and the random stream, is built in the worker after
the fork. The graph runs on the loop thread: the process is CPU-bound
anyway, one worker per core keeps the cores busy (deploy/README.md, "Sizing").

Example (``demur serve`` uses this worker unless ``front = "threads"``)::

    gunicorn -k demur.serve.web.front.FrontWorker 'demur.serve.web.server:app_from_environment()'
"""

from __future__ import annotations

import asyncio
import io
import logging
import os
import signal
import socket
import sys
import time
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from email.utils import formatdate
from http import HTTPStatus
from typing import Any
from urllib.parse import unquote_to_bytes

import httptools
import orjson
from gunicorn.workers import base

from demur.serve.web.auth import AUTH_EXTENSION, CHALLENGE
from demur.serve.web.batching import rows_cap
from demur.serve.errors import DemurError, Overloaded, PayloadTooLarge, UnsupportedMediaType
from demur.serve.web.limits import SECURITY_HEADERS
from demur.serve.core.validation import parse_json

__all__ = ["PREDICT_PATH", "FrontWorker"]

PREDICT_PATH = b"/v1/predict"
"""The one route answered on the loop; every other path goes to the Flask app."""

MAX_PIPELINED = 32  # requests one connection may have in flight before we stop reading it
HEARTBEAT_S = 0.5
ACCEPT_PAUSE_S = 0.5

log = logging.getLogger("demur.front")

_REASONS = {s.value: s.phrase.encode("latin-1") for s in HTTPStatus}
_STATIC_HEADERS = b"".join(f"{k}: {v}\r\n".encode("latin-1")
                           for k, v in {**SECURITY_HEADERS, "Cache-Control": "no-store"}.items())


def _error(status: int, code: str, message: str, field: str | None) -> tuple[int, bytes]:
    return status, orjson.dumps({"error": {"code": code, "message": message, "field": field}})


def _header(headers: list[tuple[bytes, bytes]], name: bytes) -> bytes | None:
    """The first value of header ``name`` (lower-case), or ``None``."""
    for key, value in headers:
        if key.lower() == name:
            return value
    return None


class _Slot:
    """One request's place in its connection's response order."""

    __slots__ = ("data", "close")

    def __init__(self) -> None:
        self.data: bytes | None = None
        self.close = False


class _Request:
    __slots__ = ("method", "path", "query", "headers", "body", "keep_alive", "version", "t0", "slot", "rows")

    def __init__(self, method: bytes, url: bytes, headers: list[tuple[bytes, bytes]], body: bytes,
                 keep_alive: bool, version: str, t0: float, slot: _Slot) -> None:
        self.method = method
        self.path, _, self.query = url.partition(b"?")
        self.headers = headers
        self.body = body
        self.keep_alive = keep_alive
        self.version = version
        self.t0 = t0
        self.slot = slot
        self.rows = 1  # cases in a predict body (set by the front before batching)

    def header(self, name: bytes) -> bytes | None:
        return _header(self.headers, name)


class _Connection(asyncio.Protocol):
    """One client connection: parse with httptools, hand complete requests to the front,
    write responses in request order (pipelined requests are answered in order)."""

    def __init__(self, front: _Front) -> None:
        self.front = front
        self.parser = httptools.HttpRequestParser(self)
        self.transport: asyncio.Transport | None = None
        self.peer = ("", 0)
        self.slots: deque[_Slot] = deque()
        self.paused = False
        self.last_active = time.monotonic()
        self._reset()

    def _reset(self) -> None:
        self.in_message = False
        self.url = b""
        self.headers: list[tuple[bytes, bytes]] = []
        self.body: list[bytes] = []
        self.size = 0
        self.refused: tuple[int, bytes] | None = None
        self.t0 = 0.0
        self.began = 0.0  # time.monotonic() at the request's first byte

    # -- asyncio ----------------------------------------------------------------
    def connection_made(self, transport: asyncio.BaseTransport) -> None:
        self.transport = transport  # type: ignore[assignment]
        peer = transport.get_extra_info("peername")
        self.peer = (str(peer[0]), int(peer[1])) if isinstance(peer, tuple) else ("", 0)
        if not self.front.accept(self):
            transport.close()

    def connection_lost(self, exc: Exception | None) -> None:
        self.front.connections.discard(self)
        self.transport = None

    def data_received(self, data: bytes) -> None:
        self.last_active = time.monotonic()
        try:
            self.parser.feed_data(data)
        except httptools.HttpParserUpgrade:
            self._fail(400, "protocol upgrades are not supported", "Upgrade")
        except httptools.HttpParserError as exc:
            if self.refused is not None:  # answer the refusal we decided on, then close
                self._refuse_now()
                return
            self._fail(400, f"malformed HTTP request: {exc}", "request")

    # -- httptools callbacks ----------------------------------------------------
    def on_message_begin(self) -> None:
        self._reset()
        self.in_message = True
        self.t0 = time.perf_counter()
        self.began = time.monotonic()

    def on_url(self, url: bytes) -> None:
        self.url += url
        if len(self.url) > self.front.limit_line:
            self.refused = _error(414, "uri_too_long", f"the request target is longer than "
                                  f"{self.front.limit_line} bytes", "path")
            raise httptools.HttpParserError("uri too long")  # stops the parser; answered in data_received

    def on_header(self, name: bytes, value: bytes) -> None:
        self.headers.append((name, value))
        if len(self.headers) > self.front.limit_fields or len(name) + len(value) > self.front.limit_field_size:
            self.refused = _error(431, "header_fields_too_large",
                                  f"at most {self.front.limit_fields} header fields of at most "
                                  f"{self.front.limit_field_size} bytes each", "headers")
            raise httptools.HttpParserError("headers too large")

    def on_headers_complete(self) -> None:
        declared = _header(self.headers, b"content-length")
        limit = self.front.max_body
        if declared is not None and declared.isdigit() and int(declared) > limit:
            self.refused = _error(413, PayloadTooLarge.code,
                                  f"body is {int(declared)} bytes; the limit is {limit}", "body")
            raise httptools.HttpParserError("body too large")  # the body is never read
        expect = _header(self.headers, b"expect")
        if expect is not None and expect.lower() == b"100-continue" and self.transport is not None:
            self.transport.write(b"HTTP/1.1 100 Continue\r\n\r\n")

    def on_body(self, body: bytes) -> None:
        self.size += len(body)
        if self.size > self.front.max_body:
            self.refused = _error(413, PayloadTooLarge.code,
                                  f"body is larger than the limit of {self.front.max_body} bytes", "body")
            raise httptools.HttpParserError("body too large")
        self.body.append(body)

    def on_message_complete(self) -> None:
        slot = _Slot()
        self.slots.append(slot)
        request = _Request(self.parser.get_method(), self.url, self.headers, b"".join(self.body),
                           self.parser.should_keep_alive(), self.parser.get_http_version(), self.t0, slot)
        self.in_message = False
        if len(self.slots) >= MAX_PIPELINED and self.transport is not None and not self.paused:
            self.transport.pause_reading()
            self.paused = True
        self.front.dispatch(self, request)

    # -- answering --------------------------------------------------------------
    def finish(self, slot: _Slot, data: bytes, close: bool = False) -> None:
        """Fill ``slot`` and write every answer that is now next in order."""
        slot.data, slot.close = data, close
        transport = self.transport
        while self.slots and self.slots[0].data is not None:
            done = self.slots.popleft()
            if transport is None:
                continue
            transport.write(done.data)  # type: ignore[arg-type]
            if done.close:
                transport.close()
                self.transport = transport = None
        self.last_active = time.monotonic()
        if self.paused and transport is not None and len(self.slots) < MAX_PIPELINED // 2:
            transport.resume_reading()
            self.paused = False

    def _refuse_now(self) -> None:
        status, body = self.refused  # type: ignore[misc]
        slot = _Slot()
        self.slots.append(slot)
        self.front.count(b"", b"", status, self.t0)
        self.finish(slot, self.front.response(status, body, keep_alive=False), close=True)

    def _fail(self, status: int, message: str, field: str) -> None:
        self.refused = _error(status, "bad_request", message, field)
        self._refuse_now()

    @property
    def idle(self) -> bool:
        return not self.slots and not self.in_message


class _Front:
    """The shared state of one worker: the Flask app, the runtime, the pending batch."""

    def __init__(self, app: Any, worker: Any, loop: asyncio.AbstractEventLoop) -> None:
        self.app = app
        self.runtime = app.extensions["demur"]
        self.tokens = app.extensions[AUTH_EXTENSION]
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
        self.connections: set[_Connection] = set()
        self.pending: list[tuple[_Connection, _Request, Any]] = []
        self.pending_rows = 0
        self.flush_handle: asyncio.Handle | asyncio.TimerHandle | None = None
        self.wait_s = float(config.batch_wait_ms) / 1000.0
        self.server_name = "127.0.0.1"
        self.server_port = "0"
        self._date = (0, b"")
        self._stamp = ""
        self._model: tuple[Any, bytes] = (None, b"")
        self.wsgi_busy = 0

    # -- connections ------------------------------------------------------------
    def accept(self, conn: _Connection) -> bool:
        if len(self.connections) >= self.max_connections:
            return False
        self.connections.add(conn)
        return True

    def sweep(self) -> None:
        """Close connections idle past the keep-alive time, and requests whose bytes have
        been arriving for longer than the request timeout (a client trickling a request)."""
        now = time.monotonic()
        stall = self.config.request_timeout_s
        for conn in list(self.connections):
            if conn.transport is None:
                continue
            if (conn.idle and now - conn.last_active > self.keepalive_s) or (conn.in_message
                                                                            and now - conn.began > stall):
                conn.transport.close()

    # -- dispatch -----------------------------------------------------------------
    def dispatch(self, conn: _Connection, req: _Request) -> None:
        if req.path == PREDICT_PATH and req.method == b"POST":
            self._predict(conn, req)
        else:
            future = self.loop.run_in_executor(self.pool, self._call_wsgi, conn.peer, req)
            self.wsgi_busy += 1
            future.add_done_callback(lambda f: self._wsgi_done(conn, req, f))

    def _predict(self, conn: _Connection, req: _Request) -> None:
        try:
            authorization = req.header(b"authorization")
            self.tokens.check(authorization.decode("latin-1") if authorization is not None else None, "predict")
            ctype = (req.header(b"content-type") or b"").split(b";", 1)[0].strip().lower()
            if ctype != b"application/json":
                got = (req.header(b"content-type") or b"no Content-Type").decode("latin-1")
                raise UnsupportedMediaType(f"Content-Type must be application/json; got {got}", field="Content-Type")
            body = parse_json(req.body)
            if len(self.pending) >= self.config.queue_max_requests:
                raise Overloaded(f"server is at capacity: {len(self.pending)} requests waiting "
                                 f"(limit {self.config.queue_max_requests}); retry later",
                                 retry_after_s=max(1.0, self.config.request_timeout_s / 2))
        except DemurError as exc:
            self._answer_error(conn, req, exc)
            return
        cases = body.get("cases") if isinstance(body, dict) else None
        req.rows = len(cases) if isinstance(cases, list) else 1  # counted once, for the row cap
        self.pending.append((conn, req, body))
        self.pending_rows += req.rows
        if self.pending_rows >= self._rows_cap():
            self._schedule(0.0)
        else:
            self._schedule(self.wait_s)

    def _schedule(self, delay: float) -> None:
        """Flush after ``delay`` s (0: once this pass of the loop has read what arrived)."""
        if self.flush_handle is not None:
            if delay > 0 or not isinstance(self.flush_handle, asyncio.TimerHandle):
                return  # a flush is due no later than asked
            self.flush_handle.cancel()  # a timed wait, overtaken by a full batch
        self.flush_handle = (self.loop.call_later(delay, self.flush) if delay > 0
                             else self.loop.call_soon(self.flush))

    def flush(self) -> None:
        """Answer everything pending, in graph calls of at most ``batch_max_rows`` cases
        (a larger single request runs alone, whole)."""
        self.flush_handle = None
        pending, self.pending, self.pending_rows = self.pending, [], 0
        deadline = time.perf_counter() - self.config.request_timeout_s
        cap = self._rows_cap()
        chunk: list[tuple[_Connection, _Request, Any]] = []
        rows = 0
        for item in pending:
            if item[0].transport is None:  # the client went away: no one to answer, skip the work
                continue
            if item[1].t0 < deadline:
                self._answer_error(item[0], item[1], Overloaded(
                    f"the request waited longer than {self.config.request_timeout_s:g} s; retry later",
                    retry_after_s=1.0))
                continue
            n = item[1].rows
            if chunk and rows + n > cap:
                self._run(chunk)
                chunk, rows = [], 0
            chunk.append(item)
            rows += n
        if chunk:
            self._run(chunk)

    def _rows_cap(self) -> int:
        live = self.runtime.engines._live
        return rows_cap(self.config, live.engine.kind if live is not None else None)

    def _run(self, chunk: list[tuple[_Connection, _Request, Any]]) -> None:
        try:
            live, answers = self.runtime.answer([body for _, _, body in chunk], runner=_direct)
        except DemurError as exc:
            for conn, req, _ in chunk:
                self._answer_error(conn, req, exc)
            return
        except Exception:
            log.exception("predict batch of %d request(s) failed", len(chunk))
            for conn, req, _ in chunk:
                self._answer(conn, req, *_error(500, "internal", "internal error; the server log has the details",
                                                None))
            return
        model = self._model_headers(live)
        for (conn, req, _), answer in zip(chunk, answers):
            if isinstance(answer, DemurError):
                self._answer_error(conn, req, answer, model)
            else:
                self._answer(conn, req, 200, orjson.dumps(answer), model)

    # -- responses ----------------------------------------------------------------
    def _model_headers(self, live: Any) -> bytes:
        if live is None:
            return b""
        if self._model[0] is not live:
            m = live.model
            self._model = (live, (f"Demur-Model-Version: {m['name']}/{m['version']}\r\n"
                                  f"Demur-Model-Checksum: {m['checksum']}\r\n").encode("latin-1"))
        return self._model[1]

    def _date_header(self) -> bytes:
        self._tick()
        return self._date[1]

    def _tick(self) -> None:
        """Date header and access-log stamp, formatted once a second (not per request)."""
        now = int(time.time())
        if self._date[0] != now:
            self._date = (now, f"Date: {formatdate(now, usegmt=True)}\r\n".encode("latin-1"))
            self._stamp = time.strftime("[%d/%b/%Y:%H:%M:%S %z]", time.localtime(now))

    def response(self, status: int, body: bytes, *, keep_alive: bool = True, model: bytes = b"",
                 extra: bytes = b"", content_type: bytes = b"application/json") -> bytes:
        head = b"HTTP/1.1 %d %s\r\nContent-Type: %s\r\nContent-Length: %d\r\n" % (
            status, _REASONS.get(status, b"Unknown"), content_type, len(body))
        tail = b"" if keep_alive else b"Connection: close\r\n"
        return b"".join((head, self._date_header(), _STATIC_HEADERS, model, extra, tail, b"\r\n", body))

    def _answer(self, conn: _Connection, req: _Request, status: int, body: bytes, model: bytes | None = None,
                extra: bytes = b"") -> None:
        if model is None:
            model = self._model_headers(self.runtime.engines._live)
        data = self.response(status, body, keep_alive=req.keep_alive, model=model, extra=extra)
        conn.finish(req.slot, data, close=not req.keep_alive)
        self.count(req.method, req.path, status, req.t0, len(body), conn.peer[0])

    def _answer_error(self, conn: _Connection, req: _Request, exc: DemurError, model: bytes | None = None) -> None:
        extra = b""
        retry = getattr(exc, "retry_after_s", None)
        if retry is not None:
            extra += b"Retry-After: %d\r\n" % max(1, int(-(-float(retry) // 1)))
        if exc.status == 401:
            extra += b"WWW-Authenticate: %s\r\n" % CHALLENGE.encode("latin-1")
        if exc.status >= 500:
            log.warning("%s: %s", exc.code, exc.message)
        try:
            self.runtime.metrics.observe_error(status=exc.status, code=exc.code, endpoint="predict")
        except Exception:
            log.exception("metrics hook failed")
        self._answer(conn, req, exc.status, orjson.dumps(exc.to_payload()), model, extra)

    def count(self, method: bytes, path: bytes, status: int, t0: float, size: int = 0, client: str = "-") -> None:
        """Request metrics and the access-log line of one answered request (predict and refusals;
        the Flask app counts its own routes)."""
        seconds = time.perf_counter() - t0 if t0 else 0.0
        if path == PREDICT_PATH:
            observe = getattr(self.runtime.metrics, "observe_request", None)
            if callable(observe):
                try:
                    observe("/v1/predict", "POST", status, seconds)
                except Exception:
                    log.exception("metrics hook failed")
        self.log_access(client, method, path, status, size, seconds)

    def log_access(self, client: str, method: bytes, path: bytes, status: int, size: int, seconds: float) -> None:
        if self.access is None:
            return
        self._tick()
        self.access.info('%s %s "%s %s" %d %d %dms', client, self._stamp, method.decode("latin-1") or "-",
                         path.decode("latin-1") or "-", status, size, int(seconds * 1000))

    # -- everything else: the Flask app -------------------------------------------
    def _call_wsgi(self, peer: tuple[str, int], req: _Request) -> tuple[str, list[tuple[str, str]], bytes]:
        environ = self._environ(peer, req)
        captured: dict[str, Any] = {}

        def start_response(status: str, headers: list[tuple[str, str]], exc_info: Any = None) -> Any:
            captured["status"], captured["headers"] = status, headers
            return lambda chunk: captured.setdefault("written", []).append(chunk)

        result = self.app(environ, start_response)
        try:
            body = b"".join([*captured.pop("written", []), *result])
        finally:
            close = getattr(result, "close", None)
            if callable(close):
                close()
        return captured["status"], captured["headers"], body

    def _environ(self, peer: tuple[str, int], req: _Request) -> dict[str, Any]:
        environ: dict[str, Any] = {
            "REQUEST_METHOD": req.method.decode("latin-1"),
            "SCRIPT_NAME": "",
            "PATH_INFO": unquote_to_bytes(req.path).decode("latin-1"),
            "QUERY_STRING": req.query.decode("latin-1"),
            "SERVER_NAME": self.server_name,
            "SERVER_PORT": self.server_port,
            "SERVER_PROTOCOL": f"HTTP/{req.version}",
            "REMOTE_ADDR": peer[0],
            "REMOTE_PORT": str(peer[1]),
            "wsgi.version": (1, 0),
            "wsgi.url_scheme": "http",
            "wsgi.input": io.BytesIO(req.body),
            "wsgi.input_terminated": True,
            "wsgi.errors": sys.stderr,
            "wsgi.multithread": True,
            "wsgi.multiprocess": True,
            "wsgi.run_once": False,
            "CONTENT_LENGTH": str(len(req.body)),
        }
        for name, value in req.headers:
            key = name.decode("latin-1").upper()
            if "_" in key:  # Foo_Bar would alias Foo-Bar in the environ: dropped, as gunicorn does
                continue
            text = value.decode("latin-1")
            if key == "CONTENT-TYPE":
                environ["CONTENT_TYPE"] = text
            elif key != "CONTENT-LENGTH":
                key = "HTTP_" + key.replace("-", "_")
                environ[key] = f"{environ[key]},{text}" if key in environ else text
        return environ

    def _wsgi_done(self, conn: _Connection, req: _Request, future: Any) -> None:
        self.wsgi_busy -= 1
        try:
            status_line, headers, body = future.result()
            status = int(status_line.split(" ", 1)[0])
        except Exception:
            log.exception("%s %s failed in the app", req.method.decode("latin-1"), req.path.decode("latin-1"))
            self._answer(conn, req, *_error(500, "internal", "internal error; the server log has the details", None))
            return
        if req.method == b"HEAD":
            body = b""
        lines = [f"HTTP/1.1 {status_line}\r\n".encode("latin-1"), self._date_header()]
        has_length = False
        for key, value in headers:
            if key.lower() == "content-length":
                has_length = True
                if req.method == b"HEAD":
                    lines.append(f"{key}: {value}\r\n".encode("latin-1"))
                    continue
            lines.append(f"{key}: {value}\r\n".encode("latin-1"))
        if not has_length:
            lines.append(b"Content-Length: %d\r\n" % len(body))
        if not req.keep_alive:
            lines.append(b"Connection: close\r\n")
        lines.append(b"\r\n")
        conn.finish(req.slot, b"".join(lines) + body, close=not req.keep_alive)
        self.log_access(conn.peer[0], req.method, req.path, status, len(body), time.perf_counter() - req.t0)

    # -- shutdown -----------------------------------------------------------------
    def close(self) -> None:
        if self.pending:
            self.flush()
        self.pool.shutdown(wait=True, cancel_futures=False)


def _direct(engine: Any, x: Any) -> Any:
    return engine.run(x)


def _listen(loop: asyncio.AbstractEventLoop, front: _Front, listener: socket.socket) -> None:
    """Accept ONE connection each time ``listener`` is readable.

    Why not ``loop.create_server``: it accepts up to its backlog of waiting
    connections at once, so the first worker to wake took all 32 of a load
    test's connections and the other core idled (measured: 64-case requests
    at half the rows/s of two balanced workers). One accept per wake-up lets
    every worker that is free take its share.
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
        loop.create_task(loop.connect_accepted_socket(lambda: _Connection(front), sock=conn))

    loop.add_reader(listener.fileno(), accept)


class FrontWorker(base.Worker):
    """gunicorn worker class: one asyncio loop per process, predict answered in batches.

    Settings it reads from gunicorn: ``keepalive`` (idle connection seconds),
    ``worker_connections``, ``limit_request_line``/``_fields``/``_field_size``,
    ``graceful_timeout``, ``accesslog``. ``threads`` is the size of the pool
    that runs the other routes.
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
        front = _Front(self.wsgi, self, loop)
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
        while time.monotonic() < deadline and (front.pending or front.wsgi_busy
                                               or any(not c.idle for c in front.connections)):
            self.notify()
            await asyncio.sleep(0.05)
        front.close()
        for conn in list(front.connections):
            if conn.transport is not None:
                conn.transport.close()
