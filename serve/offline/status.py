"""``demur status``: the live monitoring state of a running server, for people.

Reads the server's ``GET /metrics`` (parsed with prometheus-client's own
parser) and prints what says whether the model is still fit to decide: the
abstention rate against the calibrated one, the input features drifting most
(PSI), score drift (KS) and the review queue. ``--json`` prints the same as
one JSON object, for scripts.

Example::

    $ demur status --url http://127.0.0.1:8600
    demur at http://127.0.0.1:8600: depot-digits 1 (checksum 3fa9c1d2e0b4)
      cases decided      1200  (accept 1068, abstain 132)
      abstention         11.0% of the last 1000 decisions (calibrated 10.0%)
      ...

PSI reading (common practice, a rule of thumb): < 0.1 stable, 0.1-0.25
moderate shift, > 0.25 major shift.
"""

from __future__ import annotations

import argparse
import json
import sys
import urllib.error
import urllib.request
from typing import Any

from prometheus_client.parser import text_string_to_metric_families

__all__ = ["fetch_metrics", "psi_reading", "read_status", "register", "render_status"]

DEFAULT_URL = "http://127.0.0.1:8600"
SMALL_WINDOW = 200
"""Below this many cases in the drift window the figures are noisy (the alert rules wait for it)."""


def register(subparsers: Any) -> None:
    """Add ``demur status`` to the ``demur`` command."""
    p = subparsers.add_parser(
        "status",
        help="print a running server's abstention, drift and review-queue state",
        description="Scrape a running demur server's /metrics and print abstention rate, the most drifting "
                    "input features (PSI), score drift (KS) and the review queue.",
    )
    p.add_argument("--url", default=DEFAULT_URL, help=f"server base URL (default {DEFAULT_URL})")
    p.add_argument("--top", type=int, default=5, help="how many drifting features to list (default 5)")
    p.add_argument("--timeout", type=float, default=5.0, help="seconds to wait for the server (default 5)")
    p.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    p.set_defaults(func=_main)


def _main(args: argparse.Namespace) -> int:
    try:
        text = fetch_metrics(args.url, timeout=args.timeout)
    except (OSError, ValueError) as exc:
        print(f"demur status: cannot read {args.url.rstrip('/')}/metrics: {exc}", file=sys.stderr)
        return 2
    status = read_status(text, top=max(0, args.top))
    if args.json:
        print(json.dumps(status, indent=2, sort_keys=True))
    else:
        print(render_status(status, url=args.url))
    return 0


def fetch_metrics(url: str, timeout: float = 5.0) -> str:
    """The exposition text of ``{url}/metrics``; ``OSError`` when unreachable or not 200."""
    target = url.rstrip("/") + "/metrics"
    try:
        with urllib.request.urlopen(target, timeout=timeout) as r:
            return r.read().decode("utf-8")
    except urllib.error.HTTPError as exc:
        raise OSError(f"HTTP {exc.code} from {target}") from None


def psi_reading(value: float) -> str:
    """Common-practice reading of a PSI value (a rule of thumb, not a test)."""
    if value > 0.25:
        return "major shift"
    if value >= 0.1:
        return "moderate shift"
    return "stable"


def read_status(text: str, top: int = 5) -> dict[str, Any]:
    """The monitoring state in an exposition ``text`` (see serve/adapters/metrics.py for the names).

    Returns {"model", "cases", "abstain_ratio", "abstain_window_cases",
    "calibrated_abstain_ratio", "threshold", "psi_max", "top_features" [{"feature",
    "psi", "reading"}], "score_ks", "score_ks_critical", "drift_window_cases", "review_queue",
    "review_enqueue_failures", "audit"}; missing figures are ``None``. ``audit`` is the served
    model's audit: {"decided", "agree", "certified", "lower_bound", "evidence", "evidence_threshold",
    "abstentions_decided", "abstentions_model_right"} (read from the shared review store).
    """
    out: dict[str, Any] = {
        "model": None, "cases": {}, "abstain_ratio": None, "abstain_window_cases": None,
        "calibrated_abstain_ratio": None, "threshold": None, "psi_max": None, "top_features": [],
        "score_ks": None, "score_ks_critical": None, "drift_window_cases": None, "review_queue": {},
        "review_enqueue_failures": None, "audit": None,
    }
    audit_names = {
        "demur_audit_decided_cases": "decided", "demur_audit_agreements": "agree",
        "demur_certified_accuracy": "certified", "demur_audit_accuracy_lower_bound": "lower_bound",
        "demur_audit_evidence_nats": "evidence", "demur_audit_evidence_threshold_nats": "evidence_threshold",
        "demur_abstentions_decided_cases": "abstentions_decided",
        "demur_abstentions_model_right_cases": "abstentions_model_right",
    }
    audit: dict[str, dict[str, float]] = {}
    psi: dict[str, float] = {}
    scalars = {
        "demur_abstain_ratio": "abstain_ratio",
        "demur_abstain_window_cases": "abstain_window_cases",
        "demur_calibrated_abstain_ratio": "calibrated_abstain_ratio",
        "demur_drift_psi_max": "psi_max",
        "demur_drift_score_ks": "score_ks",
        "demur_drift_score_ks_critical": "score_ks_critical",
        "demur_drift_window_cases": "drift_window_cases",
        "demur_review_enqueue_failures_total": "review_enqueue_failures",
    }
    for fam in text_string_to_metric_families(text):
        for s in fam.samples:
            if s.name in scalars:
                out[scalars[s.name]] = float(s.value)
            elif s.name == "demur_cases_total":
                key = s.labels.get("decision", "")
                out["cases"][key] = out["cases"].get(key, 0) + int(s.value)
            elif s.name == "demur_model_info":
                out["model"] = {k: s.labels.get(k, "") for k in ("name", "version", "checksum")}
            elif s.name == "demur_decision_threshold":
                out["threshold"] = {"score": s.labels.get("score"), "source": s.labels.get("source"),
                                    "value": float(s.value)}
            elif s.name == "demur_drift_feature_psi":
                psi[s.labels.get("feature", "?")] = float(s.value)
            elif s.name == "demur_review_queue_cases":
                out["review_queue"][s.labels.get("status", "?")] = int(s.value)
            elif s.name in audit_names:
                audit.setdefault(s.labels.get("model_checksum", ""), {})[audit_names[s.name]] = float(s.value)
    served = (out["model"] or {}).get("checksum")
    if served in audit:
        out["audit"] = {k: audit[served].get(k) for k in audit_names.values()}
    ranked = sorted(psi.items(), key=lambda kv: (-kv[1], kv[0]))[:top]
    out["top_features"] = [{"feature": f, "psi": v, "reading": psi_reading(v)} for f, v in ranked]
    return out


def _pct(v: float | None) -> str:
    return "n/a" if v is None else f"{100.0 * v:.1f}%"


def _num(v: float | None, fmt: str = "{:.3f}") -> str:
    return "n/a" if v is None else fmt.format(v)


def render_status(status: dict[str, Any], url: str = DEFAULT_URL) -> str:
    """Plain-text rendering of ``read_status``'s result."""
    m = status["model"]
    head = f"demur at {url}: " + (f"{m['name']} {m['version']} (checksum {m['checksum'][:12]})" if m else "no model")
    cases = status["cases"]
    lines = [head]
    n = sum(cases.values())
    lines.append(f"  cases decided      {n}  (accept {cases.get('accept', 0)}, abstain {cases.get('abstain', 0)})")
    window = status["abstain_window_cases"]
    lines.append(f"  abstention         {_pct(status['abstain_ratio'])} of the last "
                 f"{_num(window, '{:.0f}')} decisions (calibrated {_pct(status['calibrated_abstain_ratio'])})")
    th = status["threshold"]
    if th:
        lines.append(f"  decision rule      abstain when {th['score']} > {th['value']:.4g} ({th['source']})")
    lines.append(f"  score drift (KS)   {_num(status['score_ks'])} over {_num(status['drift_window_cases'], '{:.0f}')}"
                 f" recent cases vs calibration-time scores (noise alone: up to {_num(status['score_ks_critical'])})")
    psi_max = status["psi_max"]
    lines.append(f"  input drift (PSI)  max {_num(psi_max)}"
                 + (f" ({psi_reading(psi_max)})" if psi_max is not None else ""))
    for f in status["top_features"]:
        lines.append(f"      {f['feature']:<16} {f['psi']:8.3f}  {f['reading']}")
    window = status["drift_window_cases"]
    if window is not None and window < SMALL_WINDOW:
        lines.append(f"      (only {window:.0f} cases in a window: PSI and KS read high on small windows; "
                     f"the alerts wait for {SMALL_WINDOW})")
    queue = status["review_queue"]
    if queue:
        parts = ", ".join(f"{k} {v}" for k, v in sorted(queue.items()))
        lines.append(f"  review queue       {parts}")
    if status["review_enqueue_failures"]:
        lines.append(f"  enqueue failures   {status['review_enqueue_failures']:.0f} abstained cases spooled, "
                     "not yet in the review store")
    audit = status.get("audit")
    if audit and audit.get("decided"):
        line = (f"  audit              {audit['agree']:.0f} of {audit['decided']:.0f} audited accepted cases "
                "right by the reviewers")
        if audit.get("lower_bound") is not None and audit.get("certified") is not None:
            verdict = ("CONTRADICTS the certificate" if audit["evidence"] >= audit["evidence_threshold"]
                       else "no evidence against the certificate")
            line += (f"; accuracy >= {audit['lower_bound']:.3f} (exact bound), certified {audit['certified']:.3f}: "
                     f"{verdict}")
        lines.append(line)
        if audit.get("abstentions_decided"):
            lines.append(f"  referred cases     the model would have been right on {audit['abstentions_model_right']:.0f}"
                         f" of {audit['abstentions_decided']:.0f} decided abstentions")
    lines.append("  PSI reading (common practice, a rule of thumb): < 0.1 stable, 0.1-0.25 moderate, > 0.25 major.")
    lines.append("  demur supports, never replaces, qualified human judgement: abstained cases go to a person.")
    return "\n".join(lines)
