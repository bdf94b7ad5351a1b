"""One client connection of the loop front: HTTP/1.1 framing (RFC 9112) with httptools,
answers written in request order.

What it guarantees, per connection:

* pipelined requests are answered in the order they arrived (``Slot`` queue);
* ``Expect: 100-continue`` is honoured only for HTTP/1.1 (RFC 9110, 10.1.1: ignored for
  1.0) and the interim answer is written in order, after every earlier final answer;
* an ``Upgrade`` request is answered once, as if the header were absent (RFC 9110, 7.8:
  a server may ignore it); the bytes after it are parsed as the next request;
* limits (request target, header count and size, body size) are refused with a JSON
  414/431/413 naming the field, malformed HTTP with a 400, and the connection closed;
* a 413 is answered while the client may still be sending its body: closing then would
  make the kernel answer the rest with a reset, and many clients report ECONNRESET
  instead of the answer. So after a 413 the connection half-closes (the answer, then
  FIN) and reads and discards what the client still sends, at most ``DRAIN_BYTES`` or
  ``DRAIN_S`` seconds, then closes (common practice: an HTTP server's "lingering close";
  RFC 9112, 9.6, asks a server to close in stages so the client can read the answer);
* HTTP/1.0 keep-alive is kept only when asked for, and then said so in the answer.

The connection hands complete requests to its ``Front`` (serve/web/loop/worker.py), which
answers them through ``finish``.
"""

from __future__ import annotations

import asyncio
import time
from collections import deque
from typing import TYPE_CHECKING, Any

import httptools

from demur.serve.errors import PayloadTooLarge, Refused
from demur.serve.web.predict_http import refusal

if TYPE_CHECKING:  # pragma: no cover
    from demur.serve.web.loop.worker import Front

__all__ = ["DRAIN_BYTES", "DRAIN_S", "MAX_PIPELINED", "Connection", "Request", "Slot", "error_answer",
           "header_value"]

MAX_PIPELINED = 32  # requests one connection may have in flight before we stop reading it
DRAIN_BYTES = 64 * 1024 * 1024
"""Most bytes read and discarded after a 413 before the connection is closed anyway."""
DRAIN_S = 5.0
"""Longest a connection lingers after a 413, reading and discarding."""
_CONTINUE = b"HTTP/1.1 100 Continue\r\n\r\n"


def error_answer(status: int, code: str, message: str, field: str | None) -> tuple[int, bytes]:
    """Status and body of a framing refusal, built by the one error path (``refusal``)."""
    out, _, body = refusal(Refused(status, code, message, field))
    return out, body


def header_value(headers: list[tuple[bytes, bytes]], name: bytes) -> bytes | None:
    """The first value of header ``name`` (lower-case), or ``None``."""
    for key, value in headers:
        if key.lower() == name:
            return value
    return None


class Slot:
    """One answer's place in its connection's response order."""

    __slots__ = ("data", "close", "linger")

    def __init__(self, data: bytes | None = None) -> None:
        self.data = data
        self.close = False
        self.linger = False  # after writing: half-close and discard what still arrives (a 413)


class Request:
    """One complete request, as parsed."""

    __slots__ = ("method", "path", "query", "headers", "body", "keep_alive", "version", "t0", "slot", "client")

    def __init__(self, method: bytes, url: bytes, headers: list[tuple[bytes, bytes]], body: bytes,
                 keep_alive: bool, version: str, t0: float, slot: Slot, client: str) -> None:
        self.method = method
        self.path, _, self.query = url.partition(b"?")
        self.headers = headers
        self.body = body
        self.keep_alive = keep_alive
        self.version = version
        self.t0 = t0
        self.slot = slot
        self.client = client

    def header(self, name: bytes) -> bytes | None:
        return header_value(self.headers, name)

    def header_text(self, name: str) -> str | None:
        """Header by lower-case name as text (latin-1, as HTTP defines field bytes)."""
        value = header_value(self.headers, name.encode("latin-1"))
        return None if value is None else value.decode("latin-1")


class Connection(asyncio.Protocol):
    """Parse with httptools, hand complete requests to the front, write answers in order."""

    def __init__(self, front: Front) -> None:
        self.front = front
        self.parser = httptools.HttpRequestParser(self)
        self.transport: asyncio.Transport | None = None
        self.peer = ("", 0)
        self.slots: deque[Slot] = deque()
        self.paused = False
        self.last_active = time.monotonic()
        self.draining = -1  # >= 0 while lingering after a 413: bytes discarded so far
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
            self.transport = None

    def connection_lost(self, exc: Exception | None) -> None:
        self.front.connections.discard(self)
        self.transport = None

    def data_received(self, data: bytes) -> None:
        self.last_active = time.monotonic()
        if self.draining >= 0:  # after a 413: the rest of the body, read and discarded
            self.draining += len(data)
            if self.draining > DRAIN_BYTES:
                self.close()
            return
        while data and self.transport is not None:
            data = self._feed(data)

    def _feed(self, data: bytes) -> bytes:
        """Feed ``data``; return what is left to parse after an ignored upgrade."""
        try:
            self.parser.feed_data(data)
        except httptools.HttpParserUpgrade as exc:
            if self.in_message:  # an upgrade request with a body we will not read
                self._fail(400, "protocol upgrades are not supported", "Upgrade")
                return b""
            # The request was complete and dispatched: answer it as plain HTTP and
            # parse what follows as the next request.
            self.parser = httptools.HttpRequestParser(self)
            offset = exc.args[0] if exc.args and isinstance(exc.args[0], int) else len(data)
            return data[offset:]
        except httptools.HttpParserError as exc:
            if self.refused is not None:  # answer the refusal we decided on, then close
                self._refuse_now()
            else:
                self._fail(400, f"malformed HTTP request: {exc}", "request")
        return b""

    # -- httptools callbacks ----------------------------------------------------
    def on_message_begin(self) -> None:
        self._reset()
        self.in_message = True
        self.t0 = time.perf_counter()
        self.began = time.monotonic()

    def on_url(self, url: bytes) -> None:
        self.url += url
        if len(self.url) > self.front.limit_line:
            self.refused = error_answer(414, "uri_too_long", f"the request target is longer than "
                                        f"{self.front.limit_line} bytes", "path")
            raise httptools.HttpParserError("uri too long")  # stops the parser; answered in _feed

    def on_header(self, name: bytes, value: bytes) -> None:
        self.headers.append((name, value))
        if len(self.headers) > self.front.limit_fields or len(name) + len(value) > self.front.limit_field_size:
            self.refused = error_answer(431, "header_fields_too_large",
                                        f"at most {self.front.limit_fields} header fields of at most "
                                        f"{self.front.limit_field_size} bytes each", "headers")
            raise httptools.HttpParserError("headers too large")

    def on_headers_complete(self) -> None:
        declared = header_value(self.headers, b"content-length")
        limit = self.front.max_body
        if declared is not None and declared.isdigit() and int(declared) > limit:
            self.refused = error_answer(413, PayloadTooLarge.code,
                                        f"body is {int(declared)} bytes; the limit is {limit}", "body")
            raise httptools.HttpParserError("body too large")  # the body is never read
        expect = header_value(self.headers, b"expect")
        if (expect is not None and expect.lower() == b"100-continue"
                and self.parser.get_http_version() == "1.1"):
            self.slots.append(Slot(_CONTINUE))  # written after every earlier answer, in order
            self._write_ready()

    def on_body(self, body: bytes) -> None:
        self.size += len(body)
        if self.size > self.front.max_body:
            self.refused = error_answer(413, PayloadTooLarge.code,
                                        f"body is larger than the limit of {self.front.max_body} bytes", "body")
            raise httptools.HttpParserError("body too large")
        self.body.append(body)

    def on_message_complete(self) -> None:
        slot = Slot()
        self.slots.append(slot)
        headers = self.headers
        request = Request(self.parser.get_method(), self.url, headers, b"".join(self.body),
                          self.parser.should_keep_alive(), self.parser.get_http_version(), self.t0, slot,
                          self.front.client_of(self.peer[0], headers))
        self.in_message = False
        if len(self.slots) >= MAX_PIPELINED and self.transport is not None and not self.paused:
            self.transport.pause_reading()
            self.paused = True
        self.front.dispatch(self, request)

    # -- answering --------------------------------------------------------------
    def finish(self, slot: Slot, data: bytes, close: bool = False) -> None:
        """Fill ``slot`` and write every answer that is now next in order."""
        slot.data, slot.close = data, close
        self._write_ready()

    def _write_ready(self) -> None:
        transport = self.transport
        while self.slots and self.slots[0].data is not None:
            done = self.slots.popleft()
            if transport is None:
                continue
            transport.write(done.data)  # type: ignore[arg-type]
            if done.close and done.linger and transport.can_write_eof():
                self._linger(transport)
                transport = None  # nothing more is written on this connection
                self.slots.clear()
            elif done.close:
                transport.close()
                self.transport = transport = None
        self.last_active = time.monotonic()
        if self.paused and transport is not None and len(self.slots) < MAX_PIPELINED // 2:
            transport.resume_reading()
            self.paused = False

    def _linger(self, transport: asyncio.Transport) -> None:
        """Half-close after the answer (FIN once it is written) and keep reading, discarding."""
        transport.write_eof()
        self.draining = 0
        if self.paused:
            transport.resume_reading()
            self.paused = False
        asyncio.get_running_loop().call_later(DRAIN_S, self.close)

    def eof_received(self) -> bool | None:
        return None  # the client is done: close (asyncio closes the transport)

    def _refuse_now(self) -> None:
        status, body = self.refused  # type: ignore[misc]
        slot = Slot()
        slot.linger = status == 413
        self.slots.append(slot)
        client = self.front.client_of(self.peer[0], self.headers)
        self.front.count_refusal(self.url.partition(b"?")[0], status, self.t0, len(body), client)
        self.finish(slot, self.front.response(status, body, keep_alive=False), close=True)

    def _fail(self, status: int, message: str, field: str) -> None:
        self.refused = error_answer(status, "bad_request", message, field)
        self._refuse_now()

    @property
    def idle(self) -> bool:
        return not self.slots and not self.in_message and self.draining < 0

    def close(self) -> Any:
        if self.transport is not None:
            self.transport.close()
