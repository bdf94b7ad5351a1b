"""serve/web/admin.py: roll-outs through the admin route and SIGHUP.

References: RFC 6750 section 3.1 (401 for a missing/invalid bearer token, 403
for insufficient scope); the bundle's own seal and SHA-256 digests
(hashlib.sha256, FIPS 180-4) decide what "corrupt" means. Zero-downtime swap
is checked by construction: a request blocked inside the graph while a
roll-out happens must still be answered, by the model it started with.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path
from typing import Any

import pytest

from demur.serve.web import admin
from demur.serve.web.app import create_app
from demur.serve.core.bundle import load_bundle, write_manifest
from demur.serve.config import ServeConfig

ADMIN = {"Authorization": "Bearer adm-token-1"}
REVIEW = {"Authorization": "Bearer rev-token-1"}
CASE = [[float(v % 17) for v in range(64)]]


def _version(root: Path, version: str) -> Path:
    """Re-seal a bundle copy under another model version (write_manifest recomputes the seal)."""
    raw = json.loads((root / "manifest.json").read_text())
    raw["model"]["version"] = version
    write_manifest(root, raw)
    load_bundle(root)
    return root


@pytest.fixture()
def bundles(tiny_bundle_factory: Any, copy_bundle: Any, tmp_path: Path) -> dict[str, Path]:
    base = tiny_bundle_factory()
    v1 = _version(copy_bundle(base), "1")
    v2 = _version(copy_bundle(base), "2")
    current = tmp_path / "current"
    current.symlink_to(v1, target_is_directory=True)
    return {"v1": v1, "v2": v2, "current": current, "root": tmp_path}


def _app(bundles: dict[str, Path], **extra: Any) -> Any:
    cfg = ServeConfig(bundle=str(bundles["current"]), bundles_dir=str(bundles["root"]),
                      admin_tokens="adm-token-1", review_tokens="rev-token-1",
                      data_dir=str(bundles["root"] / "data"), **extra)
    return create_app(cfg)


def _predict_version(client: Any) -> str:
    r = client.post("/v1/predict", json={"cases": CASE})
    assert r.status_code == 200, r.get_json()
    return r.get_json()["model"]["version"]


def test_admin_routes_need_the_admin_scope(bundles: dict[str, Path]) -> None:
    """RFC 6750 section 3.1: no/unknown token -> 401 with WWW-Authenticate; wrong scope -> 403."""
    client = _app(bundles).test_client()
    body = {"bundle": "bundle-copy-2"}
    for method in (client.get, client.post):
        for headers, status in (({}, 401), ({"Authorization": "Bearer nope"}, 401), (REVIEW, 403)):
            r = method("/v1/admin/model", json=body, headers=headers)
            assert r.status_code == status
            assert r.get_json()["error"]["field"] == "Authorization"
            if status == 401:
                assert r.headers["WWW-Authenticate"].startswith("Bearer")
    assert _predict_version(client) == "1"


def test_roll_out_swaps_and_every_answer_names_its_model(bundles: dict[str, Path]) -> None:
    client = _app(bundles).test_client()
    assert _predict_version(client) == "1"
    r = client.post("/v1/admin/model", json={"bundle": "bundle-copy-2"}, headers=ADMIN)
    assert r.status_code == 200, r.get_json()
    out = r.get_json()
    assert out["previous"]["version"] == "1" and out["model"]["version"] == "2" and out["changed"]
    assert out["model"]["checksum"] == load_bundle(bundles["v2"]).checksum
    p = client.post("/v1/predict", json={"cases": CASE})
    assert p.get_json()["model"]["version"] == "2"
    assert p.headers["Demur-Model-Checksum"] == out["model"]["checksum"]
    info = client.get("/v1/admin/model", headers=ADMIN).get_json()
    assert info["bundle_path"] == str(bundles["v2"].resolve()) and info["rollouts"] == 1


@pytest.mark.parametrize("requested", ["../outside", "/etc", "/", "", "bundle-copy-1/../../x"])
def test_paths_outside_the_bundles_directory_are_refused(bundles: dict[str, Path], requested: str) -> None:
    client = _app(bundles).test_client()
    r = client.post("/v1/admin/model", json={"bundle": requested}, headers=ADMIN)
    assert r.status_code == 400
    assert r.get_json()["error"]["field"] == "bundle"
    assert _predict_version(client) == "1"


def test_a_symlink_pointing_outside_is_refused(bundles: dict[str, Path], tmp_path_factory: Any) -> None:
    outside = tmp_path_factory.mktemp("elsewhere")
    (bundles["root"] / "sneaky").symlink_to(outside, target_is_directory=True)
    r = _app(bundles).test_client().post("/v1/admin/model", json={"bundle": "sneaky"}, headers=ADMIN)
    assert r.status_code == 400 and r.get_json()["error"]["field"] == "bundle"


@pytest.mark.parametrize("body", [{"bundle": 3}, {"bundle": ["x"]}, {"path": "x"}, [], "x"])
def test_malformed_bodies_name_the_field(bundles: dict[str, Path], body: Any) -> None:
    r = _app(bundles).test_client().post("/v1/admin/model", json=body, headers=ADMIN)
    assert r.status_code == 400
    assert r.get_json()["error"]["field"] in ("bundle", "path", "body")


def test_wrong_content_type_is_415(bundles: dict[str, Path]) -> None:
    r = _app(bundles).test_client().post("/v1/admin/model", data="bundle=x", headers=ADMIN,
                                         content_type="application/x-www-form-urlencoded")
    assert r.status_code == 415 and r.get_json()["error"]["field"] == "Content-Type"


def test_corrupt_graph_is_refused_and_the_old_model_serves_on(bundles: dict[str, Path]) -> None:
    """One flipped byte in an ONNX file: its SHA-256 no longer matches the manifest's record."""
    client = _app(bundles).test_client()
    graph = next(bundles["v2"].glob("*.onnx"))
    data = bytearray(graph.read_bytes())
    data[len(data) // 2] ^= 0xFF
    graph.write_bytes(bytes(data))
    r = client.post("/v1/admin/model", json={"bundle": "bundle-copy-2"}, headers=ADMIN)
    assert r.status_code == 422
    assert r.get_json()["error"]["code"] == "checksum_mismatch"
    assert _predict_version(client) == "1"
    assert client.get("/v1/admin/model", headers=ADMIN).get_json()["refused"] == 1


def test_edited_manifest_breaks_the_seal(bundles: dict[str, Path]) -> None:
    client = _app(bundles).test_client()
    manifest = bundles["v2"] / "manifest.json"
    manifest.write_text(manifest.read_text().replace('"version": "2"', '"version": "9"'))
    r = client.post("/v1/admin/model", json={"bundle": "bundle-copy-2"}, headers=ADMIN)
    assert r.status_code == 422 and r.get_json()["error"]["code"] == "checksum_mismatch"
    assert _predict_version(client) == "1"


def test_a_sealed_but_unrunnable_graph_fails_the_smoke_prediction(bundles: dict[str, Path]) -> None:
    """Checksums can be right for a wrong file: the smoke prediction catches it."""
    client = _app(bundles).test_client()
    graph = next(bundles["v2"].glob("*.onnx"))
    graph.write_bytes(b"this is not an onnx graph")
    write_manifest(bundles["v2"], json.loads((bundles["v2"] / "manifest.json").read_text()))
    r = client.post("/v1/admin/model", json={"bundle": "bundle-copy-2"}, headers=ADMIN)
    assert 400 <= r.status_code < 500, r.get_json()
    assert r.get_json()["error"]["code"] in ("smoke_failed", "bad_bundle")
    assert _predict_version(client) == "1"


def test_missing_bundle_is_404_naming_the_field(bundles: dict[str, Path]) -> None:
    """No such directory is a 404 (the API document: a state the client can mend, not a schema
    violation); a name the file system cannot hold is no such directory either, never a 500."""
    client = _app(bundles).test_client()
    for name in ("no-such", "x" * 5000, "\u1e70" * 300):
        r = client.post("/v1/admin/model", json={"bundle": name}, headers=ADMIN)
        assert r.status_code in (404, 400), (name[:20], r.get_json())
        assert r.get_json()["error"]["field"] == "bundle"
    r = client.post("/v1/admin/model", json={"bundle": "no-such"}, headers=ADMIN)
    assert r.status_code == 404 and r.get_json()["error"]["code"] == "not_found"


def test_in_flight_request_finishes_on_the_model_it_started_with(bundles: dict[str, Path]) -> None:
    app = _app(bundles)
    runtime = app.extensions["demur"]
    entered, release = threading.Event(), threading.Event()
    engine = runtime.slot.live.engine
    plain = engine.run_standardised  # the pipeline standardises once, then runs the graph on that

    def slow_once(x: Any) -> Any:
        if x.shape[0] == 3 and not release.is_set():  # only the in-flight request (3 cases) waits
            entered.set()
            assert release.wait(10)
        return plain(x)

    engine.run_standardised = slow_once
    answer: dict[str, Any] = {}

    def in_flight() -> None:
        r = app.test_client().post("/v1/predict", json={"cases": CASE * 3})
        answer["status"], answer["body"] = r.status_code, r.get_json()

    t = threading.Thread(target=in_flight)
    t.start()
    assert entered.wait(10)
    client = app.test_client()
    r = client.post("/v1/admin/model", json={"bundle": "bundle-copy-2"}, headers=ADMIN)
    assert r.status_code == 200, r.get_json()
    assert _predict_version(client) == "2"          # new requests: the new model
    release.set()
    t.join(10)
    assert answer["status"] == 200
    assert answer["body"]["model"]["version"] == "1"  # the in-flight one: the old model


def test_a_second_concurrent_roll_out_is_a_conflict(bundles: dict[str, Path]) -> None:
    app = _app(bundles)
    state = app.extensions[admin.ADMIN_EXTENSION]
    with state.lock:
        r = app.test_client().post("/v1/admin/model", json={"bundle": "bundle-copy-2"}, headers=ADMIN)
    assert r.status_code == 409 and r.get_json()["error"]["code"] == "conflict"


def test_sighup_reloads_the_configured_path(bundles: dict[str, Path]) -> None:
    """The operator re-points the 'current' link and sends SIGHUP; a bad target is refused."""
    app = _app(bundles)
    client = app.test_client()
    previous = signal.getsignal(signal.SIGHUP)
    try:
        admin.install_reload_signal(app)
        bundles["current"].unlink()
        bundles["current"].symlink_to(bundles["v2"], target_is_directory=True)
        os.kill(os.getpid(), signal.SIGHUP)
        deadline = time.monotonic() + 20
        while _predict_version(client) != "2" and time.monotonic() < deadline:
            time.sleep(0.05)
        assert _predict_version(client) == "2"
        # a damaged target: refused, version 2 keeps serving
        bundles["current"].unlink()
        bundles["current"].symlink_to(bundles["root"] / "missing", target_is_directory=True)
        state = app.extensions[admin.ADMIN_EXTENSION]
        before = state.refused
        os.kill(os.getpid(), signal.SIGHUP)
        deadline = time.monotonic() + 20
        while state.refused == before and time.monotonic() < deadline:
            time.sleep(0.05)
        assert state.refused == before + 1
        assert _predict_version(client) == "2"
    finally:
        signal.signal(signal.SIGHUP, previous)


def test_roll_out_under_a_master_records_the_path_and_signals_it(bundles: dict[str, Path]) -> None:
    """Under gunicorn the worker writes active-bundle.<master pid> and sends the master SIGHUP;
    here the 'master' is a child process that records the signal."""
    flag = bundles["root"] / "hup"
    child = _hup_recorder(flag)
    try:
        assert child.stdout is not None and child.stdout.readline().strip() == "ready"
        app = _app(bundles)
        app.extensions[admin.ADMIN_EXTENSION].master_pid = child.pid
        r = app.test_client().post("/v1/admin/model", json={"bundle": "bundle-copy-2"}, headers=ADMIN)
        # the stand-in master has no workers, so none is left to confirm: "all serving"
        assert r.status_code == 200 and r.get_json()["workers"] == "all serving"
        assert child.wait(20) == 0 and flag.read_text() == "hup"
        cfg = app.extensions["demur"].config
        assert admin.startup_bundle(cfg, child.pid) == str(bundles["v2"].resolve())
        assert admin.startup_bundle(cfg, child.pid + 1) == cfg.bundle   # another master's record: ignored
    finally:
        _stop(child)


def test_forward_reload_signal_passes_sighup_to_each_worker(tmp_path: Path) -> None:
    flag = tmp_path / "worker-hup"
    worker = _hup_recorder(flag)
    previous = signal.getsignal(signal.SIGHUP)
    try:
        assert worker.stdout is not None and worker.stdout.readline().strip() == "ready"

        class Arbiter:
            WORKERS = {worker.pid: object()}

        admin.forward_reload_signal(Arbiter())
        signal.getsignal(signal.SIGHUP)(signal.SIGHUP, None)  # what the master does on SIGHUP
        assert worker.wait(20) == 0 and flag.read_text() == "hup"
    finally:
        signal.signal(signal.SIGHUP, previous)
        _stop(worker)


def test_startup_bundle_refuses_a_record_outside_the_directory(tmp_path: Path) -> None:
    cfg = ServeConfig(bundle=str(tmp_path / "b" / "current"), bundles_dir=str(tmp_path / "b"),
                      data_dir=str(tmp_path / "d"))
    (tmp_path / "d").mkdir()
    (tmp_path / "d" / "active-bundle.77").write_text("/etc\n")
    assert admin.startup_bundle(cfg, 77) == cfg.bundle
    assert admin.startup_bundle(cfg, None) == cfg.bundle


def _hup_recorder(flag: Path) -> subprocess.Popen[str]:
    """A child process (ours, stopped by PID) that writes ``flag`` when it gets SIGHUP; it prints
    'ready' once its handler is set and exits after the flag or 20 s."""
    return subprocess.Popen([sys.executable, "-c", (
        "import signal, time, pathlib\n"
        f"p = pathlib.Path({str(flag)!r})\n"
        "signal.signal(signal.SIGHUP, lambda *a: p.write_text('hup'))\n"
        "print('ready', flush=True)\n"
        "t = time.monotonic()\n"
        "while not p.exists() and time.monotonic() - t < 20: time.sleep(0.02)\n")],
        stdout=subprocess.PIPE, text=True)


def _stop(child: subprocess.Popen[str]) -> None:
    if child.poll() is None:
        child.kill()
        child.wait(5)
    if child.stdout is not None:
        child.stdout.close()
