"""From Monte-Carlo weight draws to predictive summaries: pure numpy, no framework.

The engine hands over ``draws: float[S, B, K]`` (S weight draws, B cases, K
outputs). This module turns them into what a caller acts on. Everything is
vectorised over draws, cases and classes; there is no Python loop over cases.

Classification (``K`` logits per draw)
    p_s = softmax(logits_s), computed as exp(log-softmax) with log-sum-exp.
    ``mean_probs``          p̄ = (1/S) Σ_s p_s                          [B, K]
    ``prediction``          argmax_k p̄                                 [B]
    ``lower`` / ``upper``   per-class quantiles of p_s over the draws at
                            (1-level)/2 and (1+level)/2                 [B, K]
    ``predictive_entropy``  H[p̄] = -Σ_k p̄_k ln p̄_k                    [B]
    ``expected_entropy``    (1/S) Σ_s H[p_s]                           [B]
    ``mutual_information``  H[p̄] - (1/S) Σ_s H[p_s]                   [B]
        the BALD decomposition of Houlsby et al. (2011), eq. (1): the mutual
        information between the label and the weights under the S-draw
        posterior sample. It is >= 0 by Jensen's inequality; values at or
        below 16 eps x max(H[p̄], 1) can only be float round-off (of order
        1e-16) and are set to 0, so identical draws (the means graph) give 0.
    ``one_minus_max_prob``  1 - max_k p̄_k                              [B]
    ``joint_rank``          max(u_PE, u_MI): the larger of the case's two
                            ranks among clean reference cases, by predictive
                            entropy and by mutual information (below).   [B]

Temperature (classification): the manifest's ``target`` may carry
``temperature`` T > 0 (written by ``demur train``: fitted on the validation
split by minimising the NLL of the mixture's predictive mean, Guo et al., "On
Calibration of Modern Neural Networks", ICML 2017, section 4.2). The served
mean is then p̄_T = softmax(ln p̄ / T), and ``prediction`` (unchanged: the map
keeps the order), ``predictive_entropy`` and ``one_minus_max_prob`` are of
p̄_T; ``lower`` / ``upper`` go through the same map (p^(1/T) / Σ_k p̄_k^(1/T),
capped at 1), so they still bracket the served mean. ``expected_entropy`` and
``mutual_information`` stay the draws' own: MI measures how much the draws
disagree, which a temperature on their mean does not change. Why on the mean
and not on each draw: a wide posterior is underconfident because its draws
disagree and their average is flat; sharpening the average restores clean-case
confidence without narrowing the draws (issue 26). Without the key T = 1 and
nothing changes. Calibrate, evaluate and the server all call ``summarise``
with the manifest's ``target``, so the temperature is applied identically.

Joint rank (classification): ``target.score_reference`` holds, for
``predictive_entropy`` and ``mutual_information``, the quantiles at levels
0, 0.01, ..., 1 of that score over clean reference cases (``demur train``: the
training and validation rows, through the trained model's draws; a fixed
function of the case, never fitted on the calibration rows, so calibrate's
guarantee holds as for any other score). u(x) is the level at x by linear
interpolation between the quantiles (a rank in [0, 1]); above the top quantile
u = 1 + (x - q_1) / (q_1 - q_0.5), so far-off cases keep their order instead
of tying at 1. The score is the larger of u_PE and u_MI: a case is as unusual
as its more unusual signal, ambiguity or disagreement between draws. Without
a reference the field is None and the score is refused by name.

Regression (``K = 2``: mean and log-variance in standardised target units)
    Each draw is a Gaussian N(mu_s, var_s); in target units
    mu_s = m_s * scale + center and var_s = exp(v_s) * scale**2.
    ``mean``                mixture mean (1/S) Σ_s mu_s                 [B]
    ``epistemic_var``       variance of the draw means (1/S) Σ_s (mu_s - mean)^2
    ``aleatoric_var``       mean of the draw variances (1/S) Σ_s var_s
    ``total_var``           epistemic + aleatoric (the mixture's variance)
    ``lower`` / ``upper``   the equal-tailed quantiles of the Gaussian mixture
                            itself, solved numerically (safeguarded Newton on
                            the mixture CDF, bracketed by the component
                            quantiles) -- not a normal approximation. With one
                            draw it is exactly scipy.stats.norm.ppf.
    ``interval_width``      upper - lower                               [B]
    ``epistemic_std``       sqrt(epistemic_var), target units           [B]
    ``expected_entropy``    (1/S) Σ_s ½ ln(2πe var_s): exact mean differential
                            entropy of the draws, nats
    ``predictive_entropy``  ½ ln(2πe total_var): the entropy of the moment-
                            matched Gaussian, an UPPER BOUND on the mixture's
                            differential entropy (a Gaussian has the largest
                            entropy for a given variance)
    ``mutual_information``  predictive_entropy - expected_entropy
                            = ½ ln total_var - (1/S) Σ_s ½ ln var_s, nats.
        What it is, precisely: an upper bound on the mutual information between
        the target y and the weight draw s under the S-draw mixture,
        I(y; s) = H[mixture] - E_s H[N(mu_s, var_s)] <= this value. It is >= 0
        (Jensen: mean ln var_s <= ln aleatoric_var <= ln total_var), is 0 when
        all draws agree, and does not depend on the target's units. It is
        deliberately not ½ ln(total/aleatoric): that quantity is the exact
        mutual information only of a homoscedastic Gaussian model and can be 0
        while I(y; s) > 0 (draws with equal means but different variances).
        Entropies of continuous targets are differential entropies; they
        depend on the target's units and may be negative.

Conformal intervals: after ``demur calibrate`` on a regression bundle the
manifest's ``target`` holds ``conformal_q`` and ``conformal_level``. When the
requested level equals ``conformal_level`` the served interval is
``mean ± conformal_q * sqrt(total_var)`` (split-conformal, Lei et al. 2018,
with the normalised residual |y - mean| / sqrt(total_var)); at any other
level the model's own mixture interval is served. ``interval_method`` says
which.

Conformal score: ``target.conformal_score`` names the residual the scale q was
computed on: "normalised" (default: |y - mean| / sd, the interval mean ± q sd
follows the model's own spread) or "absolute" (|y - mean|: mean ± q, one width
for every case). ``demur calibrate`` picks the narrower at equal coverage.

Aleatoric floor: the manifest's ``target`` may also carry ``aleatoric_floor``
(target units squared, written by ``demur calibrate``). The conformal interval
then uses ``sqrt(epistemic_var + max(aleatoric_var, aleatoric_floor))`` per
case instead of ``sqrt(total_var)``. Why: a heteroscedastic head's log-variance
extrapolates freely outside the training data (measured on load_diabetes: the
aleatoric sd fell from about 48 to 3 target units), so the interval shrank
exactly where the model knows least. Nothing seen in training says the noise
vanishes there; the floor (the median aleatoric variance of held-out inputs)
says "at least the typical noise". The conformal ``q`` is computed on the
floored scale, so split-conformal coverage holds as before (any fixed scale
function is valid, Lei et al. 2018, section 2.2). The floor touches only the
interval: ``aleatoric_var``, ``total_var`` and the entropies stay the model's
own, so the epistemic decision scores are unchanged. Without the key (or
without ``conformal_q``) results are identical to the unfloored ones.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.special import ndtr, ndtri

from demur.serve.errors import ConfigError, InvalidInput

__all__ = [
    "CONFORMAL_SCORES",
    "UNIT",
    "ClassificationSummary",
    "RegressionSummary",
    "Summary",
    "classification_summary",
    "conformal_variance",
    "joint_rank",
    "mixture_quantile",
    "regression_components",
    "regression_summary",
    "summarise",
]

UNIT = "nats"
"""Unit of every entropy and of mutual information (natural logarithms)."""

_LOG_VAR_LIMIT = 60.0
"""Log-variances (standardised units) are clipped to ±this before exp(), so a
wild draw gives a huge but finite variance instead of an overflow."""

_LN_2PIE = float(np.log(2.0 * np.pi * np.e))

_ROUND_OFF = 16 * float(np.finfo(np.float64).eps)
"""Classification mutual information at or below this share of max(H[p̄], 1) nats (3.6e-15) is
float round-off (float64 sums of the same terms differ by ~1e-16 relative) and is reported as 0."""


@dataclass(frozen=True)
class ClassificationSummary:
    """Per-case summaries of S draws of K-class logits (all float64; entropies in nats)."""

    level: float
    draws: int
    mean_probs: np.ndarray  # [B, K]
    prediction: np.ndarray  # int64[B], index into the bundle's labels
    lower: np.ndarray  # [B, K]
    upper: np.ndarray  # [B, K]
    predictive_entropy: np.ndarray  # [B]
    expected_entropy: np.ndarray  # [B]
    mutual_information: np.ndarray  # [B]
    one_minus_max_prob: np.ndarray  # [B]
    joint_rank: np.ndarray | None = None  # [B], with a score reference only
    temperature: float = 1.0
    task: str = "classification"
    unit: str = UNIT

    def __len__(self) -> int:
        return int(self.prediction.shape[0])


@dataclass(frozen=True)
class RegressionSummary:
    """Per-case summaries of S Gaussian draws, in target units (entropies in nats)."""

    level: float
    draws: int
    mean: np.ndarray  # [B]
    epistemic_var: np.ndarray  # [B]
    aleatoric_var: np.ndarray  # [B]
    total_var: np.ndarray  # [B]
    lower: np.ndarray  # [B]
    upper: np.ndarray  # [B]
    interval_width: np.ndarray  # [B]
    epistemic_std: np.ndarray  # [B]
    predictive_entropy: np.ndarray  # [B], moment-matched Gaussian bound
    expected_entropy: np.ndarray  # [B]
    mutual_information: np.ndarray  # [B], upper bound, see module docstring
    interval_method: str = "mixture"  # "mixture" or "conformal"
    task: str = "regression"
    unit: str = UNIT

    @property
    def prediction(self) -> np.ndarray:
        """The point prediction: the mixture mean [B]."""
        return self.mean

    def __len__(self) -> int:
        return int(self.mean.shape[0])


Summary = ClassificationSummary | RegressionSummary


def _check_draws(draws: np.ndarray, k: int | None = None, *, cast: bool = True) -> np.ndarray:
    """``draws`` as an array of shape [S >= 1, B, K]: float64, or with ``cast=False`` float32
    kept as it is (the caller converts it in its own copy)."""
    a = np.asarray(draws)
    if cast or a.dtype not in (np.float32, np.float64):
        a = np.asarray(a, dtype=np.float64)
    if a.ndim != 3:
        raise InvalidInput(f"draws must be a 3-d array [S, B, K]; got shape {list(a.shape)}", field="draws")
    if a.shape[0] < 1:
        raise InvalidInput("draws must hold at least one draw (S >= 1); got S = 0", field="draws")
    if k is not None and a.shape[2] != k:
        raise InvalidInput(f"draws must have K = {k} outputs; got {a.shape[2]}", field="draws")
    return a


def _quantiles(a: np.ndarray, probs: tuple[float, ...]) -> np.ndarray:
    """Quantiles along ``a``'s last axis, which this SORTS IN PLACE (pass a scratch array):
    numpy's default 'linear' rule (h = (S - 1) q, interpolate between order statistics
    floor(h) and floor(h) + 1), the same values as np.quantile(a, probs, axis=-1), for all
    probs at once (the quantile axis first, then ``a``'s other axes in order).

    Why the last axis, in place: numpy sorts a strided axis one gathered slice at a time;
    on the demo's p [K=10, B=1,024, S=30] sorting contiguous rows of draws measured ~2x
    faster than the sort along the middle axis of [K, S, B] (a partition at the 4 needed
    ranks, and a min/max selection network over the draws, measured slower than either)."""
    a.sort(axis=-1)
    n = a.shape[-1]
    out = []
    for q in probs:
        h = (n - 1) * q
        lo = int(np.floor(h))
        hi = min(lo + 1, n - 1)
        out.append(a[..., lo] + (h - lo) * (a[..., hi] - a[..., lo]))
    return np.stack(out)


def _rows(op: np.ufunc, a: np.ndarray) -> np.ndarray:
    """``op.reduce(a, axis=0)`` for a few long rows (the K classes), one row at a time:
    numpy's reduction over a short leading axis measured ~4x slower here."""
    out = a[0].copy()
    for row in a[1:]:
        op(out, row, out=out)
    return out


def _check_level(level: float) -> float:
    level = float(level)
    if not 0.0 < level < 1.0:
        raise ConfigError(f"interval level must be in (0, 1); got {level}", field="interval_level")
    return level


def classification_summary(logits: np.ndarray, level: float = 0.9, *, temperature: float = 1.0,
                           reference: Mapping[str, Any] | None = None) -> ClassificationSummary:
    """Summarise ``logits: float[S, B, K]`` (see the module docstring for each field).

    ``temperature`` T > 0 sharpens (T < 1) or softens the served mean; ``reference`` (the
    manifest's ``target.score_reference``) enables ``joint_rank``. Module docstring, both.

    Example::

        s = classification_summary(np.zeros((8, 3, 10)), 0.9)
        s.mutual_information   # array([0., 0., 0.]): every draw agrees
    """
    z = _check_draws(logits, cast=False)
    level = _check_level(level)
    n_draws = z.shape[0]
    if z.shape[2] < 2:
        raise InvalidInput(f"a classifier needs K >= 2 logits; got {z.shape[2]}", field="draws")

    n_cases, k = z.shape[1], z.shape[2]
    # Class axis first, [K, B*S] (draws last): every reduction over classes is then K
    # whole-row operations (_rows), exp runs once over the draws (measured ~2.5x faster
    # than reducing over a trailing axis of 10 at S = 32, B = 64), and each case's draws of
    # a class are contiguous for the quantiles' sort. One float64 copy, changed in place below.
    zk = np.array(z.transpose(2, 1, 0), dtype=np.float64, order="C").reshape(k, -1)
    zk -= _rows(np.maximum, zk)                            # shift by the max logit: exp <= 1
    p = np.exp(zk)
    total = _rows(np.add, p)                               # [B*S], >= 1
    p /= total                                             # softmax [K, B*S]
    zk -= np.log(total)                                    # log-softmax, finite where p underflows
    # Σ_k p ln p from log p: finite even where p underflows to 0.
    zk *= p
    # entropies >= 0: np.maximum also turns the -0.0 of a negated zero sum into 0.0 for the response
    expected_entropy = np.maximum(-_rows(np.add, zk).reshape(n_cases, n_draws).mean(axis=1), 0.0)  # [B]
    p = p.reshape(k, n_cases, n_draws)
    mean_probs = p.mean(axis=2)                            # [K, B], p̄
    log_mean = np.log(np.where(mean_probs > 0.0, mean_probs, 1.0))  # 0 ln 0 = 0 where every draw underflowed
    predictive_entropy = np.maximum(-_rows(np.add, mean_probs * log_mean), 0.0)
    mutual_information = predictive_entropy - expected_entropy
    # Round-off of the difference (two sums of the same terms when every draw agrees, e.g. the
    # means graph) is set to 0: ~1e-17 nats of noise must not rank cases or meet a threshold.
    mutual_information[mutual_information <= _ROUND_OFF * np.maximum(predictive_entropy, 1.0)] = 0.0
    q = _quantiles(p, ((1.0 - level) / 2.0, (1.0 + level) / 2.0))  # [2, K, B]; sorts p
    t = _check_temperature(temperature)
    if t != 1.0:  # p -> p^(1/T) / sum_k mean_k^(1/T), in logs (module docstring)
        with np.errstate(divide="ignore", invalid="ignore"):
            tempered = np.log(mean_probs) / t              # [K, B], -inf where every draw underflowed
            top = tempered.max(axis=0)
            log_z = np.log(_rows(np.add, np.exp(tempered - top))) + top
            tempered -= log_z
            mean_probs = np.exp(tempered)
            predictive_entropy = np.maximum(-_rows(np.add, np.where(mean_probs > 0.0, mean_probs * tempered, 0.0)),
                                            0.0)
            q = np.minimum(np.exp(np.log(q) / t - log_z), 1.0)
    mean_probs = np.ascontiguousarray(mean_probs.T)       # [B, K]
    q = np.ascontiguousarray(np.moveaxis(q, 1, 2))         # [2, B, K]
    return ClassificationSummary(
        level=level,
        draws=n_draws,
        mean_probs=mean_probs,
        prediction=np.argmax(mean_probs, axis=1),
        lower=q[0],
        upper=q[1],
        predictive_entropy=predictive_entropy,
        expected_entropy=expected_entropy,
        mutual_information=mutual_information,
        one_minus_max_prob=1.0 - np.max(mean_probs, axis=1),
        joint_rank=None if reference is None else joint_rank(predictive_entropy, mutual_information, reference),
        temperature=t,
    )


def _check_temperature(value: Any) -> float:
    try:
        t = float(value)
    except (TypeError, ValueError):
        t = float("nan")
    if not (np.isfinite(t) and t > 0.0):
        raise ConfigError(f"target.temperature must be a finite number > 0; got {value!r}", field="target.temperature")
    return t


def _rank(x: np.ndarray, knots: Any, name: str) -> np.ndarray:
    """u(x) for the quantile ``knots`` of one score (module docstring, "Joint rank")."""
    try:
        q = np.asarray(knots, dtype=np.float64)
    except (TypeError, ValueError):
        q = np.array([np.nan])
    if q.ndim != 1 or len(q) < 3 or not np.all(np.isfinite(q)) or np.any(np.diff(q) < 0):
        raise ConfigError(f"target.score_reference.{name} must be at least 3 finite quantiles in increasing "
                          "order", field=f"target.score_reference.{name}")
    levels = np.linspace(0.0, 1.0, len(q))
    top, mid = q[-1], float(np.interp(0.5, levels, q))
    # equal quantiles (a score that is often exactly 0): keep the highest level of each value
    keep = np.r_[np.diff(q) > 0, True]
    u = np.interp(x, q[keep], levels[keep])
    spread = max(top - mid, 1e-12 * max(1.0, abs(top)))
    return np.where(x > top, 1.0 + (x - top) / spread, u)


def joint_rank(predictive_entropy: np.ndarray, mutual_information: np.ndarray,
               reference: Mapping[str, Any]) -> np.ndarray:
    """max(u_PE, u_MI) per case, float64[B]: the larger of the two ranks among the reference
    cases (``reference``: quantiles per score name; module docstring, "Joint rank")."""
    missing = [n for n in ("predictive_entropy", "mutual_information") if n not in reference]
    if missing:
        raise ConfigError(f"target.score_reference needs quantiles of {missing}",
                          field="target.score_reference")
    return np.maximum(_rank(np.asarray(predictive_entropy, dtype=np.float64), reference["predictive_entropy"],
                            "predictive_entropy"),
                      _rank(np.asarray(mutual_information, dtype=np.float64), reference["mutual_information"],
                            "mutual_information"))


def mixture_quantile(mu: np.ndarray, sd: np.ndarray, prob: float, *, tol: float = 1e-12,
                     max_iter: int = 100) -> np.ndarray:
    """Quantile at ``prob`` of the equal-weight Gaussian mixture of ``mu, sd: float[S, B]``.

    Solves (1/S) Σ_s Φ((y - mu_s)/sd_s) = prob for y, per case. The root lies
    between the smallest and largest component quantile (at the smallest every
    component CDF is <= prob, at the largest >= prob), which brackets a
    safeguarded Newton iteration: a Newton step that leaves the bracket is
    replaced by bisection. With S = 1 the bracket is a single point, so the
    result is exactly ``mu + sd * ndtri(prob)`` (scipy.stats.norm.ppf).
    Returns float[B].
    """
    mu = np.asarray(mu, dtype=np.float64)
    sd = np.asarray(sd, dtype=np.float64)
    z = float(ndtri(prob))
    comp = mu + sd * z  # [S, B]
    lo = comp.min(axis=0)
    hi = comp.max(axis=0)
    y = np.where(lo == hi, lo, mu.mean(axis=0).clip(lo, hi))
    active = lo < hi
    for _ in range(max_iter):
        if not active.any():
            break
        u = (y[None, :] - mu) / sd
        f = ndtr(u).mean(axis=0) - prob
        dens = (np.exp(-0.5 * u * u) / (sd * np.sqrt(2.0 * np.pi))).mean(axis=0)
        lo = np.where(f < 0, y, lo)
        hi = np.where(f > 0, y, hi)
        done = (np.abs(f) <= tol) | (hi - lo <= 4 * np.finfo(np.float64).eps * np.maximum(1.0, np.abs(y)))
        active &= ~done
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            step = y - f / dens
        inside = np.isfinite(step) & (step > lo) & (step < hi)
        y = np.where(active, np.where(inside, step, 0.5 * (lo + hi)), y)
    return y


def conformal_variance(
    epistemic_var: np.ndarray, aleatoric_var: np.ndarray, aleatoric_floor: float | None = None
) -> np.ndarray:
    """The variance that scales the conformal interval, per case (target units squared):
    ``epistemic_var + max(aleatoric_var, aleatoric_floor)``, or ``total_var`` with no floor.
    ``demur calibrate`` normalises residuals by its square root, so q and the served
    interval use one definition."""
    if aleatoric_floor is None:
        return epistemic_var + aleatoric_var
    floor = float(aleatoric_floor)
    if not (np.isfinite(floor) and floor >= 0.0):
        raise ConfigError(
            f"target.aleatoric_floor must be a finite number >= 0 (target units squared); got {aleatoric_floor!r}",
            field="target.aleatoric_floor",
        )
    return epistemic_var + np.maximum(aleatoric_var, floor)


def regression_components(draws: np.ndarray, target_center: float = 0.0,
                          target_scale: float = 1.0) -> tuple[np.ndarray, np.ndarray]:
    """(mu, sd) of each draw's Gaussian in target units, float64[S, B] each, from ``draws:
    float[S, B, 2]`` (mean, log-variance in standardised units): the predictive law is their
    equal-weight mixture (``demur evaluate`` scores it: CRPS, NLL, PIT)."""
    d = np.asarray(draws, dtype=np.float64)
    scale = float(target_scale)
    mu = d[:, :, 0] * scale + float(target_center)
    sd = np.exp(0.5 * np.clip(d[:, :, 1], -_LOG_VAR_LIMIT, _LOG_VAR_LIMIT)) * scale
    return mu, sd


def regression_summary(
    draws: np.ndarray,
    level: float = 0.9,
    target_center: float = 0.0,
    target_scale: float = 1.0,
    *,
    conformal_q: float | None = None,
    aleatoric_floor: float | None = None,
    conformal_score: str = "normalised",
) -> RegressionSummary:
    """Summarise ``draws: float[S, B, 2]`` (mean, log-variance; standardised units).

    ``conformal_q``, if given, replaces the mixture interval by
    ``mean ± conformal_q * sqrt(epistemic_var + max(aleatoric_var, aleatoric_floor))``
    (``aleatoric_floor`` in target units squared, default none: ``sqrt(total_var)``);
    see the module docstring. The floor is used only with ``conformal_q``. ``conformal_score``
    "absolute" serves ``mean ± conformal_q`` instead (q in target units; the plain absolute
    residual, chosen by ``demur calibrate`` when it gives the narrower interval).
    """
    d = _check_draws(draws, k=2)
    level = _check_level(level)
    scale = float(target_scale)
    if not scale > 0:
        raise ConfigError(f"target scale must be positive; got {target_scale}", field="target.scale")
    mu, sd = regression_components(d, float(target_center), scale)  # [S, B], target units
    var = sd * sd
    log_var = np.clip(d[:, :, 1], -_LOG_VAR_LIMIT, _LOG_VAR_LIMIT) + 2.0 * np.log(scale)

    mean = mu.mean(axis=0)
    epistemic_var = np.mean((mu - mean) ** 2, axis=0)
    aleatoric_var = var.mean(axis=0)
    total_var = epistemic_var + aleatoric_var
    expected_entropy = 0.5 * (_LN_2PIE + log_var.mean(axis=0))
    predictive_entropy = 0.5 * (_LN_2PIE + np.log(total_var))
    mutual_information = np.maximum(predictive_entropy - expected_entropy, 0.0)

    if conformal_q is not None and conformal_score == "absolute":
        half = np.full_like(mean, float(conformal_q))
        lower, upper, method = mean - half, mean + half, "conformal"
    elif conformal_q is not None:
        half = float(conformal_q) * np.sqrt(conformal_variance(epistemic_var, aleatoric_var, aleatoric_floor))
        lower, upper, method = mean - half, mean + half, "conformal"
    else:
        lower = mixture_quantile(mu, sd, (1.0 - level) / 2.0)
        upper = mixture_quantile(mu, sd, (1.0 + level) / 2.0)
        method = "mixture"
    return RegressionSummary(
        level=level,
        draws=d.shape[0],
        mean=mean,
        epistemic_var=epistemic_var,
        aleatoric_var=aleatoric_var,
        total_var=total_var,
        lower=lower,
        upper=upper,
        interval_width=upper - lower,
        epistemic_std=np.sqrt(epistemic_var),
        predictive_entropy=predictive_entropy,
        expected_entropy=expected_entropy,
        mutual_information=mutual_information,
        interval_method=method,
    )


def summarise(task: str, draws: np.ndarray, level: float, target: Mapping[str, Any] | None = None) -> Summary:
    """Dispatch on the bundle's task. ``target`` is the manifest's ``target`` section
    ({"center", "scale"} and, after conformal calibration, "conformal_q",
    "conformal_level" and optionally "aleatoric_floor"); for classification its
    optional "temperature" and "score_reference" (module docstring).
    """
    if task == "classification":
        target = target or {}
        return classification_summary(draws, level, temperature=target.get("temperature", 1.0),
                                      reference=target.get("score_reference"))
    if task == "regression":
        target = target or {}
        q = target.get("conformal_q")
        q_level = target.get("conformal_level")
        use_q = q is not None and q_level is not None and abs(float(q_level) - float(level)) < 1e-9
        return regression_summary(
            draws,
            level,
            float(target.get("center", 0.0)),
            float(target.get("scale", 1.0)),
            conformal_q=float(q) if use_q else None,
            aleatoric_floor=_floor_of(target) if use_q else None,
            conformal_score=_score_of(target),
        )
    raise ConfigError(f"task must be 'classification' or 'regression'; got '{task}'", field="task")


CONFORMAL_SCORES = ("normalised", "absolute")
"""Conformal residuals a bundle may record (``target.conformal_score``; absent: "normalised")."""


def _score_of(target: Mapping[str, Any]) -> str:
    value = target.get("conformal_score", "normalised")
    if value not in CONFORMAL_SCORES:
        raise ConfigError(f"target.conformal_score must be one of {', '.join(CONFORMAL_SCORES)}; got {value!r}",
                          field="target.conformal_score")
    return str(value)


def _floor_of(target: Mapping[str, Any]) -> float | None:
    value = target.get("aleatoric_floor")
    if value is None:
        return None
    try:
        return float(value)
    except (TypeError, ValueError):
        raise ConfigError(
            f"target.aleatoric_floor must be a number (target units squared); got {value!r}",
            field="target.aleatoric_floor",
        ) from None
