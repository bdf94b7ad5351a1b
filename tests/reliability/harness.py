"""Tools for the reliability suite: a real ``demur serve`` on 127.0.0.1, a
keep-alive load generator, a cuttable TCP proxy, and the figures table.

Everything is bounded: a fixed number of requests, a timeout on every
request, a deadline on every wait. Traffic goes to 127.0.0.1 only.

Figures: each test calls ``record(...)``; the records are kept in memory for
the pytest summary (tests/reliability/conftest.py) and appended as JSON lines
to ``$DEMUR_RELIABILITY_REPORT`` when set (``run_suite.py`` sets it).
"""

from __future__ import annotations

import http.client
import json
import os
import selectors
import signal
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import numpy as np
import orjson
import requests

__all__ = [
    "RECORDS",
    "LoadResult",
    "Server",
    "TcpProxy",
    "digit_body",
    "free_port",
    "format_table",
    "record",
    "run_load",
    "worker_pids",
]

ROOT = Path(__file__).resolve().parents[2]
DEMUR = Path(sys.executable).with_name("demur")
RECORDS: list[dict[str, Any]] = []
REQUEST_TIMEOUT_S = 15.0


def free_port() -> int:
    """A port free on 127.0.0.1 right now (the OS picks it)."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def record(name: str, *, requests: int = 0, errors: int = 0, p50_ms: float | None = None,
           p99_ms: float | None = None, faults: int = 0, lost: int | None = None, note: str = "") -> dict[str, Any]:
    """Keep one row of the summary table (and append it to $DEMUR_RELIABILITY_REPORT)."""
    row = {"name": name, "requests": requests, "errors": errors, "p50_ms": p50_ms, "p99_ms": p99_ms,
           "faults": faults, "lost": lost, "note": note}
    RECORDS.append(row)
    target = os.environ.get("DEMUR_RELIABILITY_REPORT")
    if target:
        with open(target, "a", encoding="utf-8") as f:
            f.write(json.dumps(row) + "\n")
    return row


def format_table(rows: list[dict[str, Any]]) -> str:
    """The summary: one line per check, totals at the bottom."""
    def ms(v: float | None) -> str:
        return "-" if v is None else f"{v:.1f}"

    head = f"{'check':<34} {'requests':>9} {'errors':>7} {'p50 ms':>8} {'p99 ms':>8} {'faults':>7} {'lost':>5}  note"
    lines = [head, "-" * len(head)]
    for r in rows:
        lost = "-" if r.get("lost") is None else str(r["lost"])
        lines.append(f"{r['name']:<34} {r['requests']:>9} {r['errors']:>7} {ms(r.get('p50_ms')):>8} "
                     f"{ms(r.get('p99_ms')):>8} {r['faults']:>7} {lost:>5}  {r.get('note', '')}")
    lines.append("-" * len(head))
    total_lost = sum(r["lost"] or 0 for r in rows)
    lines.append(f"{'total':<34} {sum(r['requests'] for r in rows):>9} {sum(r['errors'] for r in rows):>7} "
                 f"{'':>8} {'':>8} {sum(r['faults'] for r in rows):>7} {total_lost:>5}")
    return "\n".join(lines)


# -- the server ---------------------------------------------------------------------------------
@dataclass
class Server:
    """``demur serve`` in a subprocess on 127.0.0.1; ``stop()`` (or the context manager) ends it.

    ``env`` adds DEMUR_* settings; ``args`` adds flags. stdout/stderr go to
    ``log_path`` so a test can read the access log afterwards.
    """

    bundle: Path
    log_path: Path
    workers: int = 2
    threads: int = 4
    env: dict[str, str] = field(default_factory=dict)
    args: list[str] = field(default_factory=list)
    port: int = 0
    proc: subprocess.Popen[bytes] | None = None
    executable: Path = DEMUR
    """The ``demur`` to run (tests/test_wheel.py: one installed from the wheel)."""
    cwd: Path = ROOT

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def start(self, ready_timeout_s: float = 60.0) -> Server:
        self.port = self.port or free_port()
        env = {k: v for k, v in os.environ.items() if not k.startswith("DEMUR_")}
        env.update(self.env)
        env["PYTHONUNBUFFERED"] = "1"
        cmd = [str(self.executable), "serve", str(self.bundle), "--host", "127.0.0.1", "--port", str(self.port),
               "--workers", str(self.workers), "--threads", str(self.threads), *self.args]
        self._log = open(self.log_path, "ab")
        self.proc = subprocess.Popen(cmd, stdout=self._log, stderr=subprocess.STDOUT, env=env, cwd=self.cwd,
                                     start_new_session=True)
        self.wait_ready(ready_timeout_s)
        return self

    def wait_ready(self, timeout_s: float = 60.0, *, times: int = 6) -> None:
        """Until /readyz answers 200 ``times`` in a row (each worker gets asked)."""
        deadline = time.monotonic() + timeout_s
        ok = 0
        while time.monotonic() < deadline:
            assert self.proc is not None
            if self.proc.poll() is not None:
                raise RuntimeError(f"demur serve exited with {self.proc.returncode}:\n{self.log()[-3000:]}")
            try:
                r = requests.get(self.url + "/readyz", timeout=2)
                ok = ok + 1 if r.status_code == 200 else 0
            except requests.RequestException:
                ok = 0
            if ok >= times:
                return
            time.sleep(0.1)
        raise TimeoutError(f"demur serve not ready within {timeout_s} s:\n{self.log()[-3000:]}")

    def log(self) -> str:
        try:
            return self.log_path.read_text(errors="replace")
        except OSError:
            return ""

    def stop(self, timeout_s: float = 30.0) -> int | None:
        """SIGTERM (graceful), then SIGKILL after ``timeout_s``; returns the exit status."""
        proc = self.proc
        if proc is None:
            return None
        if proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
            try:
                proc.wait(timeout_s)
            except subprocess.TimeoutExpired:
                os.killpg(proc.pid, signal.SIGKILL)
                proc.wait(10)
        try:  # any worker left behind in the session
            os.killpg(proc.pid, signal.SIGKILL)
        except (ProcessLookupError, PermissionError):
            pass
        self._log.close()
        return proc.returncode

    def __enter__(self) -> Server:
        return self.start()

    def __exit__(self, *exc: Any) -> None:
        self.stop()


def worker_pids(master_pid: int) -> list[int]:
    """The gunicorn workers: children of the master process (Linux /proc)."""
    out: list[int] = []
    for task in Path(f"/proc/{master_pid}/task").glob("*"):
        try:
            out += [int(p) for p in (task / "children").read_text().split()]
        except OSError:
            continue
    return sorted(set(out))


# -- load ---------------------------------------------------------------------------------------
@dataclass
class LoadResult:
    """What the clients saw. ``latencies_s`` of answered requests; ``statuses`` counted;
    ``retried``: requests whose first attempt failed on the connection and were sent again;
    ``failed``: requests with no good answer after the retry (the errors)."""

    sent: int = 0
    latencies_s: list[float] = field(default_factory=list)
    statuses: dict[int, int] = field(default_factory=dict)
    retried: int = 0
    failed: int = 0
    versions: dict[str, int] = field(default_factory=dict)
    bodies: list[dict[str, Any]] = field(default_factory=list)
    seconds: float = 0.0
    problems: list[str] = field(default_factory=list)

    @property
    def errors(self) -> int:
        return self.failed + sum(n for s, n in self.statuses.items() if s != 200)

    def percentile_ms(self, q: float) -> float | None:
        if not self.latencies_s:
            return None
        return float(np.percentile(np.asarray(self.latencies_s), q) * 1000.0)


def run_load(url: str, n_requests: int, clients: int, *, make_body: Callable[[int], dict[str, Any]],
             retry: bool = False, keep_bodies: bool = False, headers: dict[str, str] | None = None,
             on_progress: Callable[[int], None] | None = None) -> LoadResult:
    """``n_requests`` POSTs to ``url`` from ``clients`` threads, each holding its own
    keep-alive connection (``http.client``: the lightest client in the standard
    library, so the clients take as little of the shared CPU as possible).
    ``retry``: a connection failure (the server side went away mid-request) is
    retried once on a fresh connection and counted in ``retried``; an HTTP
    error status is never retried. ``on_progress(i)`` is called from the client
    threads after each request."""
    parts = urlsplit(url)
    host, port, path = parts.hostname or "127.0.0.1", parts.port or 80, parts.path or "/"
    assert host == "127.0.0.1", "the reliability suite talks to 127.0.0.1 only"
    result = LoadResult()
    lock = threading.Lock()
    counter = iter(range(n_requests))
    hdrs = {"Content-Type": "application/json", **(headers or {})}

    def next_index() -> int | None:
        with lock:
            return next(counter, None)

    def client() -> None:
        conn = http.client.HTTPConnection(host, port, timeout=REQUEST_TIMEOUT_S)
        try:
            while True:
                i = next_index()
                if i is None:
                    return
                data = orjson.dumps(make_body(i))
                t0 = time.perf_counter()
                status, body, attempt_failed = None, None, False
                for attempt in range(2 if retry else 1):
                    try:
                        conn.request("POST", path, body=data, headers=hdrs)
                        resp = conn.getresponse()
                        raw = resp.read()
                        status = resp.status
                        ctype = resp.getheader("Content-Type", "")
                        body = orjson.loads(raw) if ctype.startswith("application/json") else raw[:200]
                        if resp.will_close:
                            conn.close()
                        break
                    except (OSError, http.client.HTTPException) as exc:
                        attempt_failed = True
                        conn.close()
                        conn = http.client.HTTPConnection(host, port, timeout=REQUEST_TIMEOUT_S)
                        if attempt == (1 if retry else 0):
                            with lock:
                                result.problems.append(f"request {i}: {type(exc).__name__}: {exc}")
                dt = time.perf_counter() - t0
                with lock:
                    result.sent += 1
                    if attempt_failed and status is not None:
                        result.retried += 1
                    if status is None:
                        result.failed += 1
                        continue
                    result.statuses[status] = result.statuses.get(status, 0) + 1
                    if status == 200 and isinstance(body, dict):
                        result.latencies_s.append(dt)
                        model = body.get("model") or {}
                        v = str(model.get("version"))
                        result.versions[v] = result.versions.get(v, 0) + 1
                        if keep_bodies:
                            result.bodies.append(body)
                    elif len(result.problems) < 20:
                        result.problems.append(f"request {i}: HTTP {status} {str(body)[:200]}")
                if on_progress is not None:
                    on_progress(i)
        finally:
            conn.close()

    t0 = time.perf_counter()
    with ThreadPoolExecutor(max_workers=clients) as pool:
        futures = [pool.submit(client) for _ in range(clients)]
        for f in futures:
            f.result(timeout=REQUEST_TIMEOUT_S * n_requests)
    result.seconds = time.perf_counter() - t0
    return result


def digit_body(i: int) -> dict[str, Any]:
    """One 8x8 digit-like case (values 0..16, as in sklearn's digits) with a unique case id."""
    rng = np.random.default_rng(i)
    return {"cases": [rng.integers(0, 17, size=64).tolist()], "case_ids": [f"rel-{i}"]}


# -- a TCP proxy that can be cut ------------------------------------------------------------------
class TcpProxy:
    """127.0.0.1:port -> upstream. ``cut()`` closes every connection and refuses
    new ones (accepted then closed at once); ``restore()`` lets them through again.
    One thread with a selector; ``close()`` ends it."""

    def __init__(self, upstream: tuple[str, int]) -> None:
        self.upstream = upstream
        self._listener = socket.socket()
        self._listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        self._listener.bind(("127.0.0.1", 0))
        self._listener.listen(64)
        self._listener.setblocking(False)
        self.port = int(self._listener.getsockname()[1])
        self._sel = selectors.DefaultSelector()
        self._sel.register(self._listener, selectors.EVENT_READ, None)
        self._pairs: dict[socket.socket, socket.socket] = {}
        self._lock = threading.Lock()
        self._cut = False
        self._stop = False
        self.cuts = 0
        self._thread = threading.Thread(target=self._loop, name="tcp-proxy", daemon=True)
        self._thread.start()

    def _drop(self, s: socket.socket) -> None:
        peer = self._pairs.pop(s, None)
        for sock in (s, peer):
            if sock is None:
                continue
            self._pairs.pop(sock, None)
            try:
                self._sel.unregister(sock)
            except (KeyError, ValueError):
                pass
            try:
                sock.close()
            except OSError:
                pass

    def _loop(self) -> None:
        while not self._stop:
            for key, _ in self._sel.select(timeout=0.1):
                with self._lock:
                    if key.fileobj is self._listener:
                        try:
                            client, _ = self._listener.accept()
                        except OSError:
                            continue
                        if self._cut:
                            client.close()
                            continue
                        try:
                            upstream = socket.create_connection(self.upstream, timeout=3)
                        except OSError:
                            client.close()
                            continue
                        for s in (client, upstream):
                            s.setblocking(False)
                        self._pairs[client], self._pairs[upstream] = upstream, client
                        self._sel.register(client, selectors.EVENT_READ, None)
                        self._sel.register(upstream, selectors.EVENT_READ, None)
                        continue
                    sock = key.fileobj
                    assert isinstance(sock, socket.socket)
                    peer = self._pairs.get(sock)
                    if peer is None:
                        continue
                    try:
                        data = sock.recv(65536)
                        if not data:
                            raise ConnectionResetError
                        peer.setblocking(True)
                        peer.settimeout(5)
                        peer.sendall(data)
                        peer.setblocking(False)
                    except OSError:
                        self._drop(sock)
        with self._lock:
            for s in list(self._pairs):
                self._drop(s)

    def cut(self) -> None:
        with self._lock:
            self._cut = True
            self.cuts += 1
            for s in list(self._pairs):
                self._drop(s)

    def restore(self) -> None:
        with self._lock:
            self._cut = False

    def close(self) -> None:
        self._stop = True
        self._thread.join(5)
        self._sel.close()
        self._listener.close()

    @contextmanager
    def running(self) -> Iterator[TcpProxy]:
        try:
            yield self
        finally:
            self.close()
