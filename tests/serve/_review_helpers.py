"""Helpers shared by the review tests: the PostgreSQL test database, a per-test schema,
a stoppable TCP proxy (to cut and restore the database), a fake clock, and a
``demur serve`` process on 127.0.0.1."""

from __future__ import annotations

import contextlib
import os
import selectors
import signal
import socket
import subprocess
import sys
import threading
import time
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest

from types import SimpleNamespace
from typing import Any

import numpy as np

from demur.serve.core.decision import Verdicts
from demur.serve.core.pipeline import Answered
from demur.serve.core.summary import summarise
from demur.serve.core.validation import PredictRequest
from demur.serve.review.store import NewItem, new_item

PG_URL = os.environ.get("DEMUR_TEST_POSTGRES", "postgresql://postgres@127.0.0.1:5432/test")
"""The real PostgreSQL the store tests run against (CI starts it; trust auth)."""

MODEL = {"name": "postcode-digits", "version": "1", "checksum": "c" * 64}
DEMUR = Path(sys.executable).with_name("demur")


def pg_unreachable_reason() -> str | None:
    """``None`` when the test PostgreSQL answers, else why not."""
    try:
        import psycopg

        with psycopg.connect(PG_URL, connect_timeout=3) as conn:
            conn.execute("SELECT 1")
    except Exception as exc:  # any failure: report it loudly in the skip reason
        return f"{type(exc).__name__}: {str(exc).strip().splitlines()[0] if str(exc).strip() else ''}"
    return None


def require_postgres() -> None:
    reason = pg_unreachable_reason()
    if reason is not None:
        pytest.skip(f"!!! PostgreSQL at {PG_URL} is NOT reachable ({reason}); the PostgreSQL review-store "
                    "tests did NOT run. CI must provide it (.ci/run starts it).")


@contextlib.contextmanager
def pg_schema(prefix: str = "demur_t") -> Iterator[str]:
    """A fresh schema name, dropped (with its tables) afterwards."""
    import psycopg

    name = f"{prefix}_{uuid.uuid4().hex[:12]}"
    try:
        yield name
    finally:
        with psycopg.connect(PG_URL, autocommit=True, connect_timeout=5) as conn:
            conn.execute(f'DROP SCHEMA IF EXISTS "{name}" CASCADE')


def with_schema(url: str, schema: str) -> str:
    return f"{url}{'&' if '?' in url else '?'}schema={schema}"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class Clock:
    """A settable clock for leases: no sleeping in tests."""

    def __init__(self, t: float = 1_800_000_000.0) -> None:
        self.t = t

    def __call__(self) -> float:
        return self.t

    def advance(self, seconds: float) -> None:
        self.t += seconds


def item(kind: str = "abstain", *, client_case_id: str | None = None, prediction: str | None = "7",
         checksum: str | None = None, now: float | None = None, values: list[float] | None = None,
         interval: tuple[float, float] | None = None, task: str = "classification") -> NewItem:
    model = dict(MODEL, checksum=checksum or MODEL["checksum"])
    labels = [str(d) for d in range(10)]
    return new_item(
        kind=kind, model=model,
        case={"values": values if values is not None else [0.0] * 64, "shape": [64], "kind": "image",
              "grid": [8, 8], "low": [0.0], "high": [16.0]},
        summary={"task": task, "labels": labels if task == "classification" else None,
                 "mean": [0.1] * 10, "uncertainty": {"mutual_information": 0.4, "unit": "nats"},
                 "score": {"name": "mutual_information", "value": 0.4}, "threshold": 0.2},
        prediction=prediction, interval=interval, client_case_id=client_case_id, now=now,
    )


def results(decisions: list[str], case_ids: list[str | None] | None = None) -> list[dict[str, Any]]:
    """Rendered per-case results as the pipeline gives them (classification, 10 labels)."""
    ids = case_ids or [None] * len(decisions)
    return [{"case_id": cid, "decision": d, "prediction": "7", "mean": [0.1] * 10,
             "interval": {"level": 0.9, "lower": [0.0] * 10, "upper": [0.2] * 10},
             "uncertainty": {"mutual_information": 0.3, "predictive_entropy": 2.0, "expected_entropy": 1.7,
                             "unit": "nats"},
             "score": {"name": "mutual_information", "value": 0.3}, "threshold": 0.2, "reason": "r"}
            for d, cid in zip(decisions, ids)]


def answered(decisions: list[str], x: Any = None, case_ids: list[str | None] | None = None, *,
             model: dict[str, str] | None = None, caller: str | None = None) -> Answered:
    """An ``Answered`` for the review router: a digits-like model (8x8 image, labels 0-9),
    the given accept/abstain decisions, inputs ``x`` float32[B, 64] (zeros by default)."""
    n = len(decisions)
    ids = list(case_ids) if case_ids is not None else [None] * n
    arr = np.zeros((n, 64), dtype=np.float32) if x is None else np.asarray(x, dtype=np.float32)
    inputs = SimpleNamespace(kind="image", shape=(64,), names=tuple(f"px{i}" for i in range(64)),
                             low=(0.0,) * 64, high=(16.0,) * 64)
    manifest = SimpleNamespace(task="classification", labels=tuple(str(d) for d in range(10)), inputs=inputs)
    live = SimpleNamespace(model=dict(model or MODEL), manifest=manifest)
    abstain = np.asarray([d == "abstain" for d in decisions], dtype=bool)
    dec = Verdicts(score=np.full(n, 0.3), abstain=abstain, reason=["r"] * n)
    logits = np.zeros((4, n, 10), dtype=np.float32)
    logits[..., 7] = 3.0  # every case predicts "7", as ``results`` renders it
    summary = summarise("classification", logits, 0.9, {})
    return Answered(live=live, request=PredictRequest(x=arr, case_ids=ids), summary=summary,  # type: ignore[arg-type]
                    decisions=dec, results=results(decisions, ids), caller=caller)


class SwitchStore:
    """A real store behind a switch: while ``down`` every call fails as if unreachable;
    ``calls`` counts enqueues."""

    def __init__(self, inner: Any) -> None:
        self.inner = inner
        self.down = False
        self.calls = 0
        self.lease_s = inner.lease_s

    def enqueue(self, items: Any) -> list[str | None]:
        return [None if e is None else e.id for e in self.enqueue_items(items)]

    def enqueue_items(self, items: Any) -> list[Any]:
        from demur.serve.errors import ReviewStoreUnavailable

        self.calls += 1
        if self.down:
            raise ReviewStoreUnavailable("connection refused (test)")
        return self.inner.enqueue_items(items)

    def __getattr__(self, name: str) -> Any:
        from demur.serve.errors import ReviewStoreUnavailable

        if self.down:
            raise ReviewStoreUnavailable("connection refused (test)")
        return getattr(self.inner, name)


class TcpProxy:
    """Forwards 127.0.0.1:port to a target; ``stop`` refuses new connections and cuts open ones,
    ``start`` accepts again on the same port. Stands in for a database that goes away."""

    def __init__(self, target: tuple[str, int], port: int | None = None) -> None:
        self.target = target
        self.port = port or free_port()
        self._listener: socket.socket | None = None
        self._threads: list[threading.Thread] = []
        self._conns: list[socket.socket] = []
        self._lock = threading.Lock()
        self._running = threading.Event()

    def start(self) -> None:
        listener = socket.socket()
        listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        listener.bind(("127.0.0.1", self.port))
        listener.listen(64)
        listener.settimeout(0.2)
        self._listener = listener
        self._running.set()
        t = threading.Thread(target=self._accept, daemon=True)
        t.start()
        self._threads.append(t)

    def _accept(self) -> None:
        listener = self._listener
        while self._running.is_set() and listener is not None:
            try:
                client, _ = listener.accept()
            except (TimeoutError, socket.timeout):
                continue
            except OSError:
                return
            try:
                upstream = socket.create_connection(self.target, timeout=3)
            except OSError:
                client.close()
                continue
            with self._lock:
                self._conns += [client, upstream]
            t = threading.Thread(target=self._pipe, args=(client, upstream), daemon=True)
            t.start()

    def _pipe(self, a: socket.socket, b: socket.socket) -> None:
        sel = selectors.DefaultSelector()
        sel.register(a, selectors.EVENT_READ, b)
        sel.register(b, selectors.EVENT_READ, a)
        try:
            while self._running.is_set():
                for key, _ in sel.select(timeout=0.2):
                    data = key.fileobj.recv(65536)  # type: ignore[union-attr]
                    if not data:
                        return
                    key.data.sendall(data)
        except OSError:
            return
        finally:
            sel.close()
            for s in (a, b):
                with contextlib.suppress(OSError):
                    s.close()

    def stop(self) -> None:
        self._running.clear()
        if self._listener is not None:
            self._listener.close()
            self._listener = None
        with self._lock:
            conns, self._conns = self._conns, []
        for s in conns:
            with contextlib.suppress(OSError):
                s.shutdown(socket.SHUT_RDWR)
            with contextlib.suppress(OSError):
                s.close()
        for t in self._threads:
            t.join(timeout=2)
        self._threads = []


class Server:
    """``demur serve`` on 127.0.0.1 in its own process group; always stopped by ``stop``."""

    def __init__(self, bundle: Path, *, data_dir: Path, review_store: str, env: dict[str, str] | None = None,
                 extra: list[str] | None = None, log: Path | None = None) -> None:
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        args = [str(DEMUR), "serve", str(bundle), "--host", "127.0.0.1", "--port", str(self.port),
                "--data-dir", str(data_dir), "--review-store", review_store, *(extra or [])]
        full_env = {**os.environ, **(env or {})}
        self._log = open(log or (data_dir / f"server-{self.port}.log"), "wb")
        self.proc = subprocess.Popen(args, env=full_env, stdout=self._log, stderr=subprocess.STDOUT,
                                     start_new_session=True)

    def wait_ready(self, timeout_s: float = 60.0) -> None:
        import requests

        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(f"demur serve exited with {self.proc.returncode}; see {self._log.name}")
            try:
                if requests.get(f"{self.url}/readyz", timeout=2).status_code == 200:
                    return
            except requests.RequestException:
                pass
            time.sleep(0.2)
        raise RuntimeError(f"demur serve on port {self.port} not ready after {timeout_s} s; see {self._log.name}")

    def kill(self) -> None:
        """SIGKILL the whole process group (master and workers): a crash, not a shutdown."""
        with contextlib.suppress(ProcessLookupError):
            os.killpg(self.proc.pid, signal.SIGKILL)
        self.proc.wait(timeout=10)

    def stop(self) -> None:
        if self.proc.poll() is None:
            with contextlib.suppress(ProcessLookupError):
                os.killpg(self.proc.pid, signal.SIGTERM)
            try:
                self.proc.wait(timeout=25)
            except subprocess.TimeoutExpired:
                self.kill()
        with contextlib.suppress(ProcessLookupError):
            os.killpg(self.proc.pid, signal.SIGKILL)  # stray workers, if any
        self._log.close()


