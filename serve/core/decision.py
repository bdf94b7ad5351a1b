"""The accept/abstain rule: one score, one threshold, abstain iff score > threshold.

Scores (names from ``demur.serve.core.bundle.SCORES``; larger always means "less sure"):

==================== ============== ==================================================
name                 tasks          meaning
==================== ============== ==================================================
mutual_information   both           epistemic part of the uncertainty, nats (default;
                                    for regression the moment-matched bound, see
                                    serve/core/summary.py)
predictive_entropy   both           total uncertainty, nats (regression: differential
                                    entropy bound, target units)
one_minus_max_prob   classification 1 - largest mean class probability
interval_width       regression     width of the served interval, target units
epistemic_std        regression     std of the draw means, target units
==================== ============== ==================================================

The threshold comes from the bundle's decision section (set by ``demur
calibrate``) unless the server configuration overrides it; every decision
carries which score, threshold and source were used and a one-line reason.

Example::

    rule = DecisionRule("mutual_information", 0.15, "calibrated")
    d = decide(summary, rule)
    d.abstain      # bool[B]
    d.reason[0]    # 'mutual_information 0.412 nats > threshold 0.150'
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from demur.serve.core.bundle import SCORES
from demur.serve.errors import ConfigError
from demur.serve.core.summary import Summary

__all__ = ["SCORE_TASKS", "SCORE_UNITS", "DecisionRule", "Decisions", "decide", "rule_from", "score_values"]

SCORE_TASKS: dict[str, tuple[str, ...]] = {
    "mutual_information": ("classification", "regression"),
    "predictive_entropy": ("classification", "regression"),
    "one_minus_max_prob": ("classification",),
    "interval_width": ("regression",),
    "epistemic_std": ("regression",),
}
"""Which tasks each score is defined for."""

SCORE_UNITS: dict[str, str] = {
    "mutual_information": "nats",
    "predictive_entropy": "nats",
    "one_minus_max_prob": "",
    "interval_width": "target units",
    "epistemic_std": "target units",
}


@dataclass(frozen=True)
class DecisionRule:
    """Abstain when ``score`` > ``threshold``. ``source`` says where the pair came
    from: "calibrated" (bundle, written by demur calibrate), "bundle" (the
    exporter's uncalibrated default) or "config" (server configuration)."""

    score: str
    threshold: float
    source: str

    def __post_init__(self) -> None:
        if self.score not in SCORES:
            raise ConfigError(f"score must be one of {', '.join(SCORES)}; got '{self.score}'", field="score")
        if not isinstance(self.threshold, (int, float)) or not math.isfinite(self.threshold):
            raise ConfigError(f"threshold must be a finite number; got {self.threshold!r}", field="threshold")


@dataclass(frozen=True)
class Decisions:
    """One decision per case: the score value, the abstain flag, a readable reason."""

    score: np.ndarray  # float64[B]
    abstain: np.ndarray  # bool[B]
    reason: list[str]


def _check_fits(task: str, name: str) -> None:
    if name not in SCORE_TASKS:
        raise ConfigError(f"score must be one of {', '.join(SCORES)}; got '{name}'", field="score")
    if task not in SCORE_TASKS[name]:
        fits = ", ".join(n for n, tasks in SCORE_TASKS.items() if task in tasks)
        raise ConfigError(f"score '{name}' is not defined for {task}; use one of: {fits}", field="score")


def score_values(summary: Summary, name: str) -> np.ndarray:
    """The named score per case, float64[B]; ``ConfigError`` if it does not fit the task."""
    _check_fits(summary.task, name)
    return np.asarray(getattr(summary, name), dtype=np.float64)


def decide(summary: Summary, rule: DecisionRule) -> Decisions:
    """Apply ``rule`` to every case of ``summary``."""
    score = score_values(summary, rule.score)
    abstain = score > rule.threshold
    unit = SCORE_UNITS[rule.score]
    unit = f" {unit}" if unit else ""
    reason = [
        f"{rule.score} {v:.4g}{unit} {'>' if a else '<='} threshold {rule.threshold:.4g}"
        for v, a in zip(score.tolist(), abstain.tolist())
    ]
    return Decisions(score=score, abstain=abstain, reason=reason)


def rule_from(manifest: Any, config: Any = None) -> DecisionRule:
    """The rule in force: the bundle's decision section, overridden by ``config``.

    ``manifest`` is a ``demur.serve.core.bundle.Manifest``; ``config`` a ``ServeConfig`` (or
    anything with ``score`` and ``threshold``; ``""``/``None`` mean "not set").
    A configured score different from the bundle's needs a configured
    threshold too: the bundle's threshold is on another score's scale.
    """
    dec = manifest.decision
    score = (getattr(config, "score", "") or "") if config is not None else ""
    threshold = getattr(config, "threshold", None) if config is not None else None
    if score and score != dec.score and threshold is None:
        raise ConfigError(
            f"server config sets score '{score}' but no threshold; the bundle's threshold "
            f"{dec.threshold} is for '{dec.score}'. Set a threshold as well",
            field="threshold",
        )
    if score or threshold is not None:
        source = "config"
    else:
        source = "calibrated" if dec.calibration else "bundle"
    rule = DecisionRule(score or dec.score, float(dec.threshold if threshold is None else threshold), source)
    _check_fits(manifest.task, rule.score)
    return rule
