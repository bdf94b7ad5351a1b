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
joint_rank           classification the larger of the case's ranks among clean reference
                                    cases by predictive entropy and by mutual
                                    information (serve/core/summary.py); needs the
                                    bundle's target.score_reference
==================== ============== ==================================================

Before a case may be accepted it must also be inside the training data
(``demur.serve.core.support``): a case outside abstains whatever its score,
with its own reason (``outside_training_data: ...``), and
``Verdicts.outside`` marks it (the metrics count it under its own label).
Bundles without a support record are decided on the score alone.

The threshold comes from the bundle's decision section (set by ``demur
calibrate``) unless the server configuration overrides it; every decision
carries which score, threshold and source were used and a one-line reason.

One rule object decides everywhere: ``ServedRule`` (the support check, then the
score against the threshold) is what the server (serve/core/pipeline.py), ``demur
calibrate``, ``demur evaluate`` and offline scoring call, so a figure printed offline
is the figure served. ``demur calibrate`` places the threshold strictly between two
calibration scores (midway in the gap, serve/offline/calibration.py), never on one: a
score recomputed in another batch differs in its last float32 bits and must not
change sides.

Example::

    served = ServedRule.from_manifest(bundle.manifest)        # rule + the bundle's support check
    d = served.decide(summary, x_raw)                         # x_raw: float[B, *shape], raw units
    d.abstain      # bool[B]
    d.reason[0]    # 'mutual_information 0.412 nats > threshold 0.150'
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from demur.serve.core.bundle import SCORE_TASKS, SCORE_UNITS, SCORES
from demur.serve.errors import ConfigError
from demur.serve.core.summary import Summary
from demur.serve.core.support import SupportCheck, support_from_manifest

__all__ = ["DecisionRule", "ServedRule", "Verdicts", "decide", "rule_from", "score_values"]

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
class Verdicts:
    """The per-case outcome of applying a ``DecisionRule``: the score value, the abstain flag,
    a readable reason, and
    whether the case failed the support check (``outside``: bool[B], all False when unchecked)."""

    score: np.ndarray  # float64[B]
    abstain: np.ndarray  # bool[B]
    reason: list[str]
    outside: np.ndarray | None = None

    @property
    def cause(self) -> list[str]:
        """Per case the bounded reason code: "outside_training_data", "score" (abstained on the
        score) or "" (accepted)."""
        outside = self.outside if self.outside is not None else np.zeros(len(self.abstain), dtype=bool)
        return np.where(outside, "outside_training_data", np.where(self.abstain, "score", "")).tolist()


def _check_fits(task: str, name: str) -> None:
    if name not in SCORE_TASKS:
        raise ConfigError(f"score must be one of {', '.join(SCORES)}; got '{name}'", field="score")
    if task not in SCORE_TASKS[name]:
        fits = ", ".join(n for n, tasks in SCORE_TASKS.items() if task in tasks)
        raise ConfigError(f"score '{name}' is not defined for {task}; use one of: {fits}", field="score")


def score_values(summary: Summary, name: str) -> np.ndarray:
    """The named score per case, float64[B]; ``ConfigError`` if it does not fit the task."""
    _check_fits(summary.task, name)
    value = getattr(summary, name)
    if value is None:
        raise ConfigError(f"score '{name}' needs the bundle's target.score_reference (written by demur train); "
                          "this bundle has none: choose another score", field="score")
    return np.asarray(value, dtype=np.float64)


def decide(summary: Summary, rule: DecisionRule, *, support: SupportCheck | None = None,
           x_raw: np.ndarray | None = None, x_std: np.ndarray | None = None) -> Verdicts:
    """``ServedRule(rule, support).decide(summary, x_raw, x_std)``: kept for callers that hold the two apart."""
    return ServedRule(rule, support).decide(summary, x_raw, x_std)


@dataclass(frozen=True)
class ServedRule:
    """The rule a bundle serves: the support check first (a case outside the training data
    abstains whatever its score, reason first), then abstain iff score > threshold.

    The one object every path decides with: the server, ``demur calibrate`` (which certifies
    exactly this rule), ``demur evaluate`` and offline scoring. ``support`` None: a bundle
    exported without a support record, decided on the score alone.
    """

    rule: DecisionRule
    support: SupportCheck | None = None

    @classmethod
    def from_manifest(cls, manifest: Any, config: Any = None) -> ServedRule:
        """The rule in force for a bundle's manifest (``rule_from``) with its support check."""
        return cls(rule_from(manifest, config), support_from_manifest(manifest))

    def outside(self, x_raw: np.ndarray | None, n: int,
                x_std: np.ndarray | None = None) -> tuple[np.ndarray, list[str | None]]:
        """(bool[n] outside the training data, reason per case or None); all inside without a check.
        ``x_std``: the same cases standardised as the graph saw them (float32), if at hand."""
        if self.support is None:
            return np.zeros(n, dtype=bool), [None] * n
        if x_raw is None or len(x_raw) != n:
            raise ValueError("a rule with a support check needs the raw inputs of every case (x_raw)")
        checked = self.support.check(x_raw, x_std)
        return np.asarray(checked.outside, dtype=bool), list(checked.reason)

    def ranking(self, summary: Summary, x_raw: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        """(score float64[B], outside bool[B]). ``np.where(outside, inf, score)`` is the served
        rule as one number: a case is accepted iff it is <= the threshold (calibrate ranks by it)."""
        score = score_values(summary, self.rule.score)
        return score, self.outside(x_raw, len(score))[0]

    def decide(self, summary: Summary, x_raw: np.ndarray | None = None,
               x_std: np.ndarray | None = None) -> Verdicts:
        """Apply the rule to every case of ``summary``; ``x_raw`` float[B, *shape] are the raw
        inputs (before standardisation), needed when there is a support check; ``x_std`` the
        engine's standardised copy, so the check does not standardise again."""
        rule = self.rule
        score = score_values(summary, rule.score)
        abstain = score > rule.threshold
        unit = SCORE_UNITS[rule.score]
        unit = f" {unit}" if unit else ""
        # "<score> <value>[ unit] <=|> threshold <t>": only the value is formatted per case
        head, tail = f"{rule.score} ", (f"{unit} <= threshold {rule.threshold:.4g}",
                                        f"{unit} > threshold {rule.threshold:.4g}")
        reason = [f"{head}{v:.4g}{tail[a]}" for v, a in zip(score.tolist(), abstain.tolist())]
        if self.support is None:
            return Verdicts(score=score, abstain=abstain, reason=reason)
        outside, why = self.outside(x_raw, len(score), x_std)
        reason = [f"{w}; {r}" if w else r for w, r in zip(why, reason)]
        return Verdicts(score=score, abstain=abstain | outside, reason=reason, outside=outside)


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
