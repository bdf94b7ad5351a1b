"""Model roll-out without downtime: operator routes and the SIGHUP reload.

A roll-out loads a candidate bundle *beside* the one serving, and swaps only
when the candidate has passed every check:

1. the path is confined to the bundles directory (``ServeConfig.bundles_dir``,
   default: the directory holding the configured bundle); symlinks are
   resolved first, so a link pointing outside is refused;
2. ``load_bundle`` verifies the seal and every graph's SHA-256 (never pickle:
   a bundle is JSON + ONNX);
3. the engine opens its sessions and runs a smoke prediction (the manifest's
   centre values as one case) through summary and decision; the draws must
   have shape [S, 1, K] and be finite (``Runtime.prepare`` in serve/web/app.py);
4. the engine holder's ``Live`` record is replaced in one assignment. A request
   that already took the old engine finishes on it; the next one takes the new.

A bad candidate raises a named ``BundleError`` (422; ``SmokeFailed`` when it
loads but cannot predict) or ``InvalidInput`` (400)
and the serving engine is untouched.

Two roll-outs at once: exactly one wins, the other gets ``Conflict`` (409). Within a
process a lock says so; across the workers of one server, an exclusive ``flock`` on
``<data_dir>/rollout.<master pid>.lock``, taken without waiting before the candidate
is loaded and held until every worker serves the new bundle (each worker confirms
by writing the record's generation to ``active-bundle.<master pid>.ack.<worker pid>``;
the winner waits at most ``CONFIRM_WAIT_S``). So the record (below) is only ever
written by the roll-out that holds the lock, every worker converges on it, and a
roll-out is answered only once it is done everywhere (``"workers": "all serving"``;
``"signalled"`` if a worker did not confirm in time). A second roll-out that starts
after the first was answered is not concurrent: it runs, and wins in turn.

Routes (admin scope, ``demur.serve.web.auth``)::

    GET  /v1/admin/model     the bundle serving in this process and its path
    POST /v1/admin/model     {"bundle": "<dir under bundles_dir>"} -> roll out

Several worker processes (gunicorn): the worker that took the POST swaps
first, then records the new path in ``<data_dir>/active-bundle.<master pid>``
and sends SIGHUP to the master, which forwards it to every worker
(``forward_reload_signal``); each worker reloads from that record, so all
converge on the same bundle, and a worker restarted later starts from it
too (``startup_bundle``). ``kill -HUP <master>`` with no record reloads the
configured bundle path in every worker (e.g. after the ``current`` link on
the bundle volume was pointed at a new directory).
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import fcntl
import logging
import os
import signal
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from collections.abc import Iterator
from typing import Any

from demur.serve.core.bundle import load_bundle
from demur.serve.config import ServeConfig
from demur.serve.errors import BundleError, Conflict, DemurError, InvalidInput, NotFound, SmokeFailed

__all__ = [
    "ADMIN_EXTENSION",
    "ADMIN_PREFIX",
    "AdminState",
    "Rollout",
    "bundle_root",
    "confine",
    "forward_reload_signal",
    "install_admin",
    "install_reload_signal",
    "prepare_live",
    "roll_out",
    "startup_bundle",
]

ADMIN_PREFIX = "/v1/admin"
ADMIN_EXTENSION = "demur.admin"
"""Key under ``app.extensions`` where the app's ``AdminState`` lives."""

_log = logging.getLogger("demur.admin")

CONFIRM_WAIT_S = 30.0
"""Longest a roll-out waits (holding the roll-out lock) for every worker to serve it."""


@dataclass
class AdminState:
    """Per-process roll-out state: the path serving now, a lock, and the
    gunicorn master's pid when running under it (``None`` otherwise)."""

    config: ServeConfig
    bundle_path: str
    master_pid: int | None = None
    lock: threading.Lock = field(default_factory=threading.Lock)
    rollouts: int = 0
    refused: int = 0
    all_serving: bool = False
    loaded_at: str = field(default_factory=lambda: _now())

    @property
    def record_path(self) -> Path | None:
        """The shared record of the active bundle, one per gunicorn master."""
        if self.master_pid is None:
            return None
        return Path(self.config.data_dir) / f"active-bundle.{self.master_pid}"

    @property
    def lock_path(self) -> Path | None:
        """The roll-out lock shared by the workers of one master (``None`` alone)."""
        if self.master_pid is None:
            return None
        return Path(self.config.data_dir) / f"rollout.{self.master_pid}.lock"


@dataclass(frozen=True)
class Rollout:
    """What a roll-out did: the bundle serving before and after, and how long checks took (s)."""

    previous: dict[str, Any]
    current: dict[str, Any]
    path: str
    changed: bool
    check_s: float


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def bundle_root(config: ServeConfig) -> Path:
    """The directory roll-outs may load from: ``bundles_dir``, else the configured bundle's parent."""
    if config.bundles_dir:
        return Path(config.bundles_dir).resolve()
    if config.bundle:
        return Path(config.bundle).resolve().parent
    raise InvalidInput("no bundles directory is configured (set bundles_dir); roll-outs are disabled",
                       field="bundle")


def confine(config: ServeConfig, requested: Any) -> Path:
    """Resolve a requested bundle path and refuse anything outside ``bundle_root``.

    Relative paths are taken inside the root. Raises ``InvalidInput`` naming
    ``bundle`` for a non-string, an empty string or a path that escapes.
    """
    if not isinstance(requested, str) or not requested.strip():
        raise InvalidInput(f"'bundle' must be a non-empty string naming a bundle directory; "
                           f"got {type(requested).__name__}", field="bundle")
    if "\x00" in requested or len(requested) > 4096:
        raise InvalidInput("'bundle' must be a plain path of at most 4096 characters", field="bundle")
    root = bundle_root(config)
    given = Path(requested)
    path = (given if given.is_absolute() else root / given).resolve()
    if path == root or not path.is_relative_to(root):
        raise InvalidInput(f"'bundle' must be a directory inside the bundles directory {root}; "
                           f"got {requested!r}", field="bundle")
    return path


def _runtime(app: Any) -> Any:
    from demur.serve.web.app import runtime_of  # app.py imports this module

    return runtime_of(app)


def prepare_live(app: Any, path: str | os.PathLike[str]) -> Any:
    """Load, verify and smoke-test the bundle at ``path``; return the app's ``Live``
    record for it, ready to swap in. Nothing serving is touched.

    Any failure is a named 4xx: ``BundleError`` subclasses as raised by
    ``load_bundle`` (seal, checksums, schema), anything else that goes wrong
    while opening or smoke-testing it as ``SmokeFailed`` (422).
    """
    runtime = _runtime(app)
    engine = runtime.build_engine(str(path))  # load_bundle: seal + every graph digest
    try:
        return runtime.prepare(engine)  # opens sessions, derives the rule, smoke prediction
    except BundleError:
        raise
    except DemurError as exc:
        raise SmokeFailed(f"bundle {path} failed its checks: {exc.message}", field=exc.field or "bundle") from exc
    except Exception as exc:  # onnxruntime or numpy refusing a damaged graph
        raise SmokeFailed(f"bundle {path} failed its smoke prediction: {type(exc).__name__}",
                          field="bundle") from exc


def _serving(app: Any) -> Any:
    """The ``Live`` serving now, or ``None`` before the first model is installed."""
    return _runtime(app).slot.current


def roll_out(app: Any, path: str | os.PathLike[str], *, propagate: bool = True) -> Rollout:
    """Load ``path`` (already confined), check it, swap it in. See the module docstring.

    ``propagate``: under gunicorn, record the path and ask the master to tell
    every worker (the admin route); a reload caused by that signal does not.
    A roll-out already running in this process: ``Conflict``.
    """
    state: AdminState = app.extensions[ADMIN_EXTENSION]
    if not state.lock.acquire(blocking=False):
        raise Conflict("another roll-out is in progress in this process; retry when it finishes", field="bundle")
    try:
        with _workers_lock(state) if propagate else contextlib.nullcontext():
            return _roll_out_locked(app, state, str(Path(path).resolve()), propagate)
    finally:
        state.lock.release()


@contextlib.contextmanager
def _workers_lock(state: AdminState) -> Iterator[None]:
    """The roll-out lock across this server's workers, taken without waiting: ``Conflict``
    while another worker rolls out. Released when the file is closed (also if the worker dies)."""
    path = state.lock_path
    if path is None:
        yield
        return
    path.parent.mkdir(parents=True, exist_ok=True)
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o600)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            raise Conflict("another roll-out is in progress in another worker of this server; retry when it "
                           "finishes (GET /v1/admin/model shows the bundle serving)", field="bundle") from None
        yield
    finally:
        os.close(fd)


def _roll_out_locked(app: Any, state: AdminState, path: str, propagate: bool) -> Rollout:
    started = time.perf_counter()
    old = _serving(app)
    previous = dict(old.model) if old is not None else {}
    try:
        candidate = prepare_live(app, path)
    except DemurError:
        state.refused += 1
        raise
    check_s = time.perf_counter() - started
    current = dict(candidate.model)
    changed = old is None or current["checksum"] != previous.get("checksum") or path != state.bundle_path
    if changed:
        _runtime(app).slot.swap(candidate)
        state.bundle_path = path
        state.rollouts += 1
        state.loaded_at = _now()
    if propagate and state.record_path is not None:
        generation = _record(state, path)
        _confirm(state, generation)
        try:
            os.kill(state.master_pid, signal.SIGHUP)  # type: ignore[arg-type]
        except OSError as exc:  # the master is gone: this worker still serves the new bundle
            _log.warning("could not signal the master (pid %s): %s", state.master_pid, exc)
        state.all_serving = _wait_for_workers(state, generation)
    _log.info("roll-out %s: %s %s -> %s (%s)", "done" if changed else "unchanged",
              current["name"], previous.get("version"), current["version"], current["checksum"][:12])
    return Rollout(previous=previous, current=current, path=path, changed=changed, check_s=check_s)


def _record(state: AdminState, path: str) -> str:
    """Write the record (path, then a fresh generation token); return the token."""
    target = state.record_path
    assert target is not None
    target.parent.mkdir(parents=True, exist_ok=True)
    generation = f"{os.getpid()}-{time.time_ns()}"
    tmp = target.with_name(f".{target.name}.{os.getpid()}")
    tmp.write_text(f"{path}\n{generation}\n", encoding="utf-8")
    os.replace(tmp, target)
    return generation


def _read_record(config: ServeConfig, master_pid: int) -> tuple[str, str] | None:
    """(path, generation) of the master's record, or ``None``."""
    try:
        lines = (Path(config.data_dir) / f"active-bundle.{master_pid}").read_text(encoding="utf-8").splitlines()
    except OSError:
        return None
    if not lines or not lines[0].strip():
        return None
    return lines[0].strip(), (lines[1].strip() if len(lines) > 1 else "")


def _ack_path(state: AdminState, pid: int) -> Path:
    return Path(state.config.data_dir) / f"active-bundle.{state.master_pid}.ack.{pid}"


def _confirm(state: AdminState, generation: str) -> None:
    """This worker serves the record of ``generation``."""
    if state.master_pid is None or not generation:
        return
    target = _ack_path(state, os.getpid())
    try:
        tmp = target.with_name(f".{target.name}")
        tmp.write_text(generation, encoding="utf-8")
        os.replace(tmp, target)
    except OSError as exc:
        _log.warning("could not confirm the roll-out in %s: %s", target, exc)


def _workers_of(master_pid: int) -> list[int]:
    """The master's children (gunicorn's workers), from Linux's /proc; [] elsewhere."""
    out: list[int] = []
    for task in Path(f"/proc/{master_pid}/task").glob("*"):
        try:
            out += [int(p) for p in (task / "children").read_text().split()]
        except (OSError, ValueError):
            continue
    return sorted(set(out))


def _wait_for_workers(state: AdminState, generation: str) -> bool:
    """Until every live worker confirmed ``generation`` (True), or ``CONFIRM_WAIT_S`` (False)."""
    assert state.master_pid is not None
    deadline = time.monotonic() + CONFIRM_WAIT_S
    while True:
        workers = _workers_of(state.master_pid)
        waiting = []
        for pid in workers:
            try:
                if _ack_path(state, pid).read_text(encoding="utf-8") == generation:
                    continue
            except OSError:
                pass
            waiting.append(pid)
        if not waiting:
            return True
        if time.monotonic() >= deadline:
            _log.warning("roll-out: worker(s) %s did not confirm within %.0f s", waiting, CONFIRM_WAIT_S)
            return False
        time.sleep(0.02)


def startup_bundle(config: ServeConfig, master_pid: int | None = None) -> str:
    """The bundle a (re)started worker should load: the roll-out record of its
    master if one exists and is still inside the bundles directory, else the
    configured bundle."""
    if master_pid is None:
        return config.bundle
    record = _read_record(config, master_pid)
    if record is None:
        return config.bundle
    try:
        return str(confine(config, record[0]))
    except DemurError:
        return config.bundle


_SIGNAL_LOCK_WAIT_S = 120.0


def _reload_from_signal(app: Any) -> None:
    """Reload what the record (or the configured path) names; never raises.

    Waits for a roll-out already running in this process, then reads the
    record under the lock, so of several signals in a row the last record
    written wins in every worker."""
    state: AdminState = app.extensions[ADMIN_EXTENSION]
    if not state.lock.acquire(timeout=_SIGNAL_LOCK_WAIT_S):
        _log.error("SIGHUP reload skipped: a roll-out held the lock for %s s", _SIGNAL_LOCK_WAIT_S)
        return
    try:
        record = _read_record(state.config, state.master_pid) if state.master_pid is not None else None
        generation = record[1] if record is not None else ""
        path = str(Path(startup_bundle(state.config, state.master_pid)).resolve())
        live = _serving(app)
        if live is not None and path == state.bundle_path:
            try:
                if load_bundle(path).checksum == live.model["checksum"]:
                    _confirm(state, generation)
                    return  # this worker already serves it (it took the roll-out request)
            except DemurError:
                pass  # the roll-out below names the problem
        result = _roll_out_locked(app, state, path, False)
        _confirm(state, generation)
    except DemurError as exc:
        _log.error("SIGHUP reload of %s refused, the previous bundle keeps serving: %s", path, exc.message)
        return
    except Exception:  # a reload must never take a serving worker down
        _log.exception("SIGHUP reload failed; the previous bundle keeps serving")
        return
    finally:
        state.lock.release()
    _log.info("SIGHUP reload: serving %s %s", result.current["name"], result.current["version"])


def install_reload_signal(app: Any, master_pid: int | None = None) -> None:
    """Reload the bundle on SIGHUP in this process (call in each worker after fork).

    The handler only starts a thread: loading and smoke-testing run beside
    the serving threads, never inside the signal handler.
    """
    state: AdminState = app.extensions[ADMIN_EXTENSION]
    state.master_pid = master_pid

    def handler(signum: int, frame: Any) -> None:
        threading.Thread(target=_reload_from_signal, args=(app,), name="demur-reload", daemon=True).start()

    signal.signal(signal.SIGHUP, handler)


def forward_reload_signal(arbiter: Any) -> None:
    """In the gunicorn master (``when_ready`` hook): SIGHUP is passed to every
    worker instead of gunicorn's own reload, which would replace the workers
    and stop the whole server if the new bundle were bad."""

    def forward(signum: int, frame: Any) -> None:
        for pid in list(getattr(arbiter, "WORKERS", {})):
            try:
                os.kill(pid, signal.SIGHUP)
            except OSError:
                pass

    signal.signal(signal.SIGHUP, forward)


def install_admin(app: Any, config: ServeConfig, *, bundle_path: str | None = None) -> AdminState:
    """Register the admin routes and the roll-out state on a Flask app built by
    ``demur.serve.web.app.create_app`` (whose ``Runtime`` does the loading and swapping).

    Idempotent: a second call on the same app only updates the config and
    the path serving now."""
    from flask import Blueprint, jsonify, request

    from demur.serve.web.auth import require
    from demur.serve.core.validation import parse_json

    existing = app.extensions.get(ADMIN_EXTENSION)
    if existing is not None:  # already installed (create_app does it): refresh the settings only
        existing.config = config
        if bundle_path or config.bundle:
            existing.bundle_path = str(Path(bundle_path or config.bundle).resolve())
        return existing
    state = AdminState(config=config, bundle_path=str(Path(bundle_path or config.bundle).resolve())
                       if (bundle_path or config.bundle) else "")
    app.extensions[ADMIN_EXTENSION] = state
    bp = Blueprint("demur_admin", __name__)

    @bp.get(f"{ADMIN_PREFIX}/model")
    @require("admin")
    def admin_model() -> Any:
        live = _serving(app)
        try:
            root = str(bundle_root(state.config))
        except DemurError:
            root = None
        return jsonify({
            "model": dict(live.model) if live is not None else None,
            "bundle_path": state.bundle_path,
            "bundles_dir": root,
            "loaded_at": state.loaded_at,
            "rollouts": state.rollouts,
            "refused": state.refused,
            "pid": os.getpid(),
        })

    @bp.post(f"{ADMIN_PREFIX}/model")
    @require("admin")
    def admin_roll_out() -> Any:
        if not request.is_json:
            from demur.serve.errors import UnsupportedMediaType

            raise UnsupportedMediaType(
                f"body must be application/json; got '{request.mimetype or 'none'}'", field="Content-Type")
        body = parse_json(request.get_data(cache=False))
        if not isinstance(body, dict):
            raise InvalidInput(f"body must be a JSON object like {{\"bundle\": \"...\"}}; got {type(body).__name__}",
                               field="body")
        unknown = sorted(set(body) - {"bundle"})
        if unknown:
            raise InvalidInput(f"unknown key '{unknown[0]}'; the body takes only 'bundle'", field=unknown[0])
        path = confine(state.config, body.get("bundle"))
        try:
            found = path.is_dir()
        except OSError:  # a name the file system cannot hold (too long, ...): no such bundle either
            found = False
        if not found:
            raise NotFound(f"no bundle directory '{str(body.get('bundle'))[:200]}' in the bundles directory "
                           f"{bundle_root(state.config)}", field="bundle")
        result = roll_out(app, path)
        return jsonify({
            "model": result.current,
            "previous": result.previous,
            "bundle_path": result.path,
            "changed": result.changed,
            "checks_s": round(result.check_s, 4),
            "workers": ("this process" if state.master_pid is None
                        else "all serving" if state.all_serving else "signalled"),
        })

    app.register_blueprint(bp)
    return state
