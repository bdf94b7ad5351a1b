"""``demur evaluate``'s regression tables: how good the predictive law is, on labelled held-out rows.

Pure numpy + scipy (the caller, ``demur.export.evaluate``, runs the model through the serving
path); matplotlib only inside ``write_regression_evaluation``.

The predictive law of one case is the equal-weight mixture of the S draws' Gaussians
N(mu_s, sd_s^2) (target units, ``demur.serve.core.summary.regression_components``).

Tables
------
scores     NLL: mean -ln p(y), p the mixture density (log-sum-exp), nats. CRPS (Gneiting &
           Raftery 2007, JASA 102, eq. 21: CRPS(F, y) = E|X - y| - 1/2 E|X - X'|, target
           units, lower is better); for a Gaussian mixture in closed form (Grimit, Gneiting,
           Berrocal & Johnson 2006, QJRMS 132, eq. 7) with
           A(m, v) = 2 sqrt(v) phi(m / sqrt(v)) + m (2 Phi(m / sqrt(v)) - 1) = E|m + sqrt(v) Z|:
           CRPS = (1/S) sum_s A(y - mu_s, sd_s^2) - 1/(2 S^2) sum_{s,t} A(mu_s - mu_t, sd_s^2 + sd_t^2).
           RMSE and MAE of the mixture mean.
coverage   the mixture's own central intervals at 50, 80, 90 and 95% (coverage and mean width),
           and the served interval (conformal after ``demur calibrate``).
pit        the probability integral transform F(y) = (1/S) sum_s Phi((y - mu_s) / sd_s) in 10
           equal bins: flat when the law is calibrated, U-shaped when too narrow, humped when
           too wide (Gneiting, Balabdaoui & Raftery 2007).
referral   RMSE, MAE and served-interval coverage on the cases kept when the r% with the
           largest epistemic variance go to people (r = 0, 5, 10, 20, 30, 50), beside
           referring at random (expected: the overall figure at every r).
shift      for built-in shifts of the held-out inputs: the served interval's mean width (and
           its ratio to the clean width), the epistemic sd, the share the served rule accepts and
           the share the support check puts outside the training data.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
from scipy import stats
from scipy.special import logsumexp

from demur.serve.core.summary import mixture_quantile
from demur.serve.offline.metrics import REFERRAL_RATES
from demur.serve.offline.pages import json_safe, pyplot, render_page

__all__ = ["COVERAGE_LEVELS", "PIT_BINS", "coverage_table", "crps_gaussian", "crps_mixture", "far_shifts",
           "nll_mixture", "pit_values", "referral_by_epistemic", "regression_lines", "regression_scores",
           "regression_shift_row", "write_regression_evaluation"]

COVERAGE_LEVELS = (0.5, 0.8, 0.9, 0.95)
"""Central interval levels whose coverage is reported."""

PIT_BINS = 10
"""Equal-width bins of the PIT histogram."""


def _abs_moment(m: np.ndarray, v: np.ndarray) -> np.ndarray:
    """A(m, v) = E|m + sqrt(v) Z|, Z ~ N(0, 1): the mean absolute value of N(m, v)."""
    sd = np.sqrt(v)
    z = m / sd
    return 2.0 * sd * stats.norm.pdf(z) + m * (2.0 * stats.norm.cdf(z) - 1.0)


def crps_gaussian(mu: np.ndarray, sd: np.ndarray, y: np.ndarray) -> np.ndarray:
    """CRPS of N(mu, sd^2) at y: sd [z (2 Phi(z) - 1) + 2 phi(z) - 1/sqrt(pi)], z = (y - mu)/sd
    (Gneiting, Raftery, Westveld & Goldman 2005, eq. 5)."""
    mu, sd, y = (np.asarray(a, dtype=np.float64) for a in (mu, sd, y))
    z = (y - mu) / sd
    return sd * (z * (2.0 * stats.norm.cdf(z) - 1.0) + 2.0 * stats.norm.pdf(z) - 1.0 / np.sqrt(np.pi))


def crps_mixture(mu: np.ndarray, sd: np.ndarray, y: np.ndarray) -> np.ndarray:
    """CRPS of the equal-weight mixture of N(mu_s, sd_s^2), ``mu, sd: float[S, B]``, at ``y: float[B]``
    (module docstring): float[B], target units. Cost S^2 B."""
    mu, sd, y = (np.asarray(a, dtype=np.float64) for a in (mu, sd, y))
    first = _abs_moment(y[None, :] - mu, sd**2).mean(axis=0)
    pair = _abs_moment(mu[:, None, :] - mu[None, :, :], sd[:, None, :] ** 2 + sd[None, :, :] ** 2)
    return first - 0.5 * pair.mean(axis=(0, 1))


def nll_mixture(mu: np.ndarray, sd: np.ndarray, y: np.ndarray) -> np.ndarray:
    """-ln of the mixture density at y, float[B], nats (log-sum-exp over the S draws)."""
    mu, sd, y = (np.asarray(a, dtype=np.float64) for a in (mu, sd, y))
    log_p = stats.norm.logpdf(y[None, :], mu, sd)
    return -(logsumexp(log_p, axis=0) - np.log(mu.shape[0]))


def pit_values(mu: np.ndarray, sd: np.ndarray, y: np.ndarray) -> np.ndarray:
    """F(y) of the mixture per case, float[B] in [0, 1]."""
    mu, sd, y = (np.asarray(a, dtype=np.float64) for a in (mu, sd, y))
    return stats.norm.cdf((y[None, :] - mu) / sd).mean(axis=0)


def regression_scores(mu: np.ndarray, sd: np.ndarray, y: np.ndarray) -> dict[str, Any]:
    """NLL, CRPS, RMSE, MAE and the PIT histogram (counts per bin, ``PIT_BINS`` bins)."""
    y = np.asarray(y, dtype=np.float64)
    mean = np.asarray(mu, dtype=np.float64).mean(axis=0)
    pit = pit_values(mu, sd, y)
    counts = np.histogram(pit, bins=PIT_BINS, range=(0.0, 1.0))[0]
    return {"n": int(len(y)), "nll": float(nll_mixture(mu, sd, y).mean()),
            "crps": float(crps_mixture(mu, sd, y).mean()),
            "rmse": float(np.sqrt(np.mean((y - mean) ** 2))), "mae": float(np.mean(np.abs(y - mean))),
            "pit": {"bins": PIT_BINS, "counts": counts.tolist(),
                    "chi2_p": float(stats.chisquare(counts).pvalue) if len(y) >= 5 * PIT_BINS else None}}


def coverage_table(mu: np.ndarray, sd: np.ndarray, y: np.ndarray, served: tuple[np.ndarray, np.ndarray, float, str],
                   levels: tuple[float, ...] = COVERAGE_LEVELS) -> list[dict[str, Any]]:
    """Per level: the mixture's central interval (its own quantiles) coverage and mean width; last
    row the served interval (``served`` = (lower, upper, level, method))."""
    y = np.asarray(y, dtype=np.float64)
    rows = []
    for level in levels:
        lo, hi = mixture_quantile(mu, sd, (1 - level) / 2), mixture_quantile(mu, sd, (1 + level) / 2)
        rows.append({"interval": "model mixture", "level": level, "coverage": float(np.mean((y >= lo) & (y <= hi))),
                     "mean_width": float(np.mean(hi - lo))})
    lo, hi, level, method = served
    rows.append({"interval": f"served ({method})", "level": float(level),
                 "coverage": float(np.mean((y >= lo) & (y <= hi))), "mean_width": float(np.mean(hi - lo))})
    return rows


def referral_by_epistemic(y: np.ndarray, mean: np.ndarray, epistemic_var: np.ndarray, lower: np.ndarray,
                          upper: np.ndarray, rates: tuple[float, ...] = REFERRAL_RATES) -> list[dict[str, Any]]:
    """RMSE, MAE and served-interval coverage on the cases kept when the round(r n) with the largest
    epistemic variance are referred (ties in input order)."""
    y, mean = np.asarray(y, dtype=np.float64), np.asarray(mean, dtype=np.float64)
    order = np.argsort(-np.asarray(epistemic_var, dtype=np.float64), kind="stable")
    err, inside = y - mean, (y >= lower) & (y <= upper)
    rows = []
    for r in rates:
        keep = order[int(round(r * len(y))):]
        rows.append({"referred": r, "kept": int(len(keep)), "rmse": float(np.sqrt(np.mean(err[keep] ** 2))),
                     "mae": float(np.mean(np.abs(err[keep]))), "coverage": float(np.mean(inside[keep]))})
    return rows


def far_shifts(x: np.ndarray, *, low: np.ndarray, high: np.ndarray) -> dict[str, np.ndarray]:
    """Inputs far outside the training range: every feature x10, and the first feature alone set
    three training ranges above its maximum (an age of 150 in a survey of adults)."""
    x = np.asarray(x, dtype=np.float64).reshape(len(x), -1)
    one = x.copy()
    one[:, 0] = high[0] + 3.0 * (high[0] - low[0])
    return {"every_feature_x10": 10.0 * x, "first_feature_far": one}


def regression_shift_row(clean_width: float, width: np.ndarray, epistemic_std: np.ndarray, accepted: np.ndarray,
                         outside: np.ndarray) -> dict[str, Any]:
    """One shift's row (served interval width, its ratio to the clean width, epistemic sd, shares)."""
    w = float(np.mean(width))
    return {"mean_width": w, "width_ratio": w / clean_width if clean_width > 0 else float("nan"),
            "epistemic_std": float(np.mean(epistemic_std)), "accepted": float(np.mean(accepted)),
            "outside_training_data": float(np.mean(outside))}


def regression_lines(figures: Mapping[str, Any]) -> list[str]:
    """``demur evaluate``'s regression tables in a few printed lines."""
    body = figures["models"]["bundle"]
    sc = body["scores"]
    lines = [f"{sc['n']} cases: NLL {sc['nll']:.4f} nats, CRPS {sc['crps']:.4g}, RMSE {sc['rmse']:.4g}, MAE "
             f"{sc['mae']:.4g}; PIT counts {sc['pit']['counts']}"]
    lines += [f"  {r['interval']} {r['level']:.0%}: coverage {r['coverage']:.3f}, mean width {r['mean_width']:.4g}"
              for r in body["coverage"]]
    lines.append("  referred by epistemic variance: " + ", ".join(
        f"{r['referred']:.0%} RMSE {r['rmse']:.4g}" for r in body["referral"]))
    lines.append("  shifted inputs (served interval width, x clean; accepted; outside the training data): " + "; ".join(
        f"{k} {r['mean_width']:.4g} (x{r['width_ratio']:.2f}), {r['accepted']:.2f}, {r['outside_training_data']:.2f}"
        for k, r in body["shift"].items()))
    return lines


def write_regression_evaluation(out: str | Path, figures: Mapping[str, Any]) -> Path:
    """evaluation.json, pit.png and index.html (tables as tables, the caution) under ``out``."""
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    (out / "evaluation.json").write_text(json.dumps(json_safe(figures), indent=2), encoding="utf-8")
    body = figures["models"]["bundle"]
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(5.6, 3.6))
    counts = body["scores"]["pit"]["counts"]
    ax.bar(np.arange(PIT_BINS) / PIT_BINS, counts, width=1 / PIT_BINS, align="edge", edgecolor="black")
    ax.axhline(sum(counts) / PIT_BINS, color="grey", linestyle="--", label="calibrated (flat)")
    ax.set(xlabel="PIT = F(y)", ylabel="cases", title="PIT histogram")
    ax.legend()
    fig.tight_layout()
    fig.savefig(out / "pit.png", dpi=110)
    plt.close(fig)
    sc = body["scores"]

    def rows(items: list[Mapping[str, Any]], keys: list[str]) -> dict[str, Any]:
        return {"head": keys, "rows": [[r.get(k) for k in keys] for r in items]}

    page = render_page(
        "regression.html", title=f"demur evaluate: {figures['title']}", n=sc["n"], notes=figures.get("notes", []),
        scores=rows([sc], ["nll", "crps", "rmse", "mae"]),
        coverage=rows(body["coverage"], ["interval", "level", "coverage", "mean_width"]),
        referral=rows(body["referral"], ["referred", "kept", "rmse", "mae", "coverage"]),
        shift=rows([{"shift": k, **v} for k, v in body["shift"].items()],
                   ["shift", "mean_width", "width_ratio", "epistemic_std", "accepted", "outside_training_data"]))
    (out / "index.html").write_text(page, encoding="utf-8")
    return out / "index.html"
