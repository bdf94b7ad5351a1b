"""Thresholds chosen from labelled data with a stated guarantee (the measuring is
``demur.serve.offline.metrics``).

Pure numpy + scipy (no flask, no onnxruntime): the inputs are the serving
path's own summaries and scores, computed by the caller (``demur calibrate``).

Threshold choice -- three ways
------------------------------
1. Target accuracy A on accepted cases, with confidence 1 - delta
   (``select_for_accuracy``). What it guarantees, exactly: with probability at
   least 1 - delta over the draw of the n calibration cases, the error rate of
   accepted cases in the population they were drawn from is at most 1 - A. It
   does not say that every batch of future cases will show accuracy >= A: a
   batch of N cases scatters around the population figure, and
   ``batch_spread`` computes by how much (binomial sums, no approximation).

   The grid (``candidate_ranks``) is fixed from n and the abstention budget
   ``max_abstain`` alone, before the target, the confidence or any label is
   looked at: up to ``MAX_CANDIDATES`` evenly spaced ranks k from the rank that
   accepts ceil((1 - max_abstain) n) cases (the most conservative threshold the
   budget allows) to n. Candidate k is the calibration scores' order statistic
   s_(k) and accepts the cases scored below it; the threshold written to the
   bundle sits midway between s_(k) and the largest calibration score below it
   (``threshold_between``), so the served rule "abstain iff score > threshold"
   accepts exactly those cases, and a score recomputed in another batch (float32
   sums change in their last bits with batch composition) does not change sides.
   The bound below is for "accept scores below s_(k)"; the served rule differs
   from it only on scores inside that gap, where no calibration case lies (its
   expected population mass is one order-statistic spacing, 1/(n + 1)).

   The scores are the SERVED rule's (``demur.serve.core.decision.ServedRule``):
   a case the support check puts outside the training data scores +inf, so it
   abstains at every candidate, and every figure (abstain rate, accepted
   accuracy, the bound) is the served rule's. Each candidate's accepted-case error
   rate gets the one-sided Clopper-Pearson upper bound (Clopper & Pearson 1934),
   ``scipy.stats.beta.ppf(1 - level, e + 1, a - e)`` for e errors among a
   accepted. Why a bound at a data-chosen threshold is exact: given s_(k), the
   k - 1 cases below it are i.i.d. draws of the score law truncated at s_(k) (an
   order-statistic fact), so their error count is Binomial(k - 1, R(s_(k))),
   R(t) = P(error | score < t).

   ``"fixed_sequence"`` (default): Learn then Test with fixed-sequence testing
       (Angelopoulos, Bates, Candes, Jordan & Lei 2021). The candidates are tested
       in the grid's order, from the most conservative (fewest accepted) towards
       accepting everything, each at the full level delta; testing stops at the
       first failure and the last candidate passed is kept. No multiplicity price
       is paid. Caveat, stated plainly: the fixed-sequence family-wise proof is for
       thresholds fixed in advance; ours sit at fixed RANKS, so each bound is exact
       but the sequence's control is measured, not proved: tests/serve/
       test_calibration.py resamples calibration sets from a pool and counts how
       often the pool's accepted accuracy falls below A (population design).
   ``"bonferroni"``: every candidate bounded at level delta / m, the largest
       certified one kept (selective classification with guaranteed risk, Geifman
       & El-Yaniv 2017, with a union bound over the m grid points). Fully rigorous
       (the union bound needs only each candidate's own validity), hungrier for data.

   Monotone by construction: the grid and its order do not depend on A or delta,
   and each candidate's test passes for every A' < A and every delta' > delta if
   it passes for (A, delta); so if A is certified, every A' < A is (and every
   lower confidence), and the threshold chosen never shrinks as A or the
   confidence falls. Too few rows for the target even with no error
   (``minimum_rows``) is refused before any score is computed
   (``check_feasible``); otherwise, if no candidate is certified,
   ``CalibrationInfeasible`` gives the best figures achievable.

2. Target abstention rate r (``select_for_abstain``): the threshold is the
   ceil((n + 1)(1 - r))-th smallest calibration score s_(k) (written midway to the
   next larger one, ``threshold_between``; the support check's +inf scores count
   as abstentions, so r bounds the served rule's rate). By exchangeability a new
   case's score is <= it with probability >= ceil((n+1)(1-r))/(n+1) >= 1 - r,
   so the expected abstention rate is at most r (and at least r - 1/(n+1)
   for continuous scores): the finite-sample-corrected empirical quantile
   (the split-conformal quantile argument; Lei et al. 2018, and Vovk et al.
   2005 for the exchangeability lemma).

3. Regression intervals (``conformal_scale``): split conformal prediction
   with locally weighted residuals (Lei, G'Sell, Rinaldo, Tibshirani &
   Wasserman 2018, JASA, Section 5.2): R_i = |y_i - mean_i| / sd_i with sd the
   model's predictive standard deviation sqrt(epistemic + max(aleatoric,
   floor)) (``demur.serve.core.summary.conformal_variance``; the aleatoric floor, chosen
   on the validation split, keeps the interval from shrinking where the
   variance head extrapolates downwards); q = the ceil((n+1)(1-alpha))-th
   smallest R_i. Any scale fixed before the calibration split is seen keeps
   the guarantee: the served interval mean ± q * sd has marginal coverage
   >= 1 - alpha. serve/core/summary.py applies it (manifest ``target.conformal_q``
   at ``target.conformal_level``, ``target.aleatoric_floor``).

"""

from __future__ import annotations

import datetime as _dt
import functools
import hashlib
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import stats

from demur.serve.errors import CalibrationInfeasible, ConfigError

__all__ = [
    "DEFAULT_MAX_ABSTAIN",
    "MAX_CANDIDATES",
    "ThresholdChoice",
    "calibration_record",
    "batch_spread",
    "candidate_ranks",
    "check_feasible",
    "conformal_scale",
    "error_upper_bound",
    "fingerprint",
    "guarantee_text",
    "minimum_rows",
    "select_for_abstain",
    "select_for_accuracy",
    "threshold_between",
]

MAX_CANDIDATES = 50
"""Most thresholds searched when targeting an accuracy."""

METHODS = ("fixed_sequence", "bonferroni")

DEFAULT_MAX_ABSTAIN = 0.3
"""Abstention budget when none is given: at most 30% of cases to people (our choice)."""


# --------------------------------------------------------------------------- bounds


def error_upper_bound(errors: int | np.ndarray, n: int | np.ndarray, delta: float) -> np.ndarray:
    """One-sided Clopper-Pearson upper bound on an error rate, holding with probability
    >= 1 - delta: ``beta.ppf(1 - delta, e + 1, n - e)``; 1 where e = n (and for n = 0)."""
    e = np.asarray(errors, dtype=np.float64)
    m = np.asarray(n, dtype=np.float64)
    full = (e >= m) | (m <= 0)
    b = np.ones(np.broadcast(e, m).shape)
    ok = ~full
    if np.any(ok):
        ee, mm = np.broadcast_to(e, b.shape)[ok], np.broadcast_to(m, b.shape)[ok]
        b[ok] = stats.beta.ppf(1.0 - delta, ee + 1.0, mm - ee)
    return b


# --------------------------------------------------------------------------- threshold choice


@dataclass(frozen=True)
class ThresholdChoice:
    """A chosen threshold and what it achieved on the calibration set.

    ``curve`` lists every candidate searched: threshold, calibration coverage,
    accuracy and certified accuracy lower bound (``None`` where not tested).
    """

    method: str
    threshold: float
    n: int
    accepted: int
    errors: int
    abstain_rate: float
    accuracy: float | None
    accuracy_bound: float | None = None
    delta: float | None = None
    target: dict[str, float] = field(default_factory=dict)
    candidates: int = 0
    tested: int = 0
    curve: list[dict[str, Any]] = field(default_factory=list, repr=False)


def _check_fraction(name: str, value: float, *, closed: bool = False) -> float:
    v = float(value)
    ok = (0.0 <= v <= 1.0) if closed else (0.0 < v < 1.0)
    if not ok:
        raise ConfigError(f"{name} must be in {'[0, 1]' if closed else '(0, 1)'}; got {value}", field=name)
    return v


def candidate_ranks(n: int, max_abstain: float, max_candidates: int = MAX_CANDIDATES) -> np.ndarray:
    """The fixed grid: 1-based ranks k of the candidate thresholds s_(k), increasing.

    A function of n, ``max_abstain`` and ``max_candidates`` only -- never of the
    target, the confidence, the scores' values or the labels -- so the grid and the
    test order are set before anything is looked at. Rank k accepts the k - 1
    cases scored below s_(k); the first rank accepts ceil((1 - max_abstain) n)
    cases (the most conservative threshold the budget allows), the last n - 1.
    """
    a_lo = max(1, math.ceil((1.0 - max_abstain) * n - 1e-9))
    k_lo = min(n, a_lo + 1)
    count = min(max_candidates, n - k_lo + 1)
    return np.unique(np.linspace(k_lo, n, count).round().astype(np.int64))


def _zero_error_cases(target_accuracy: float, level: float) -> int:
    """Fewest error-free accepted cases whose Clopper-Pearson bound reaches the target:
    1 - level**(1/a) <= 1 - target  <=>  a >= ln(level) / ln(target)."""
    return math.ceil(math.log(level) / math.log(target_accuracy) - 1e-9)


@functools.lru_cache(maxsize=256)
def minimum_rows(target_accuracy: float, delta: float, *, max_abstain: float = DEFAULT_MAX_ABSTAIN,
                 method: str = "fixed_sequence", max_candidates: int = MAX_CANDIDATES) -> int:
    """Fewest calibration rows n with which the target can be certified at all (every
    accepted case correct). Fixed sequence: the FIRST candidate must pass, so it needs
    ceil((1 - max_abstain) n) >= a0(delta); Bonferroni: the LARGEST candidate (n - 1
    accepted) needs a0(delta / m). Checked before the model runs (``check_feasible``)."""
    def enough(n: int) -> bool:
        ranks = candidate_ranks(n, max_abstain, max_candidates)
        if method == "bonferroni":
            return int(ranks[-1]) - 1 >= _zero_error_cases(target_accuracy, delta / len(ranks))
        return int(ranks[0]) - 1 >= _zero_error_cases(target_accuracy, delta)

    hi = 2
    while not enough(hi):
        hi *= 2
        if hi > 2**40:
            raise CalibrationInfeasible(f"max_abstain {max_abstain} leaves no candidate with enough cases",
                                        field="max_abstain")
    lo = max(2, hi // 2)
    while lo < hi:  # smallest n that is enough (enough() is monotone in n for these grids)
        mid = (lo + hi) // 2
        lo, hi = (lo, mid) if enough(mid) else (mid + 1, hi)
    return lo


def check_feasible(n: int, target_accuracy: float, delta: float, *, max_abstain: float = DEFAULT_MAX_ABSTAIN,
                   method: str = "fixed_sequence") -> None:
    """Refuse, before any score is computed, a calibration set too small for the target."""
    _check_method(method)
    target_accuracy = _check_fraction("target_accuracy", target_accuracy)
    delta = _check_fraction("delta", delta)
    max_abstain = _check_fraction("max_abstain", max_abstain, closed=True)
    need = minimum_rows(target_accuracy, delta, max_abstain=max_abstain, method=method)
    if n < need:
        where = (f"the first threshold tested accepts {math.ceil((1 - max_abstain) * need - 1e-9)} of {need} "
                 f"cases (1 - max_abstain = {1 - max_abstain:.0%})" if method == "fixed_sequence"
                 else "every case accepted")
        raise CalibrationInfeasible(
            f"accepted-case accuracy {target_accuracy:.4g} with confidence {1 - delta:.4g} ({method}, "
            f"max_abstain {max_abstain:g}) needs at least {need} calibration rows even if every accepted case "
            f"is correct ({where}); got {n}. Calibrate on more labelled rows, or lower the target or the "
            "confidence" + (", or lower --max-abstain (the sequence starts at the most conservative allowed "
                              "threshold)" if method == "fixed_sequence" and max_abstain > 0.3 else ""),
            field="data",
        )


def _check_method(method: str) -> None:
    if method not in METHODS:
        raise ConfigError(f"method must be one of {', '.join(METHODS)}; got '{method}'", field="method")


def threshold_between(below: float, above: float) -> float:
    """A threshold strictly between two calibration scores ``below`` < ``above``: midway
    between them, so neither side is within float32 round-off of it. ``above`` may be +inf
    (every finite score accepted: the threshold sits 1e-3 of max(|below|, 1) above ``below``,
    scores are differences of float32 entropies, reproducible to about 1e-6) and ``below``
    -inf (nothing accepted: as far below ``above``)."""
    lo, hi = float(below), float(above)
    if not lo < hi:
        raise ValueError(f"threshold_between needs below < above; got {lo} and {hi}")
    if math.isinf(hi) and math.isinf(lo):
        return 0.0
    if math.isinf(hi):
        return lo + 1e-3 * max(abs(lo), 1.0)
    if math.isinf(lo):
        return hi - 1e-3 * max(abs(hi), 1.0)
    return lo + 0.5 * (hi - lo)


def _gaps(srt: np.ndarray, accepted: np.ndarray) -> np.ndarray:
    """For sorted scores ``srt`` and accepted counts a (the a smallest accepted), the
    threshold midway between srt[a - 1] and srt[a], per count."""
    lo = np.where(accepted > 0, srt[np.maximum(accepted - 1, 0)], -np.inf)
    hi = np.where(accepted < len(srt), srt[np.minimum(accepted, len(srt) - 1)], np.inf)
    return np.array([threshold_between(a, b) for a, b in zip(lo.tolist(), hi.tolist())])


def select_for_accuracy(
    scores: np.ndarray,
    correct: np.ndarray,
    target_accuracy: float,
    delta: float,
    *,
    max_abstain: float = DEFAULT_MAX_ABSTAIN,
    method: str = "fixed_sequence",
    max_candidates: int = MAX_CANDIDATES,
) -> ThresholdChoice:
    """The largest certified threshold on the fixed grid (see the module docstring):
    with probability >= 1 - ``delta`` over the calibration draw, accepted cases are at
    least ``target_accuracy`` correct in the population. ``scores``: float[n];
    ``correct``: bool[n]. Raises ``CalibrationInfeasible`` (best figures) if none is.
    """
    s = np.asarray(scores, dtype=np.float64).ravel()
    c = np.asarray(correct, dtype=bool).ravel()
    n = len(s)
    if n < 2 or len(c) != n or np.isnan(s).any() or (s == -np.inf).any():
        raise ConfigError(f"need >= 2 scores (finite, or +inf for a case the support check puts outside) with "
                          f"one correctness flag each; got {n} scores, {len(c)} flags", field="scores")
    check_feasible(n, target_accuracy, delta, max_abstain=max_abstain, method=method)
    srt = np.sort(s)
    ranks = candidate_ranks(n, max_abstain, max_candidates)
    cand = srt[ranks - 1]
    accepted = np.searchsorted(srt, cand, side="left")  # scores < candidate (ties can shrink it)
    errors = np.concatenate([[0], np.cumsum(~c[np.argsort(s, kind="stable")])])[accepted]
    m = len(cand)
    level = delta / m if method == "bonferroni" else delta
    acc_lower = 1.0 - error_upper_bound(errors, accepted, level)
    ok = acc_lower >= target_accuracy
    if method == "fixed_sequence":
        fails = np.flatnonzero(~ok)
        tested = int(fails[0]) + 1 if len(fails) else m
        certified = np.arange(m) < (tested - 1 if len(fails) else m)
    else:
        tested, certified = m, ok
    thresholds = _gaps(srt, accepted)
    curve = [
        {"threshold": float(thresholds[j]), "coverage": float(accepted[j] / n),
         "accuracy": float(1.0 - errors[j] / accepted[j]) if accepted[j] else None,
         "accuracy_bound": float(acc_lower[j]) if j < tested else None,
         "certified": bool(certified[j])}
        for j in range(m)
    ]
    if not certified.any():
        j = int(np.argmax(acc_lower[:tested]))
        how = (f"testing stops at the first failure; the first threshold accepts {accepted[0]} cases"
               if method == "fixed_sequence" else f"each of {m} candidates at level delta/{m}")
        raise CalibrationInfeasible(
            f"no threshold reaches accepted-case accuracy {target_accuracy:.4g} with confidence "
            f"{1 - delta:.4g} while abstaining on at most {max_abstain:.1%} of cases ({method}, {how}). "
            f"Best achievable: accuracy >= {acc_lower[j]:.4f} certified, at {1 - accepted[j] / n:.1%} "
            f"abstention ({accepted[j]} of {n} accepted, {int(errors[j])} wrong, observed accuracy "
            f"{(1 - errors[j] / max(accepted[j], 1)):.4f}). Lower the target or the confidence, or "
            "calibrate on more labelled cases",
            field="target_accuracy",
        )
    j = int(np.flatnonzero(certified)[-1])
    return ThresholdChoice(
        method=method, threshold=float(thresholds[j]), n=n, accepted=int(accepted[j]), errors=int(errors[j]),
        abstain_rate=float(1.0 - accepted[j] / n), accuracy=float(1.0 - errors[j] / accepted[j]),
        accuracy_bound=float(acc_lower[j]), delta=delta,
        target={"accuracy": float(target_accuracy), "max_abstain": float(max_abstain)},
        candidates=m, tested=tested, curve=curve,
    )


def batch_spread(accuracy: float, coverage: float, batch: int, target: float) -> dict[str, float]:
    """What one batch of ``batch`` future cases shows, if the population accepts a share
    ``coverage`` and is right on ``accuracy`` of what it accepts.

    The batch accepts A ~ Binomial(batch, coverage) cases, of which C | A ~ Binomial(A,
    accuracy) are right; the batch's accepted-case accuracy is C / A (batches with A = 0
    left out). Returns ``below`` = P(C / A < target) and the 5%, 50% and 95% points of
    C / A. Exact sums of scipy.stats.binom masses over the A and C within 12 standard
    deviations of their means (the rest has mass < 1e-30).
    """
    if batch < 1:
        raise ConfigError(f"batch must be a positive number of cases; got {batch}", field="batch")
    p, cov = min(max(float(accuracy), 0.0), 1.0), min(max(float(coverage), 0.0), 1.0)
    sd = math.sqrt(batch * cov * (1 - cov))
    a = np.arange(max(1, math.floor(batch * cov - 12 * sd - 1)), min(batch, math.ceil(batch * cov + 12 * sd + 1)) + 1)
    pa = stats.binom.pmf(a, batch, cov)
    pa = pa / pa.sum() if pa.sum() > 0 else pa
    below = float(np.sum(pa * stats.binom.cdf(np.ceil(target * a - 1e-9) - 1, a, p)))
    # quantiles of C / A: the mixture over a of Binomial(a, p) / a, on a grid of values
    sd_c = math.sqrt(a.max() * p * (1 - p))
    off = np.arange(-math.ceil(12 * sd_c) - 1, math.ceil(12 * sd_c) + 2)
    k = np.clip(np.round(a[:, None] * p) + off[None, :], 0, a[:, None])
    mass = pa[:, None] * stats.binom.pmf(k, a[:, None], p)
    mass = np.where(np.diff(np.c_[np.full(len(a), -1.0), k], axis=1) > 0, mass, 0.0)  # clipped repeats
    val, w = (k / a[:, None]).ravel(), mass.ravel()
    order = np.argsort(val, kind="stable")
    cum = np.cumsum(w[order]) / w.sum()
    q = {f"q{int(100 * t):02d}": float(val[order][min(np.searchsorted(cum, t), len(cum) - 1)])
         for t in (0.05, 0.5, 0.95)}
    return {"batch": int(batch), "accuracy": p, "coverage": cov, "target": float(target), "below": below, **q}


def guarantee_text(target_accuracy: float, delta: float) -> str:
    """The guarantee, stated exactly as the procedure proves it (CLI, report, README)."""
    return (f"With probability at least {1 - delta:.3g} over the draw of the calibration cases, the error rate "
            f"of accepted cases in the population the calibration cases were drawn from is at most "
            f"{1 - target_accuracy:.4g} (accepted-case accuracy at least {target_accuracy:.4g}). It is a "
            "statement about that population, not about any one batch or case, and not about inputs unlike "
            "the calibration cases.")


def _finite_sample_rank(n: int, level: float, what: str) -> int:
    k = math.ceil((n + 1) * level - 1e-12)
    if k > n:
        need = math.ceil(level / (1.0 - level) - 1e-12)
        raise CalibrationInfeasible(
            f"{what} needs at least {need} calibration cases for level {level:.4g}; got {n}",
            field="data",
        )
    return max(k, 1)


def select_for_abstain(scores: np.ndarray, rate: float, correct: np.ndarray | None = None) -> ThresholdChoice:
    """Accept the ceil((n+1)(1-rate)) smallest scores (ties at the k-th included): expected
    abstention <= rate. The threshold is midway to the next larger score; +inf scores (the
    support check's) always abstain, and a rate they alone exceed is ``CalibrationInfeasible``."""
    rate = _check_fraction("target_abstain", rate)
    raw = np.asarray(scores, dtype=np.float64).ravel()
    if np.isnan(raw).any() or (raw == -np.inf).any():
        raise ConfigError("scores must be finite, or +inf for a case the support check puts outside",
                          field="scores")
    s = np.sort(raw)
    n = len(s)
    k = _finite_sample_rank(n, 1.0 - rate, f"an abstention rate of {rate:.4g}")
    if math.isinf(s[k - 1]):
        outside = int(np.sum(np.isinf(s)))
        raise CalibrationInfeasible(
            f"the support check alone puts {outside} of the {n} calibration cases outside the training data "
            f"({outside / n:.1%}), more than the abstention rate {rate:.4g} allows; raise --target-abstain, or "
            "calibrate on rows like the training data", field="target_abstain")
    accepted = int(np.searchsorted(s, s[k - 1], side="right"))
    t = float(_gaps(s, np.array([accepted]))[0])
    acc_mask = raw <= t
    errors = int(np.sum(~np.asarray(correct, dtype=bool)[acc_mask])) if correct is not None else 0
    return ThresholdChoice(
        method="abstain_quantile", threshold=t, n=n, accepted=accepted, errors=errors,
        abstain_rate=float(1.0 - accepted / n),
        accuracy=(1.0 - errors / accepted) if correct is not None and accepted else None,
        target={"abstain_rate": rate},
    )


def conformal_scale(y: np.ndarray, mean: np.ndarray, sd: np.ndarray, alpha: float) -> float:
    """Split-conformal scale q (Lei et al. 2018): the ceil((n+1)(1-alpha))-th smallest
    |y - mean| / sd, so mean ± q sd covers a new case with probability >= 1 - alpha."""
    alpha = _check_fraction("alpha", alpha)
    r = np.abs(np.asarray(y, dtype=np.float64) - mean) / np.asarray(sd, dtype=np.float64)
    r = np.sort(r.ravel())
    k = _finite_sample_rank(len(r), 1.0 - alpha, f"a {1 - alpha:.4g} conformal interval")
    return float(r[k - 1])


# --------------------------------------------------------------------------- record


def fingerprint(*arrays: np.ndarray) -> str:
    """SHA-256 over each array's dtype, shape and C-order bytes: identifies the calibration data."""
    h = hashlib.sha256()
    for a in arrays:
        a = np.ascontiguousarray(a)
        h.update(f"{a.dtype.str}{list(a.shape)}".encode())
        h.update(a.tobytes())
    return h.hexdigest()


def calibration_record(choice: ThresholdChoice, *, score: str, data: dict[str, Any],
                       conformal: dict[str, Any] | None = None, now: _dt.datetime | None = None) -> dict[str, Any]:
    """The JSON record written under the manifest's ``decision.calibration``."""
    references = {
        "fixed_sequence": "Learn then Test, fixed-sequence testing (Angelopoulos et al. 2021); "
                          "one-sided Clopper-Pearson bound per candidate",
        "bonferroni": "selective classification with guaranteed risk (Geifman & El-Yaniv 2017); "
                      "Clopper-Pearson bound, union bound over candidates",
        "abstain_quantile": "finite-sample corrected empirical quantile of the score (split-conformal argument)",
    }
    rec: dict[str, Any] = {
        "method": choice.method,
        "reference": references.get(choice.method, ""),
        "score": score,
        "threshold": choice.threshold,
        "target": dict(choice.target),
        "delta": choice.delta,
        "confidence": None if choice.delta is None else 1.0 - choice.delta,
        "n": choice.n,
        "achieved": {
            "accepted": choice.accepted,
            "abstain_rate": choice.abstain_rate,
            "accuracy": choice.accuracy,
        },
        "bound": None if choice.accuracy_bound is None else {
            "accuracy_lower": choice.accuracy_bound, "candidates": choice.candidates, "tested": choice.tested,
        },
        "data": dict(data),
        "date": (now or _dt.datetime.now(_dt.timezone.utc)).isoformat(timespec="seconds"),
    }
    if choice.accuracy_bound is not None and choice.delta is not None:
        rec["guarantee"] = guarantee_text(choice.target["accuracy"], choice.delta)
    if conformal is not None:
        rec["conformal"] = dict(conformal)
    return rec
