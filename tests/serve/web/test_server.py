"""serve/web/server.py: ``demur serve`` as a real gunicorn server on 127.0.0.1 (bounded waits).

References: the response schemas in serve/web/openapi.json (jsonschema Draft 2020-12, the
dialect of OpenAPI 3.1); RFC 9110 for the statuses; gunicorn's documented signal
handling (SIGTERM: graceful shutdown) for the stop.
"""

from __future__ import annotations

import json
import os
import re
import signal
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from jsonschema import Draft202012Validator

from demur.serve.web.app import OPENAPI_PATH
from demur.serve.cli import build_parser
from demur.serve.web.server import ACCESS_LOG_FORMAT, gunicorn_options

ROOT = Path(__file__).resolve().parents[3]
DOC = json.loads(OPENAPI_PATH.read_text())
READY_WAIT_S = 90.0
STOP_WAIT_S = 30.0


def _validator(name: str) -> Draft202012Validator:
    return Draft202012Validator({"components": DOC["components"], "$ref": f"#/components/schemas/{name}"})


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _call(url: str, body: Any = None, *, raw: bytes | None = None,
          ctype: str = "application/json") -> tuple[int, Any, Any]:
    data = raw if raw is not None else (json.dumps(body).encode() if body is not None else None)
    req = urllib.request.Request(url, data=data, method="POST" if data is not None else "GET")
    if data is not None:
        req.add_header("Content-Type", ctype)
    try:
        with urllib.request.urlopen(req, timeout=15) as r:
            return r.status, r.headers, json.loads(r.read())
    except urllib.error.HTTPError as e:
        return e.code, e.headers, json.loads(e.read())


class Server:
    def __init__(self, proc: subprocess.Popen[bytes], url: str, log: Path) -> None:
        self.proc, self.url, self.log = proc, url, log

    def stop(self) -> int:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=STOP_WAIT_S)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(timeout=10)
        return int(self.proc.returncode)


def _all_workers_ready(text: str) -> bool:
    """Every worker the start line announced has printed its ready line (a worker stopped
    while still loading its sessions would muddy the shutdown checks)."""
    match = re.search(r"with (\d+) worker\(s\)", text)
    return match is not None and text.count(" ready at ") >= int(match.group(1))


def _start(bundle_path: Path, tmp_path: Path, *extra: str, env: dict[str, str] | None = None) -> Server:
    port = _free_port()
    log = tmp_path / "server.log"
    cmd = [sys.executable, "-m", "demur.serve.cli", "serve", str(bundle_path), "--host", "127.0.0.1",
           "--port", str(port), "--data-dir", str(tmp_path / "data"), *extra]
    with open(log, "wb") as out:
        proc = subprocess.Popen(cmd, cwd=ROOT, stdout=out, stderr=subprocess.STDOUT,
                                env={**os.environ, **(env or {})})
    server = Server(proc, f"http://127.0.0.1:{port}", log)
    deadline = time.monotonic() + READY_WAIT_S
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise AssertionError(f"demur serve exited with {proc.returncode}:\n{log.read_text()}")
        try:
            if _call(server.url + "/readyz")[0] == 200 and _all_workers_ready(log.read_text()):
                return server
        except (urllib.error.URLError, ConnectionError, OSError):
            pass
        time.sleep(0.25)
    server.stop()
    raise AssertionError(f"demur serve was not ready within {READY_WAIT_S} s:\n{log.read_text()}")


@pytest.fixture()
def server(tiny_bundle_factory: Any, tmp_path: Path) -> Iterator[Server]:
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    srv = _start(bundle.path, tmp_path, "--workers", "2", "--threads", "2", env={"DEMUR_MAX_CASES": "16"})
    try:
        yield srv
    finally:
        srv.stop()


def _rows(n: int, seed: int = 0) -> list[list[float]]:
    return np.random.default_rng(seed).uniform(0, 16, size=(n, 64)).round(2).tolist()


def test_cli_flags_reach_the_config() -> None:
    args = build_parser().parse_args(["serve", "b", "--port", "9001", "--threads", "3", "--workers", "2",
                                      "--threshold", "0.2", "--score", "predictive_entropy", "--graph", "stacked",
                                      "--review-store", "sqlite:///x.db", "--single"])
    assert (args.port, args.threads, args.workers, args.threshold, args.single) == (9001, 3, 2, 0.2, True)


def test_gunicorn_options() -> None:
    from demur.serve.config import ServeConfig

    opts = gunicorn_options(ServeConfig(bundle="b", port=8601, workers=3, threads=4))
    assert opts["bind"] == "127.0.0.1:8601" and opts["workers"] == 3 and opts["threads"] == 4
    assert opts["worker_class"] == "demur.serve.web.loop.worker.FrontWorker" and opts["preload_app"] is False  # app after fork
    assert gunicorn_options(ServeConfig(bundle="b"))["workers"] == (os.cpu_count() or 1)  # 0: one per core
    assert gunicorn_options(ServeConfig(bundle="b"))["forwarded_allow_ips"] == ""  # no header rewriting
    assert "%(U)s" in ACCESS_LOG_FORMAT and "%(q)s" not in ACCESS_LOG_FORMAT and "%(r)s" not in ACCESS_LOG_FORMAT


def test_real_server_end_to_end(server: Server) -> None:
    url = server.url
    status, headers, body = _call(url + "/v1/predict", {"cases": _rows(5), "case_ids": list("abcde")})
    assert status == 200
    _validator("PredictResponse").validate(body)
    assert headers["Demur-Model-Version"] == f"{body['model']['name']}/{body['model']['version']}"
    for r in body["results"]:
        assert r["decision"] == ("abstain" if r["score"]["value"] > r["threshold"] else "accept")
    for path, schema in (("/v1/model", "ModelDescription"), ("/healthz", "Alive"), ("/readyz", "Ready")):
        status, _, payload = _call(url + path)
        assert status == 200
        _validator(schema).validate(payload)
    status, _, doc = _call(url + "/openapi.json")
    assert status == 200 and doc["openapi"].startswith("3.1")

    # batch of N equals N single calls (stacked draws: the same S weight sets in every worker)
    rows = _rows(4, seed=7)
    batch = _call(url + "/v1/predict", {"cases": rows})[2]["results"]
    for row, together in zip(rows, batch):
        alone = _call(url + "/v1/predict", {"cases": [row]})[2]["results"][0]
        np.testing.assert_allclose(alone["mean"], together["mean"], atol=1e-6)
        assert alone["uncertainty"]["mutual_information"] == pytest.approx(
            together["uncertainty"]["mutual_information"], abs=1e-6)

    # errors: JSON, naming the field; the environment's DEMUR_MAX_CASES=16 is in force
    checks = [
        (_call(url + "/v1/predict", {"cases": [[0] * 63]}), 400, "cases[0]"),
        (_call(url + "/v1/predict", raw=b"cases", ctype="text/plain"), 415, "Content-Type"),
        (_call(url + "/v1/predict", raw=b"{\"cases\": [[NaN]]}"), 400, "cases[0]"),
        (_call(url + "/v1/predict", {"cases": [[0] * 64] * 17}), 413, "cases"),
        (_call(url + "/v1/nothing"), 404, "path"),
    ]
    for (status, _, payload), want_status, field in checks:
        assert status == want_status, payload
        _validator("ErrorResponse").validate(payload)
        assert payload["error"]["field"] == field

    _call(url + "/healthz?token=do-not-log-me")
    code = server.stop()
    assert code == 0
    log = server.log.read_text()
    assert f"at {url}" in log and "ready" in log
    assert "/healthz" in log and "do-not-log-me" not in log
    assert "SIGABRT" not in log and "terminate called" not in log  # workers exit cleanly
