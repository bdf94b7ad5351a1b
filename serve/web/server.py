"""``demur serve BUNDLE``: the app behind gunicorn, the production WSGI server.

Process model: one gunicorn master and ``--workers`` worker processes (default: one per
core) of demur's loop front (serve/web/loop/worker.py), each with ``--threads`` threads for
the routes other than predict. The app is built in each
worker **after the fork** (gunicorn's lazy app loading: ``preload_app`` is
off), so every worker opens its own onnxruntime sessions and draws its own
sampler seed; sessions created in the master would repeat the same draws in
every worker. The master only checks the bundle's seal and checksums and the
decision rule, so a bad bundle or setting stops ``demur serve`` with a clear
message before any worker starts.

Settings: defaults, then ``--config FILE`` (TOML), then ``DEMUR_*``
environment variables, then flags (``demur.serve.config.build_config``).

Signals: SIGTERM stops gracefully (workers finish in-flight requests within
``graceful_timeout``), SIGINT / Ctrl-C stops at once, SIGHUP reloads the
bundle in every worker (serve/web/admin.py) instead of gunicorn's own reload.
The access log goes to stdout with the path only: no query string, no
headers, so a token can never land in it.

Example::

    demur serve build/digits-radial --port 8600 --workers 2 --threads 4
"""

from __future__ import annotations

import argparse
import logging
import os
import sys
from typing import Any

from demur.serve.core.bundle import load_bundle
from demur.serve.config import GRAPH_CHOICES, ServeConfig, build_config, worker_count
from demur.serve.core.decision import rule_from

__all__ = ["ACCESS_LOG_FORMAT", "app_from_environment", "build_app", "gunicorn_options", "register", "serve"]

ACCESS_LOG_FORMAT = '%(h)s %(t)s "%(m)s %(U)s" %(s)s %(B)s %(M)sms'
"""gunicorn access-log format: client, time, method, path (no query string), status, bytes, ms."""

GRACEFUL_TIMEOUT_S = 20

log = logging.getLogger("demur.server")


def register(subparsers: Any) -> None:
    """Add ``demur serve`` to the ``demur`` command."""
    p = subparsers.add_parser(
        "serve",
        help="serve a bundle over HTTP",
        description="Serve a bundle over HTTP: predictions with uncertainty and an accept/abstain decision. "
                    "Settings: --config FILE, then DEMUR_* environment variables, then these flags.",
    )
    p.add_argument("bundle", help="bundle directory (manifest.json, manifest.sha256, *.onnx)")
    p.add_argument("--host", help="address to listen on (default 127.0.0.1)")
    p.add_argument("--port", type=int, help="port (default 8600)")
    p.add_argument("--workers", type=int, help="worker processes (default 0: one per core)")
    p.add_argument("--threads", type=int, help="threads per worker for the routes other than predict (default 4)")
    p.add_argument("--trusted-proxies", help="comma-separated proxy addresses whose X-Forwarded-For is believed")
    p.add_argument("--single", action="store_true", help="one worker process (same as --workers 1)")
    p.add_argument("--score", help="decision score, overriding the bundle's (needs --threshold)")
    p.add_argument("--threshold", type=float, help="abstain when the score is above this")
    p.add_argument("--interval-level", type=float, help="interval level in (0, 1), default the bundle's")
    p.add_argument("--graph", choices=GRAPH_CHOICES, help="graph kind to run")
    p.add_argument("--ort-threads", type=int, dest="ort_intra_threads", help="onnxruntime threads per session")
    p.add_argument("--blas-threads", type=int, help="numpy BLAS threads per worker (default 1: the workers fill the "
                                                     "cores already)")
    p.add_argument("--max-cases", type=int, help="most cases per request (default 1024)")
    p.add_argument("--max-body-bytes", type=int, help="largest request body (default 8 MiB)")
    p.add_argument("--seed", type=int, help="fix the sampler's random stream (tests only)")
    p.add_argument("--config", dest="config_file", help="TOML file of settings")
    p.add_argument("--data-dir", help="directory for the review queue, spool and state")
    p.add_argument("--review-store", help="sqlite:///PATH or postgresql://... (default SQLite in --data-dir)")
    p.add_argument("--review-order", choices=("oldest", "most_uncertain"),
                   help="what people are handed first: oldest (default) or most_uncertain (audits, then the "
                        "abstentions with the most mutual information)")
    p.set_defaults(func=_main)


_FLAG_FIELDS = ("host", "port", "workers", "threads", "trusted_proxies", "score", "threshold", "interval_level", "graph",
                "ort_intra_threads", "blas_threads", "max_cases", "max_body_bytes", "seed", "data_dir", "review_store", "review_order")


def _main(args: argparse.Namespace) -> int:
    flags: dict[str, Any] = {name: getattr(args, name, None) for name in _FLAG_FIELDS}
    flags["bundle"] = args.bundle
    if args.single:
        flags["workers"] = 1
    config = build_config(args.config_file, os.environ, flags)
    return serve(config)


def _precheck(config: ServeConfig) -> Any:
    """Seal, checksums and decision rule, in the master, without opening a session."""
    bundle = load_bundle(config.bundle)
    rule_from(bundle.manifest, config)
    return bundle


def gunicorn_options(config: ServeConfig) -> dict[str, Any]:
    """gunicorn settings from the config (see deploy/ for the sizing notes)."""
    return {
        "bind": f"{config.host}:{config.port}",
        "workers": worker_count(config),
        "threads": config.threads,
        "worker_class": "demur.serve.web.loop.worker.FrontWorker",
        "preload_app": False,
        "timeout": max(30, int(config.request_timeout_s * 3)),
        "graceful_timeout": GRACEFUL_TIMEOUT_S,
        "keepalive": 5,
        "accesslog": "-",
        "errorlog": "-",
        "access_log_format": ACCESS_LOG_FORMAT,
        "loglevel": "info",
        "proc_name": "demur",
        "limit_request_line": 8190,
        # gunicorn's own forwarder-header rewriting is off: the front believes
        # X-Forwarded-For only from ``trusted_proxies`` (serve/web/loop/worker.py).
        "forwarded_allow_ips": "",
    }


def build_app(config: ServeConfig, *, master_pid: int | None = None) -> Any:
    """The production app, built in each worker after the fork.

    ``create_app`` composes the components from the config (review queue,
    metrics, admin routes); here the worker only picks the bundle a restarted
    worker must load after a roll-out and installs the SIGHUP reload.
    """
    from demur.serve.web.app import create_app

    bundle_path = config.bundle
    admin = _optional("demur.serve.web.admin")
    if admin is not None:
        bundle_path = admin.startup_bundle(config, master_pid)
    app = create_app(config.replace(bundle=bundle_path))
    if admin is not None:
        admin.install_reload_signal(app, master_pid)
    return app


def app_from_environment() -> Any:
    """WSGI factory for running gunicorn directly (``deploy/gunicorn.conf.py``):
    settings from ``$DEMUR_CONFIG`` (TOML, optional) and ``DEMUR_*``; the same
    composition as ``demur serve``. Called in the worker after the fork."""
    config = build_config(os.environ.get("DEMUR_CONFIG") or None, os.environ)
    return build_app(config, master_pid=os.getppid())


def _optional(name: str) -> Any:
    import importlib

    try:
        return importlib.import_module(name)
    except ImportError as exc:
        if exc.name != name:
            raise
        return None


def serve(config: ServeConfig) -> int:
    """Run gunicorn in the foreground until SIGTERM / SIGINT; return the exit status."""
    from gunicorn.app.base import BaseApplication

    bundle = _precheck(config)
    manifest = bundle.manifest
    url = f"http://{config.host}:{config.port}"
    config = config.replace(workers=worker_count(config))
    options = gunicorn_options(config)
    metrics_dir = config.metrics_multiprocess_dir
    if config.workers > 1 and not metrics_dir:  # workers must share metrics (serve/adapters/metrics.py)
        import tempfile

        metrics_dir = tempfile.mkdtemp(prefix="demur-metrics-")
        config = config.replace(metrics_multiprocess_dir=metrics_dir)

    def on_starting(server: Any) -> None:
        if metrics_dir:
            metrics_mod = _optional("demur.serve.adapters.metrics")
            if metrics_mod is not None:
                metrics_mod.clear_multiprocess_dir(metrics_dir)
                metrics_mod.enable_multiprocess(metrics_dir)

    def when_ready(server: Any) -> None:
        admin = _optional("demur.serve.web.admin")
        if admin is not None:
            admin.forward_reload_signal(server)
        print(f"demur: serving {manifest.model_name} {manifest.model_version} ({bundle.checksum[:12]}) "
              f"at {url} with {config.workers} worker(s) (one per core unless --workers is given; "
              f"{os.cpu_count()} cores seen) x {config.threads} thread(s); "
              f"workers load the model now, {url}/readyz says when each is ready", flush=True)

    def post_worker_init(worker: Any) -> None:
        print(f"demur: worker {worker.pid} ready at {url}", flush=True)

    def child_exit(server: Any, worker: Any) -> None:
        if metrics_dir:
            metrics_mod = _optional("demur.serve.adapters.metrics")
            if metrics_mod is not None:
                metrics_mod.worker_exit(worker.pid, metrics_dir)

    hooks = {"on_starting": on_starting, "when_ready": when_ready,
             "post_worker_init": post_worker_init, "child_exit": child_exit}

    class _Server(BaseApplication):  # type: ignore[misc]
        def load_config(self) -> None:
            for key, value in {**options, **hooks}.items():
                self.cfg.set(key, value)
            if "control_socket_disable" in self.cfg.settings:
                # gunicorn >= 27 opens ~/.gunicorn/gunicorn.ctl by default: shared by every
                # server of the user on the host, and unwritable on a read-only root.
                self.cfg.set("control_socket_disable", True)

        def load(self) -> Any:
            # Runs in the worker after the fork (preload_app is off).
            return build_app(config, master_pid=os.getppid())

    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(name)s %(levelname)s %(message)s",
                        stream=sys.stderr)
    try:
        _Server().run()
    except SystemExit as exc:
        return int(exc.code or 0)
    return 0
