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

import html
import json
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from demur.serve.offline.calibration import ECE_BINS, reliability_bins, risk_coverage

__all__ = ["CAUTION", "ClassificationPlots", "RegressionPlots", "write_report"]

CAUTION = (
    "demur supports, and never replaces, qualified human judgement. Accepted predictions can still "
    "be wrong; the guarantee is a statement about many cases like the calibration data, not about "
    "any single case, and it does not hold for inputs unlike that data."
)


@dataclass(frozen=True)
class ClassificationPlots:
    """Arrays behind the classification plots (test split unless said otherwise).

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


def _plt() -> Any:
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    return plt


def _axis_label(name: str, unit: str) -> str:
    return f"{name.replace('_', ' ')} ({unit})" if unit else name.replace("_", " ")


def _referral_plot(plt: Any, p: ClassificationPlots, path: Path) -> None:
    rc = risk_coverage(p.scores, p.correct)
    fig, ax = plt.subplots(figsize=(6.4, 4.4))
    ax.plot(100 * (1 - rc["coverage"]), 100 * (1 - rc["risk"]), lw=1.8, label="test split")
    if p.threshold is not None:
        accepted = p.scores <= p.threshold
        if accepted.any():
            ax.plot(100 * (1 - accepted.mean()), 100 * p.correct[accepted].mean(), "o", ms=9,
                    label=f"chosen threshold {p.threshold:.4g} (test)")
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
    ax.set_xlabel(_axis_label(name, unit))
    ax.set_ylabel(f"density (per {unit.rstrip('s') if unit else 'unit of score'})")
    ax.set_title(title)
    ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


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
    ax.set_xlabel("nominal interval level (%)")
    ax.set_ylabel("test cases inside the interval (%)")
    ax.set_title("Interval coverage versus level (test split)")
    ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def _residual_plot(plt: Any, p: RegressionPlots, path: Path) -> None:
    order = np.argsort(p.mean)
    fig, ax = plt.subplots(figsize=(6.4, 4.4))
    ax.fill_between(p.mean[order], (p.lower - p.mean)[order], (p.upper - p.mean)[order], alpha=0.25,
                    step="mid", label=f"served {p.level:.0%} interval, relative to the mean")
    inside = (p.y >= p.lower) & (p.y <= p.upper)
    ax.plot(p.mean[inside], (p.y - p.mean)[inside], ".", ms=4, label="inside")
    ax.plot(p.mean[~inside], (p.y - p.mean)[~inside], "x", ms=5, color="red", label="outside")
    ax.axhline(0, color="grey", lw=0.8)
    ax.set_xlabel("predicted mean (target units)")
    ax.set_ylabel("residual y - mean (target units)")
    ax.set_title("Residuals and the served interval (test split)")
    ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def _json_safe(obj: Any) -> Any:
    if isinstance(obj, Mapping):
        return {str(k): _json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_json_safe(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _json_safe(obj.tolist())
    if isinstance(obj, np.generic):
        return _json_safe(obj.item())
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj


def write_report(folder: str | Path, figures: Mapping[str, Any],
                 plots: ClassificationPlots | RegressionPlots | None = None) -> Path:
    """Write report.json, the PNG plots and index.html into ``folder``; return report.json's path."""
    out = Path(folder)
    out.mkdir(parents=True, exist_ok=True)
    images: list[tuple[str, str]] = []
    if plots is not None:
        plt = _plt()
        if isinstance(plots, ClassificationPlots):
            _referral_plot(plt, plots, out / "referral.png")
            _reliability_plot(plt, plots, out / "reliability.png")
            _score_hist(plt, plots.scores, [("correct", plots.correct), ("wrong", ~plots.correct)],
                        plots.threshold, plots.score_name, plots.score_unit, out / "score_hist.png",
                        "Decision score: correct versus wrong predictions (test split)")
            images = [
                ("referral.png", "Accuracy on accepted cases as more cases are referred to people. "
                                 "The marker is the operating point of the chosen threshold."),
                ("reliability.png", "Reliability: within each confidence bin, how often the model was right."),
                ("score_hist.png", "Wrong predictions should sit at higher scores than correct ones."),
            ]
        else:
            _coverage_plot(plt, plots, out / "coverage.png")
            _residual_plot(plt, plots, out / "residuals.png")
            inside = (plots.y >= plots.lower) & (plots.y <= plots.upper)
            _score_hist(plt, plots.scores, [("inside interval", inside), ("outside interval", ~inside)],
                        plots.threshold, plots.score_name, plots.score_unit, out / "score_hist.png",
                        "Decision score: cases inside versus outside the interval (test split)")
            images = [
                ("coverage.png", "Share of test cases inside the interval at each nominal level."),
                ("residuals.png", "Test residuals with the served interval around the predicted mean."),
                ("score_hist.png", "The decision score for cases inside and outside the served interval."),
            ]
    report = dict(figures)
    report["caution"] = CAUTION
    path = out / "report.json"
    path.write_text(json.dumps(_json_safe(report), indent=2) + "\n", encoding="utf-8")
    (out / "index.html").write_text(_html(report, images), encoding="utf-8")
    return path


def _html(report: Mapping[str, Any], images: list[tuple[str, str]]) -> str:
    title = f"demur calibration report: {report.get('model', {}).get('name', 'model')}"
    rows = []
    for section in ("calibration", "test", "calibration_split"):
        if section in report and isinstance(report[section], Mapping):
            rows.append(f"<h2>{html.escape(section.replace('_', ' '))}</h2><pre>"
                        f"{html.escape(json.dumps(_json_safe(report[section]), indent=2))}</pre>")
    if report.get("status") == "infeasible":
        rows.insert(0, f"<p class='bad'><strong>No threshold was written.</strong> "
                       f"{html.escape(str(report.get('message', '')))}</p>")
    figs = "".join(
        f"<figure><img src='{html.escape(f)}' alt='{html.escape(c)}'><figcaption>{html.escape(c)}"
        f"</figcaption></figure>" for f, c in images
    )
    return (
        "<!doctype html><html lang='en'><head><meta charset='utf-8'>"
        f"<title>{html.escape(title)}</title><style>body{{font-family:sans-serif;max-width:60em;margin:2em auto;"
        "padding:0 1em}} img{{max-width:100%}} .caution{{border:2px solid #b60;padding:.8em;background:#fff7e6}}"
        " .bad{{color:#a00}} pre{{background:#f4f4f4;padding:.6em;overflow:auto}}</style></head><body>"
        f"<h1>{html.escape(title)}</h1><p class='caution'><strong>Caution.</strong> {html.escape(CAUTION)}</p>"
        f"{''.join(rows)}{figs}</body></html>\n"
    )
