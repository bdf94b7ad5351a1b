"""``GET /metrics`` and the per-request timing, on the Flask app (the metrics themselves:
serve/adapters/metrics.py, which knows no framework).

The loop front counts the predict requests it answers itself (serve/web/loop/worker.py);
every other request passes through Flask and is timed here, through the runtime's one guard
around the metrics hook (``Runtime.monitor``).
"""

from __future__ import annotations

import time
from typing import Any

from flask import Blueprint, Flask, Response, g, request

from demur.serve.adapters.metrics import Metrics
from demur.serve.core.pipeline import Runtime

__all__ = ["install_metrics"]


def install_metrics(app: Flask, metrics: Metrics, runtime: Runtime, review: Any = None) -> None:
    """Time every request of ``app`` and serve ``GET /metrics`` from ``metrics``, bound to
    ``runtime``'s live model and to ``review`` (the review router, or None) for queue depths.
    Called by ``create_app``."""
    metrics.attach(runtime, review=review, routes=lambda: [r.rule for r in app.url_map.iter_rules()])

    @app.before_request
    def _start_timer() -> None:
        g.demur_request_t0 = time.perf_counter()

    @app.after_request
    def _count(response: Any) -> Any:
        t0 = g.get("demur_request_t0")
        rule = request.url_rule
        runtime.monitor.observe_request(rule.rule if rule is not None else "unmatched", request.method,
                                        response.status_code, time.perf_counter() - t0 if t0 else 0.0)
        return response

    bp = Blueprint("demur_metrics", __name__)

    @bp.get("/metrics")
    def metrics_route() -> Any:
        body, ctype = metrics.exposition()
        return Response(body, status=200, content_type=ctype)

    app.register_blueprint(bp)
