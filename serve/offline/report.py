"""The calibration report: one folder a person can read, and one JSON a program can.

``write_report(folder, figures, plots)`` writes::

    folder/
      report.json          every figure (calibration choice, held-out metrics)
      referral.png         accuracy of accepted cases versus referral rate (the
                           risk-coverage curve turned round), with the chosen
                           operating point                 [classification]
      reliability.png      reliability diagram, 15 bins    [classification]
      score_hist.png       the decision score for correct vs wrong cases
      coverage.png         interval coverage versus nominal level   [regression]
      residuals.png        residuals with the served interval       [regression]
      index.html           the plots with their captions and the caution

Plots use matplotlib's Agg backend (no display needed). This module imports
no flask or onnxruntime; it is called by ``demur calibrate``.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from demur.serve.core.bundle import SCORE_UNITS
from demur.serve.offline.metrics import ECE_BINS, reliability_bins, risk_coverage
from demur.serve.offline.pages import CAUTION, figure, json_safe, pyplot, render_page

__all__ = ["ClassificationPlots", "RegressionPlots", "decision_lines", "write_report"]


@dataclass(frozen=True)
class ClassificationPlots:
    """Arrays behind the classification plots (the check's cases, or the calibration cases: ``split``).

    ``scores``: float[N] decision score; ``correct``: bool[N]; ``probs``: float[N, K]
    mean class probabilities; ``y``: int[N]; ``threshold``: the chosen threshold
    (``None`` if calibration failed); ``score_name``/``score_unit`` label the axes.
    """

    scores: np.ndarray
    correct: np.ndarray
    probs: np.ndarray
    y: np.ndarray
    threshold: float | None
    score_name: str
    score_unit: str = "nats"
    calibration_point: tuple[float, float] | None = None  # (abstain rate, accuracy) on calibration
    target_accuracy: float | None = None
    split: str = "test"  # which cases the arrays are: "test" (the check) or "calibration"


@dataclass(frozen=True)
class RegressionPlots:
    """Arrays behind the regression plots (test split).

    ``y``, ``mean``, ``sd`` (total predictive std), ``lower``/``upper`` (served
    interval): float[N], target units; ``cal_residuals``: normalised calibration
    residuals |y - mean| / sd, float[n]; ``level``: the served interval's level.
    """

    y: np.ndarray
    mean: np.ndarray
    sd: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    cal_residuals: np.ndarray
    level: float
    scores: np.ndarray
    threshold: float | None
    score_name: str
    score_unit: str = ""
    extra: dict[str, Any] = field(default_factory=dict)
    split: str = "test"
    raw_lower: np.ndarray | None = None  # the model's own interval before conformal, target units
    raw_upper: np.ndarray | None = None


def _axis_label(name: str, unit: str) -> str:
    return f"{name.replace('_', ' ')} ({unit})" if unit else name.replace("_", " ")


def _referral_plot(plt: Any, p: ClassificationPlots, path: Path) -> None:
    rc = risk_coverage(p.scores, p.correct)
    fig, ax = plt.subplots(figsize=(6.4, 4.4))
    ax.plot(100 * (1 - rc["coverage"]), 100 * (1 - rc["risk"]), lw=1.8, label=f"{p.split} cases")
    if p.threshold is not None:
        accepted = p.scores <= p.threshold
        if accepted.any():
            ax.plot(100 * (1 - accepted.mean()), 100 * p.correct[accepted].mean(), "o", ms=9,
                    label=f"chosen threshold {p.threshold:.4g} ({p.split})")
    if p.calibration_point is not None:
        ax.plot(100 * p.calibration_point[0], 100 * p.calibration_point[1], "s", ms=8, mfc="none",
                label="chosen threshold (calibration)")
    if p.target_accuracy is not None:
        ax.axhline(100 * p.target_accuracy, ls="--", color="grey", lw=1, label="target accuracy")
    ax.set_xlabel("cases referred to a person (%)")
    ax.set_ylabel("accuracy on accepted cases (%)")
    ax.set_title("Accuracy versus referral (risk-coverage curve)")
    ax.set_xlim(0, 100)
    ax.grid(alpha=0.3)
    ax.legend(loc="lower right", fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def _reliability_plot(plt: Any, p: ClassificationPlots, path: Path) -> None:
    r = reliability_bins(p.probs, p.y, ECE_BINS)
    centers = 0.5 * (r["edges"][:-1] + r["edges"][1:])
    filled = r["count"] > 0
    fig, ax = plt.subplots(figsize=(5.2, 5.0))
    ax.bar(centers[filled], r["accuracy"][filled], width=1 / ECE_BINS, edgecolor="black", alpha=0.7,
           label="accuracy in bin")
    ax.plot([0, 1], [0, 1], "--", color="grey", label="perfect calibration")
    ax.plot(centers[filled], r["confidence"][filled], "o", ms=4, color="black",
            label="mean confidence in bin (gap to bar = miscalibration)")
    ax.set_xlabel("confidence: largest mean class probability (probability)")
    ax.set_ylabel("accuracy (fraction correct)")
    ax.set_title(f"Reliability diagram ({ECE_BINS} equal-width bins)")
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1)
    ax.legend(loc="upper left", fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def _score_hist(plt: Any, scores: np.ndarray, groups: list[tuple[str, np.ndarray]], threshold: float | None,
                name: str, unit: str, path: Path, title: str) -> None:
    fig, ax = plt.subplots(figsize=(6.4, 4.2))
    finite = scores[np.isfinite(scores)]
    bins = np.linspace(finite.min(), finite.max(), 31) if finite.size and np.ptp(finite) > 0 else 10
    for label, mask in groups:
        if mask.any():
            ax.hist(scores[mask], bins=bins, alpha=0.6, density=True, label=f"{label} (n={int(mask.sum())})")
    if threshold is not None:
        ax.axvline(threshold, color="black", ls="--", lw=1.2, label=f"threshold {threshold:.4g}")
    _finish(plt, fig, ax, path, _axis_label(name, unit), f"density (per {unit.rstrip('s') if unit else 'unit of score'})", title)


def _coverage_plot(plt: Any, p: RegressionPlots, path: Path) -> None:
    from scipy.special import ndtri

    levels = np.linspace(0.5, 0.98, 25)
    test_r = np.abs(p.y - p.mean) / p.sd
    n = len(p.cal_residuals)
    srt = np.sort(p.cal_residuals)
    ranks = np.minimum(np.ceil((n + 1) * levels).astype(int), n)
    conformal = [(test_r <= srt[k - 1]).mean() for k in ranks]
    gaussian = [(test_r <= ndtri((1 + lv) / 2)).mean() for lv in levels]
    fig, ax = plt.subplots(figsize=(5.4, 5.0))
    ax.plot(100 * levels, 100 * np.array(conformal), "o-", ms=3, label="conformal (mean ± q·sd)")
    ax.plot(100 * levels, 100 * np.array(gaussian), "s-", ms=3, label="moment-matched normal, uncalibrated")
    ax.plot([50, 98], [50, 98], "--", color="grey", label="nominal")
    ax.axvline(100 * p.level, color="black", lw=0.8, ls=":")
    _finish(plt, fig, ax, path, "nominal interval level (%)", "test cases inside the interval (%)", f"Interval coverage versus level ({p.split} cases)")


def _residual_plot(plt: Any, p: RegressionPlots, path: Path) -> None:
    order = np.argsort(p.mean)
    fig, ax = plt.subplots(figsize=(6.4, 4.4))
    ax.fill_between(p.mean[order], (p.lower - p.mean)[order], (p.upper - p.mean)[order], alpha=0.25,
                    step="mid", label=f"served {p.level:.0%} interval, relative to the mean")
    inside = (p.y >= p.lower) & (p.y <= p.upper)
    ax.plot(p.mean[inside], (p.y - p.mean)[inside], ".", ms=4, label="inside")
    ax.plot(p.mean[~inside], (p.y - p.mean)[~inside], "x", ms=5, color="red", label="outside")
    ax.axhline(0, color="grey", lw=0.8)
    _finish(plt, fig, ax, path, "predicted mean (target units)", "residual y - mean (target units)", f"Residuals and the served interval ({p.split} cases)")


def write_report(folder: str | Path, figures: Mapping[str, Any],
                 plots: ClassificationPlots | RegressionPlots | None = None) -> Path:
    """Write report.json, the PNG plots and index.html into ``folder``; return report.json's path."""
    out = Path(folder)
    out.mkdir(parents=True, exist_ok=True)
    images: list[tuple[str, str]] = []
    if plots is not None:
        plt = pyplot()
        if isinstance(plots, ClassificationPlots):
            _referral_plot(plt, plots, out / "referral.png")
            _reliability_plot(plt, plots, out / "reliability.png")
            good, names = plots.correct, ("correct", "wrong", "correct versus wrong predictions")
            images = [
                ("referral.png", "Accuracy on accepted cases as more cases are referred to people. "
                                 "The marker is the operating point of the chosen threshold."),
                ("reliability.png", "Reliability: within each confidence bin, how often the model was right."),
                ("score_hist.png", "Wrong predictions should sit at higher scores than correct ones."),
            ]
        else:
            _coverage_plot(plt, plots, out / "coverage.png")
            _residual_plot(plt, plots, out / "residuals.png")
            good = (plots.y >= plots.lower) & (plots.y <= plots.upper)
            names = ("inside interval", "outside interval", "cases inside versus outside the interval")
            images = [
                ("coverage.png", "Share of cases inside the interval at each nominal level: the model's own "
                                 "(moment-matched) interval against the conformal one."),
                ("residuals.png", "Test residuals with the served interval around the predicted mean."),
                ("score_hist.png", "The decision score for cases inside and outside the served interval."),
            ]
        _score_hist(plt, plots.scores, [(names[0], good), (names[1], ~good)], plots.threshold, plots.score_name,
                    plots.score_unit, out / "score_hist.png", f"Decision score: {names[2]} ({plots.split} cases)")
    report = dict(figures)
    report["caution"] = CAUTION
    path = out / "report.json"
    path.write_text(json.dumps(json_safe(report), indent=2) + "\n", encoding="utf-8")
    (out / "index.html").write_text(_html(report, images), encoding="utf-8")
    return path


# --------------------------------------------------------------------------- words and tables


def _pct(v: float) -> str:
    return f"{100 * v:.1f}%"


def _chance(p: float) -> str:
    return "<0.1%" if p < 0.001 else f"{100 * p:.1f}%"


def decision_lines(record: Mapping[str, Any]) -> list[str]:
    """The calibration record in sentences: the decision, the guarantee, what a batch
    will show, the intervals, the check. Printed by ``demur calibrate`` and the report."""
    ach, score = record["achieved"], str(record["score"]).replace("_", " ")
    unit = f" {SCORE_UNITS[record['score']]}" if SCORE_UNITS.get(record["score"]) else ""
    bound = record.get("bound")
    first = (f"abstain when {score} > {record['threshold']:.4g}{unit} or the case is outside the training data: "
             f"{_pct(ach['abstain_rate'])} of the {record['n']} calibration cases go to a person")
    if "outside_training_data" in ach:
        first += (f" ({ach['outside_training_data']} by the support check, {ach['abstain_on_score']} on the score; "
                  f"the served rule's figures)")
    if ach.get("accuracy") is not None:
        first += f"; accepted accuracy {ach['accuracy']:.4f}"
    if bound:
        first += (f"; accepted cases are at least {_pct(bound['accuracy_lower'])} correct with "
                  f"{record['confidence']:.0%} confidence ({record['method']})")
    lines = [first]
    if record.get("guarantee"):
        lines.append(f"guarantee: {record['guarantee']}")
    spread = record.get("batch")
    if spread:
        est, low = spread["at_calibration_estimate"], spread["at_certified_floor"]
        lines.append(
            f"on a batch of {est['batch']} future cases about {est['coverage'] * est['batch']:.0f} are accepted; "
            f"if the population's accepted accuracy is the calibration estimate {est['accuracy']:.4f}, the batch "
            f"shows {est['q05']:.4f} to {est['q95']:.4f} (5-95%) and falls below {est['target']:g} with "
            f"probability {_chance(est['below'])}; if it is at the certified floor {low['accuracy']:.4f}, with "
            f"probability {_chance(low['below'])}")
    conformal = record.get("conformal")
    if conformal:
        lines.append(f"intervals: conformal scale q = {conformal['q']:.4g} on {conformal.get('score', 'normalised')} "
                     f"residuals for {conformal['level']:.0%} coverage"
                     + (f" ({conformal['score_choice']['why']})" if conformal.get("score_choice") else "") + "; "
                     f"before the correction the model's own {conformal['level']:.0%} interval covered "
                     f"{_pct(conformal['model_coverage_before'])} of the {conformal['model_coverage_before_on']} "
                     "cases")
    t = record.get("test")
    if t:
        n_test = (record.get("data", {}).get("test") or {}).get("n", t.get("accepted"))
        tail = f"independent check ({n_test} cases): abstain {_pct(t['abstain_rate'])}"
        if t.get("accuracy_accepted") is not None:
            tail += f", accepted accuracy {t['accuracy_accepted']:.4f}"
        if t.get("coverage") is not None:
            tail += f", interval coverage {t['coverage']:.3f}"
        lines.append(tail)
    return lines


_METRIC_NAMES = {
    "n": "cases", "accuracy": "accuracy (all cases)", "nll": "negative log-likelihood (nats)",
    "brier": "Brier score", "ece": "expected calibration error (15 bins)", "aurc": "area under risk-coverage",
    "coverage": "interval coverage", "mean_interval_width": "mean interval width (target units)",
    "rmse": "RMSE (target units)", "mae": "MAE (target units)",
}


def _metrics_tables(metrics: Mapping[str, Any]) -> list[dict[str, Any]]:
    rows = [(label, metrics[k]) for k, label in _METRIC_NAMES.items() if k in metrics]
    at = metrics.get("at_threshold") or {}
    rows += [(f"at the threshold: {k.replace('_', ' ')}", v) for k, v in at.items() if k != "threshold"]
    tables = [_rows(rows)]
    referral = metrics.get("accuracy_at_referral")
    if referral:
        tables.append(_rows([(f"{100 * float(r):.0f}% referred", v) for r, v in referral.items()],
                            ("cases referred to a person (highest score first)", "accuracy on the rest")))
    return tables


def _rows(rows: list[tuple[str, Any]], head: tuple[str, str] = ("figure", "value")) -> dict[str, Any]:
    """A figure-and-value table for ``tables.html``."""
    return {"head": head, "rows": rows}


def _html(report: Mapping[str, Any], images: list[tuple[str, str]]) -> str:
    """index.html: the context for templates/report.html (rows and sentences; the template lays them out)."""
    rec = report.get("calibration")
    decision: list[str] = []
    sections: list[dict[str, Any]] = []
    if report.get("status") != "infeasible" and isinstance(rec, Mapping):
        lines = decision_lines(rec)
        decision = [lines[0][0].upper() + lines[0][1:]] + [line[0].upper() + line[1:].rstrip(".") for line in lines[1:]]
        ach = rec.get("achieved", {})
        rows = [("score", rec.get("score")), ("threshold (abstain when score is above)", rec.get("threshold")),
                ("method", rec.get("method")), ("reference", rec.get("reference")),
                ("target", ", ".join(f"{k} {figure(v)}" for k, v in (rec.get("target") or {}).items())),
                ("confidence", rec.get("confidence")), ("calibration cases used (n)", rec.get("n")),
                ("rows in the file", (rec.get("data") or {}).get("rows")),
                ("training rows left out", (rec.get("data") or {}).get("training_rows_dropped")),
                ("accepted", ach.get("accepted")), ("abstain rate", ach.get("abstain_rate")),
                ("observed accepted accuracy", ach.get("accuracy"))]
        if rec.get("bound"):
            rows += [("certified accepted accuracy (lower bound)", rec["bound"]["accuracy_lower"]),
                     ("candidate thresholds / tested", f"{rec['bound']['candidates']} / {rec['bound']['tested']}")]
        sections.append({"heading": "Calibration", "tables": [_rows(rows)]})
        if rec.get("batch"):
            rows = []
            for key, label in (("at_calibration_estimate", "at the calibration estimate"),
                               ("at_certified_floor", "at the certified floor")):
                b = rec["batch"][key]
                rows += [(f"{label}: population accepted accuracy", b["accuracy"]),
                         (f"{label}: batch accuracy, 5% / 50% / 95%",
                          f"{b['q05']:.4f} / {b['q50']:.4f} / {b['q95']:.4f}"),
                         (f"{label}: chance a batch falls below {b['target']:g}", _chance(b["below"]))]
            size = rec["batch"]["at_calibration_estimate"]["batch"]
            sections.append({"heading": f"What a batch of {size} future cases shows",
                             "intro": "Accepted-case accuracy on one batch scatters around the population figure "
                                      "(exact binomial sums; the batch accepts a Binomial(N, coverage) number of "
                                      "cases).", "tables": [_rows(rows)]})
        if rec.get("conformal"):
            c = rec["conformal"]
            rows = [("level", c["level"]), ("conformal scale q", c["q"]),
                    (f"model's own interval coverage ({c['model_coverage_before_on']} cases, before)",
                     c["model_coverage_before"]),
                    ("conformal interval coverage (calibration)", c["coverage_cal"]),
                    ("aleatoric floor (target units squared)", c["aleatoric_floor"]),
                    ("floor rule", c["aleatoric_floor_rule"])]
            if isinstance(report.get("test"), Mapping) and "coverage" in report["test"]:
                rows.insert(3, ("conformal interval coverage (check)", report["test"]["coverage"]))
            sections.append({"heading": "Intervals", "intro": "Split conformal (Lei et al. 2018) corrects the model's "
                             "interval to the stated coverage; the first row shows why the correction matters.",
                             "tables": [_rows(rows)]})
    checks = [{"heading": label, "tables": _metrics_tables(report[section])}
              for section, label in (("test", "Independent check"), ("calibration_split", "Calibration cases"))
              if isinstance(report.get(section), Mapping)]
    return render_page("report.html", title=f"demur calibration report: {report.get('model', {}).get('name', 'model')}",
                       infeasible=report.get("status") == "infeasible", message=str(report.get("message", "")),
                       decision=decision, sections=sections, notes=[str(n) for n in report.get("notes") or []],
                       checks=checks, images=images)


def _finish(plt: Any, fig: Any, ax: Any, path: Path, xlabel: str, ylabel: str, title: str) -> None:
    """Label, lay out and write one figure (PNG, 110 dpi), then free it."""
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    ax.set_title(title)
    ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
