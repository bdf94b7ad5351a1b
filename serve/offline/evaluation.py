"""``demur evaluate``'s numerics and page: is the abstention flag worth having, on the user's data?

Pure numpy + scipy for the tables (the caller, ``demur.export.evaluate`` in export/evaluation.py, runs the models);
matplotlib only inside ``write_evaluation`` for the plots.

Tables
------
referral  accuracy on the cases kept when the r% most uncertain are referred to people,
          r = 0, 5, 10, 20, 30, 50, cases ranked by mutual information, predictive
          entropy, 1 - max probability, and at random (its expected accuracy is the
          overall accuracy at every r); the layout of Filos et al. 2019, "A Systematic
          Comparison of Bayesian Deep Learning Robustness in Diabetic Retinopathy
          Tasks". Plus AURC per ranking (Geifman et al. 2019), accuracy, ECE (15 bins,
          Guo et al. 2017), NLL and Brier, all from ``demur.serve.offline.metrics``
          (one copy of each).
shift     for built-in shifts of the held-out inputs (``shifted_inputs``), the AUROC of
          each score at telling shifted cases from clean ones (``auroc``: the
          Mann-Whitney statistic, ties counted half; 0.5 = no better than chance), and the
          share of shifted cases the served rule accepts (score threshold and the support
          check, ``demur.serve.core.support``).
holdout   a class left out of training: the AUROC of each score at telling its cases
          from the seen classes' held-out cases, with its standard error (DeLong et al.
          1988, ``auroc_standard_error``), and the share of them accepted.

The page (``write_evaluation``) writes ``evaluation.json``, ``referral.png``,
``shift.png`` and ``index.html`` with the tables as tables and the caution that the tool
supports, never replaces, qualified human judgement.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
from scipy import stats

from demur.serve.core.bundle import SCORE_TASKS
from demur.serve.offline.metrics import (
    REFERRAL_RATES,
    accuracy_at_referral,
    aurc,
    brier_score,
    expected_calibration_error,
    negative_log_likelihood,
)
from demur.serve.offline.pages import json_safe, pyplot, render_page

__all__ = ["FAR_SHIFTS", "NOISE_SD", "SCORE_NAMES", "auroc", "auroc_difference", "auroc_standard_error",
           "holdout_row", "referral_table", "scores_of", "shift_row", "shifted_inputs", "write_evaluation"]

SCORE_NAMES = tuple(name for name, tasks in SCORE_TASKS.items() if "classification" in tasks)
"""The rankings compared: every classification score of the bundle format (larger = less sure)."""

FAR_SHIFTS = ("scale_x3", "inversion", "rotation", "uniform_noise", "blank", "saturated")
"""Shifts far from any training input: the served rule should accept (almost) none of them."""

NOISE_SD = 0.25
"""Gaussian-noise shift: sd as a share of each feature's training range (our choice)."""


def scores_of(probs: np.ndarray, mutual_information: np.ndarray | None = None) -> dict[str, np.ndarray]:
    """The three rankings from mean probabilities float[N, K] (and MI, nats; a deterministic
    network has none: its MI is 0 and is left out). Entropies in nats."""
    p = np.asarray(probs, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        pe = -np.sum(np.where(p > 0, p * np.log(p), 0.0), axis=1)
    out = {"predictive_entropy": pe, "one_minus_max_prob": 1.0 - p.max(axis=1)}
    if mutual_information is not None:
        out = {"mutual_information": np.asarray(mutual_information, dtype=np.float64), **out}
    return out


def auroc(positive: np.ndarray, negative: np.ndarray) -> float:
    """P(score of a positive > score of a negative) + 0.5 P(tie): the area under the ROC curve
    (Mann-Whitney U / (n_pos n_neg)); +inf scores are fine. Equals
    ``sklearn.metrics.roc_auc_score`` with positives labelled 1."""
    pos = np.asarray(positive, dtype=np.float64).ravel()
    neg = np.asarray(negative, dtype=np.float64).ravel()
    if not len(pos) or not len(neg):
        return float("nan")
    ranks = stats.rankdata(np.concatenate([pos, neg]))
    u = ranks[: len(pos)].sum() - len(pos) * (len(pos) + 1) / 2.0
    return float(u / (len(pos) * len(neg)))


def auroc_standard_error(positive: np.ndarray, negative: np.ndarray) -> float:
    """Standard error of ``auroc(positive, negative)`` by DeLong, DeLong & Clarke-Pearson 1988
    ("Comparing the areas under two or more correlated ROC curves", Biometrics 44): the variance
    of each case's structural component, from midranks (ties half, +inf fine). It says how far
    an AUROC on few cases can move by chance: about 0.01 for the demo's unseen nines."""
    pos = np.asarray(positive, dtype=np.float64).ravel()
    neg = np.asarray(negative, dtype=np.float64).ravel()
    n1, n2 = len(pos), len(neg)
    if n1 < 2 or n2 < 2:
        return float("nan")
    v10, v01 = _components(pos, neg)
    return float(np.sqrt(np.var(v10, ddof=1) / n1 + np.var(v01, ddof=1) / n2))


def auroc_difference(positive_a: np.ndarray, negative_a: np.ndarray, positive_b: np.ndarray,
                     negative_b: np.ndarray) -> dict[str, float]:
    """AUROC(a) - AUROC(b) for two scores of the same cases (row i of each ``positive`` is the
    same case, likewise ``negative``), with the paired standard error and two-sided p-value of
    DeLong, DeLong & Clarke-Pearson 1988 (the covariance of the two structural components; a
    normal reference, scipy.stats.norm). Same cases make the difference far more precise than
    the two areas' own errors suggest."""
    n1, n2 = len(positive_a), len(negative_a)
    if (len(positive_b), len(negative_b)) != (n1, n2):
        raise ValueError("auroc_difference needs both scores on the same cases")
    if n1 < 2 or n2 < 2:
        return {"difference": float("nan"), "standard_error": float("nan"), "p_value": float("nan")}
    (a10, a01), (b10, b01) = _components(positive_a, negative_a), _components(positive_b, negative_b)
    v10, v01 = a10 - b10, a01 - b01
    diff = float(v10.mean())  # each area is the mean of its positives' components
    se = float(np.sqrt(np.var(v10, ddof=1) / n1 + np.var(v01, ddof=1) / n2))
    p = float(2.0 * stats.norm.sf(abs(diff) / se)) if se > 0 else (1.0 if diff == 0 else 0.0)
    return {"difference": float(diff), "standard_error": se, "p_value": p}


def _components(positive: np.ndarray, negative: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """DeLong's structural components: per positive, the share of negatives below it; per
    negative, the share of positives above it (ties half), from midranks."""
    pos = np.asarray(positive, dtype=np.float64).ravel()
    neg = np.asarray(negative, dtype=np.float64).ravel()
    n1, n2 = len(pos), len(neg)
    both = stats.rankdata(np.concatenate([pos, neg]))
    return (both[:n1] - stats.rankdata(pos)) / n2, 1.0 - (both[n1:] - stats.rankdata(neg)) / n1


def referral_table(probs: np.ndarray, y: np.ndarray, scores: Mapping[str, np.ndarray]) -> dict[str, Any]:
    """Accuracy kept at each referral rate per ranking (plus "random"), AURC per ranking, and the
    held-out accuracy, ECE, NLL and Brier of ``probs`` float[N, K] against labels ``y`` int[N]."""
    p = np.asarray(probs, dtype=np.float64)
    t = np.asarray(y).astype(np.int64)
    correct = p.argmax(axis=1) == t
    acc = float(correct.mean())
    rows = {name: {"accuracy_at_referral": accuracy_at_referral(s, correct), "aurc": aurc(s, correct)}
            for name, s in scores.items()}
    rows["random"] = {"accuracy_at_referral": {f"{r:.2f}": acc for r in REFERRAL_RATES},
                      "aurc": 1.0 - acc}
    return {"n": int(len(t)), "accuracy": acc, "ece": expected_calibration_error(p, t),
            "nll": negative_log_likelihood(p, t), "brier": brier_score(p, t), "rankings": rows}


def shifted_inputs(x: np.ndarray, *, low: np.ndarray, high: np.ndarray, center: np.ndarray,
                   image_shape: tuple[int, ...] | None, seed: int = 0) -> dict[str, np.ndarray]:
    """Built-in shifts of raw held-out inputs ``x`` float[N, F] (same shape back, raw units).

    gaussian_noise (sd ``NOISE_SD`` x the feature's range; images clipped to the pixel range),
    scale_x3, inversion (images: lowest + highest pixel value - x; named features: the sign
    flipped about the training mean), permuted_features (one fixed random column order),
    uniform_noise (each feature uniform over its training range); images only: rotation
    (90 degrees), blank (every pixel at the lowest value), saturated (at the highest).
    """
    x = np.asarray(x, dtype=np.float64).reshape(len(x), -1)
    low, high = np.asarray(low, dtype=np.float64), np.asarray(high, dtype=np.float64)
    rng = np.random.default_rng(seed)
    noisy = x + rng.normal(size=x.shape) * NOISE_SD * (high - low)
    lo, hi = float(low.min()), float(high.max())
    out = {
        "gaussian_noise": np.clip(noisy, lo, hi) if image_shape else noisy,
        "scale_x3": 3.0 * x,
        "inversion": (lo + hi - x) if image_shape else 2.0 * np.asarray(center, dtype=np.float64) - x,
        "permuted_features": x[:, rng.permutation(x.shape[1])],
        "uniform_noise": rng.uniform(low, high, size=x.shape),
    }
    if image_shape:
        img = x.reshape(len(x), *image_shape)
        if img.shape[-1] == img.shape[-2]:
            out["rotation"] = np.rot90(img, 1, axes=(-2, -1)).reshape(len(x), -1)
        out["blank"] = np.full_like(x, lo)
        out["saturated"] = np.full_like(x, hi)
    return out


def shift_row(clean: Mapping[str, np.ndarray], shifted: Mapping[str, np.ndarray],
              accepted: np.ndarray) -> dict[str, Any]:
    """One shift's row: AUROC of each score (shifted = positive, clean = negative) and the share
    of shifted cases accepted (``accepted``: bool[N] of the served rule on the shifted cases)."""
    names = [name for name in clean if name in shifted]
    return {"auroc": {name: auroc(shifted[name], clean[name]) for name in names},
            "auroc_se": {name: auroc_standard_error(shifted[name], clean[name]) for name in names},
            "accepted": float(np.mean(accepted)) if len(accepted) else float("nan")}


def holdout_row(shift: Mapping[str, Any], *, label: str, n_unseen: int, n_seen: int, rows: str) -> dict[str, Any]:
    """The held-out-class row from the ``shift_row`` of the unseen cases against ``n_seen``
    clean held-out cases: AUROC and its standard error per score, the share accepted, and
    ``rows``, a sentence saying which rows were the unseen ones."""
    return {"label": label, "n": int(n_unseen), "n_seen": int(n_seen), "rows": rows,
            "auroc": dict(shift["auroc"]), "auroc_se": dict(shift["auroc_se"]), "accepted": shift["accepted"]}


# --------------------------------------------------------------------------- the page


def _referral_plot(plt: Any, figures: Mapping[str, Any], path: Path) -> None:
    fig, ax = plt.subplots(figsize=(6.4, 4.2))
    rates = [float(r) for r in REFERRAL_RATES]
    for model, body in figures["models"].items():
        for name, row in body["referral"]["rankings"].items():
            if name == "random" and model != next(iter(figures["models"])):
                continue
            acc = [row["accuracy_at_referral"][f"{r:.2f}"] for r in rates]
            ax.plot([100 * r for r in rates], acc, marker="o", ms=3,
                    label=f"{model}: {name}" if name != "random" else "random referral")
    ax.set_xlabel("cases referred to people (%)")
    ax.set_ylabel("accuracy of the cases kept")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def _shift_plot(plt: Any, figures: Mapping[str, Any], path: Path) -> None:
    models = list(figures["models"])
    shifts = list(next(iter(figures["models"].values()))["shift"])
    fig, ax = plt.subplots(figsize=(7.2, 3.8))
    width = 0.8 / max(len(models), 1)
    for i, model in enumerate(models):
        acc = [figures["models"][model]["shift"][s]["accepted"] for s in shifts]
        ax.bar(np.arange(len(shifts)) + i * width, acc, width, label=model)
    ax.set_xticks(np.arange(len(shifts)) + 0.4 - width / 2, shifts, rotation=30, ha="right", fontsize=8)
    ax.set_ylabel("share accepted by the served rule")
    ax.set_ylim(0, 1)
    ax.legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def _html(figures: Mapping[str, Any], images: list[str]) -> str:
    """index.html: the context for templates/evaluation.html (rows and sentences; the template lays them out)."""
    rates = [f"{r:.2f}" for r in REFERRAL_RATES]
    models = []
    for model, body in figures["models"].items():
        ref = body["referral"]
        names = [n for n in SCORE_NAMES if n in ref["rankings"]]
        page: dict[str, Any] = {
            "name": model, "network": body.get("network"),
            "summary": f"{ref['n']} held-out cases: accuracy {ref['accuracy']:.4f}, ECE {ref['ece']:.4f} (15 bins), "
                       f"NLL {ref['nll']:.4f} nats, Brier {ref['brier']:.4f}",
            "referral": {"head": ["ranking", *[f"{float(r):.0%} referred" for r in rates], "AURC"],
                         "rows": [[name, *[row["accuracy_at_referral"][r] for r in rates], row["aurc"]]
                                  for name, row in ref["rankings"].items()]},
            "shift": {"head": ["shift", *[f"AUROC {n}" for n in names], "accepted"],
                      "rows": [[s, *[row["auroc"].get(n) for n in names], row["accepted"]]
                               for s, row in body["shift"].items()]},
            "holdout": None,
        }
        h = body.get("holdout")
        if h:
            se = h.get("auroc_se", {})
            c = h.get("against_deterministic")
            page["holdout"] = {
                "label": str(h["label"]), "rows_note": str(h.get("rows", "")),
                "table": {"head": ["score", f"AUROC unseen ({h['n']}) vs seen ({h.get('n_seen', '?')})",
                                   "standard error"], "rows": [[n, v, se.get(n)] for n, v in h["auroc"].items()]},
                "accepted": f"accepted: {round(h['accepted'] * h['n'])} of {h['n']} unseen cases ({h['accepted']:.1%})"
                            + (f" by the rule {h['rule']}" if h.get("rule") else ""),
                "versus": (f"AUROC of {c['score']} minus the deterministic network's {c['baseline_score']}, same "
                           f"cases: {c['difference']:+.4f} (standard error {c['standard_error']:.4f}, two-sided "
                           f"p = {c['p_value']:.3f}; DeLong et al. 1988)") if c else None,
            }
        models.append(page)
    return render_page("evaluation.html", title=f"demur evaluate: {figures.get('title', '')}", models=models,
                       images=images)


def write_evaluation(folder: str | Path, figures: Mapping[str, Any]) -> Path:
    """Write evaluation.json, the plots and index.html into ``folder``; return the JSON's path.

    ``figures``: {"title", "models": {model name: {"referral": referral_table(...),
    "shift": {shift: shift_row(...)}, optional "holdout"}}, ...}.
    """
    root = Path(folder)
    root.mkdir(parents=True, exist_ok=True)
    path = root / "evaluation.json"
    path.write_text(json.dumps(json_safe(figures), indent=2) + "\n")
    plt = pyplot()
    _referral_plot(plt, figures, root / "referral.png")
    _shift_plot(plt, figures, root / "shift.png")
    (root / "index.html").write_text(_html(figures, ["referral.png", "shift.png"]), encoding="utf-8")
    return path
