"""Start a helper process for a test, wait until it says it is ready, always stop it.

Shared by the tests that run real servers (demur, Prometheus) on 127.0.0.1."""

from __future__ import annotations

import contextlib
import os
import signal
import subprocess
import time
from collections.abc import Callable, Iterator, Mapping
from pathlib import Path


@contextlib.contextmanager
def supervised(cmd: list[str], *, log: Path, ready: Callable[[], bool], what: str, timeout_s: float,
               env: Mapping[str, str] | None = None, cwd: str | Path | None = None,
               poll_s: float = 0.2, stop_timeout_s: float = 30.0) -> Iterator[subprocess.Popen[bytes]]:
    """Run ``cmd`` with output to ``log``; yield once ``ready()`` is true (bounded by ``timeout_s``).

    On exit: SIGTERM, then SIGKILL to the whole process group after ``stop_timeout_s``.
    A process that dies or is not ready in time fails the test with the log's tail.
    """
    with open(log, "wb") as out:
        proc = subprocess.Popen(cmd, stdout=out, stderr=subprocess.STDOUT, env=None if env is None else dict(env),
                                cwd=None if cwd is None else str(cwd), start_new_session=True)
    try:
        deadline = time.monotonic() + timeout_s
        while True:
            if proc.poll() is not None:
                raise AssertionError(f"{what} exited with {proc.returncode}:\n{log.read_text()[-3000:]}")
            try:
                if ready():
                    break
            except OSError:
                pass
            if time.monotonic() > deadline:
                raise AssertionError(f"{what} not ready in {timeout_s}s:\n{log.read_text()[-3000:]}")
            time.sleep(poll_s)
        yield proc
    finally:
        if proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
            try:
                proc.wait(timeout=stop_timeout_s)
            except subprocess.TimeoutExpired:
                os.killpg(proc.pid, signal.SIGKILL)
                proc.wait(timeout=10)
