"""gunicorn settings for running demur's app with gunicorn directly:

    DEMUR_BUNDLE=/bundles/current gunicorn -c deploy/gunicorn.conf.py

``demur serve`` needs no file: it builds the same settings from the same
``ServeConfig`` (``demur.serve.web.server.gunicorn_options``), so both ways of starting
the server agree. Settings come from ``$DEMUR_CONFIG`` (a TOML file of
ServeConfig fields, optional) and ``DEMUR_*`` environment variables.

Sizing for a 2-core host (deploy/README.md, "Sizing"): 2 worker processes of
demur's loop worker (``demur.serve.web.loop.worker.FrontWorker``: predict answered in
batches on an event loop), one onnxruntime thread per session; 4 threads per worker
run the other routes (review API, metrics, admin). One process per core
keeps both cores busy: the same defaults as ``demur serve`` (workers 0 = one per core).

Timeouts: a worker silent for ``timeout`` seconds is killed and replaced
(3x the per-request timeout, at least 30 s); SIGTERM lets in-flight
requests finish for ``graceful_timeout`` seconds. The access log holds the
method and path only: no query string and no headers, so a bearer token
never reaches it.
"""

from __future__ import annotations

import os

from demur.serve.config import build_config
from demur.serve.web.server import gunicorn_options

_env = dict(os.environ)
_config = build_config(_env.get("DEMUR_CONFIG") or None, _env)
_options = gunicorn_options(_config)

wsgi_app = "demur.serve.web.server:app_from_environment()"
bind = [_options["bind"]]
workers = _options["workers"]
threads = _options["threads"]
worker_class = _options["worker_class"]
preload_app = False  # each worker opens its own onnxruntime sessions and sampler seed
timeout = _options["timeout"]
graceful_timeout = _options["graceful_timeout"]
keepalive = _options["keepalive"]
accesslog = _options["accesslog"]
errorlog = _options["errorlog"]
access_log_format = _options["access_log_format"]
loglevel = _options["loglevel"]
proc_name = _options["proc_name"]
limit_request_line = _options["limit_request_line"]
limit_request_fields = 64
limit_request_field_size = 8190
forwarded_allow_ips = _options["forwarded_allow_ips"]
# Environment for the workers: the sizing chosen above, so app_from_environment agrees.
raw_env = [f"DEMUR_WORKERS={workers}", f"DEMUR_THREADS={threads}"]


def on_starting(server: object) -> None:
    """Fresh Prometheus multiprocess directory before any worker writes to it."""
    if _config.metrics_multiprocess_dir:
        from demur.serve.adapters import metrics

        metrics.clear_multiprocess_dir(_config.metrics_multiprocess_dir)
        metrics.enable_multiprocess(_config.metrics_multiprocess_dir)


def when_ready(server: object) -> None:
    """SIGHUP to the master reloads the bundle inside every worker (serve/web/admin.py),
    instead of gunicorn's reload, which would stop the server on a bad bundle."""
    from demur.serve.web.admin import forward_reload_signal

    forward_reload_signal(server)


def child_exit(server: object, worker: object) -> None:
    if _config.metrics_multiprocess_dir:
        from demur.serve.adapters import metrics

        metrics.worker_exit(worker.pid, _config.metrics_multiprocess_dir)  # type: ignore[attr-defined]


# gunicorn >= 27 opens a control socket under ~/.gunicorn by default: shared by
# every server of the user on the host and unwritable on a read-only root.
control_socket_disable = True
