"""serve/core/summary.py against references outside demur.

References: scipy.special.softmax + scipy.stats.entropy (entropies), the BALD
decomposition of Houlsby et al. (2011) eq. (1) (MI = H[mean p] - mean H[p_s]),
scipy.stats.norm.ppf (one-draw quantiles), a brute-force Monte Carlo of the
Gaussian mixture (mixture quantiles), and numerical quadrature of the mixture
entropy (the regression MI bound).
"""

from __future__ import annotations

import ast
import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from scipy import integrate, special, stats

import demur.serve.core.summary as summary_mod
from demur.serve.errors import ConfigError, InvalidInput
from demur.serve.core.summary import (
    ClassificationSummary,
    RegressionSummary,
    classification_summary,
    mixture_quantile,
    regression_summary,
    summarise,
)

EPS = np.finfo(np.float64).eps

logit_arrays = arrays(
    np.float64,
    st.tuples(st.integers(1, 12), st.integers(1, 6), st.integers(2, 11)),
    elements=st.floats(-30, 30, allow_nan=False, allow_infinity=False),
)


def test_no_framework_imports():
    """STYLE.md rule 2: the numerics import neither flask nor onnxruntime (nor torch)."""
    tree = ast.parse(Path(summary_mod.__file__).read_text())
    names = {a.name.split(".")[0] for n in ast.walk(tree) if isinstance(n, ast.Import) for a in n.names}
    names |= {(n.module or "").split(".")[0] for n in ast.walk(tree) if isinstance(n, ast.ImportFrom)}
    assert not names & {"flask", "onnxruntime", "torch", "export"}


def test_entropies_match_scipy_on_random_draws():
    """Reference: scipy.special.softmax and scipy.stats.entropy (natural log); to 1e-9."""
    rng = np.random.default_rng(7)
    logits = rng.normal(scale=4.0, size=(64, 20, 10))
    s = classification_summary(logits, 0.9)
    p = special.softmax(logits, axis=2)
    mean_p = p.mean(axis=0)
    predictive = stats.entropy(mean_p, axis=1)
    expected = stats.entropy(p, axis=2).mean(axis=0)
    np.testing.assert_allclose(s.mean_probs, mean_p, atol=1e-12)
    np.testing.assert_allclose(s.predictive_entropy, predictive, atol=1e-9)
    np.testing.assert_allclose(s.expected_entropy, expected, atol=1e-9)
    np.testing.assert_allclose(s.mutual_information, predictive - expected, atol=1e-9)
    np.testing.assert_array_equal(s.prediction, mean_p.argmax(axis=1))
    np.testing.assert_allclose(s.one_minus_max_prob, 1 - mean_p.max(axis=1), atol=1e-12)
    assert s.unit == "nats"


def test_interval_is_numpy_quantile_of_per_draw_probabilities():
    """Reference: numpy.quantile (linear interpolation) of softmax probabilities over draws."""
    rng = np.random.default_rng(3)
    logits = rng.normal(size=(40, 5, 4))
    s = classification_summary(logits, 0.8)
    p = special.softmax(logits, axis=2)
    np.testing.assert_allclose(s.lower, np.quantile(p, 0.1, axis=0), atol=1e-12)
    np.testing.assert_allclose(s.upper, np.quantile(p, 0.9, axis=0), atol=1e-12)
    assert np.all(s.lower <= s.upper)


def test_extreme_logits_stay_finite():
    """Log-sum-exp softmax: logits of ±1e4 must not overflow (common practice)."""
    logits = np.array([[[1e4, -1e4, 0.0]], [[-1e4, 1e4, 0.0]]])
    s = classification_summary(logits, 0.9)
    assert np.all(np.isfinite(s.predictive_entropy)) and np.all(np.isfinite(s.mutual_information))
    # two confident draws that disagree: MI = ln 2 (Houlsby et al. 2011, eq. 1, worked by hand)
    assert s.mutual_information[0] == pytest.approx(math.log(2), abs=1e-12)


@settings(max_examples=200, deadline=None)
@given(logit_arrays)
def test_decomposition_properties(logits):
    """BALD decomposition (Houlsby et al. 2011, eq. 1): predictive = expected + MI
    (to float eps), MI >= 0 (Jensen), MI <= ln K."""
    s = classification_summary(logits, 0.9)
    k = logits.shape[2]
    tol = 64 * EPS * max(1.0, math.log(k))
    assert np.all(s.mutual_information >= 0.0)
    assert np.all(np.abs(s.predictive_entropy - (s.expected_entropy + s.mutual_information)) <= tol)
    assert np.all(s.predictive_entropy <= math.log(k) + tol)
    assert np.all(s.mutual_information <= math.log(k) + tol)


@settings(max_examples=200, deadline=None)
@given(
    arrays(np.float64, st.tuples(st.integers(1, 6), st.integers(2, 11)),
           elements=st.floats(-30, 30, allow_nan=False, allow_infinity=False)),
    st.integers(1, 16),
)
def test_mi_is_zero_when_all_draws_agree(one_draw, n_draws):
    """Houlsby et al. (2011): MI = 0 when every posterior draw gives the same distribution."""
    logits = np.broadcast_to(one_draw, (n_draws, *one_draw.shape))
    s = classification_summary(logits, 0.9)
    assert np.all(s.mutual_information <= 64 * EPS)
    np.testing.assert_allclose(s.lower, s.upper, atol=1e-15)


def test_bad_shapes_are_named():
    with pytest.raises(InvalidInput, match="3-d"):
        classification_summary(np.zeros((3, 4)), 0.9)
    with pytest.raises(InvalidInput, match="K = 2"):
        regression_summary(np.zeros((3, 4, 3)), 0.9)
    with pytest.raises(ConfigError, match="level"):
        classification_summary(np.zeros((3, 4, 2)), 1.0)
    with pytest.raises(ConfigError, match="task"):
        summarise("ranking", np.zeros((3, 4, 2)), 0.9)


# --------------------------------------------------------------------------- regression


def _gaussian_draws(rng, s, b):
    return np.stack([rng.normal(size=(s, b)), rng.normal(scale=0.7, size=(s, b))], axis=-1)


def test_mixture_quantile_one_draw_equals_norm_ppf_exactly():
    """Reference: scipy.stats.norm.ppf; with S = 1 the result must be bit-identical."""
    rng = np.random.default_rng(11)
    mu = rng.normal(size=(1, 50)) * 10
    sd = np.exp(rng.normal(size=(1, 50)))
    for prob in (0.05, 0.5, 0.95, 0.001):
        np.testing.assert_array_equal(mixture_quantile(mu, sd, prob), stats.norm.ppf(prob, loc=mu[0], scale=sd[0]))


def test_regression_one_draw_interval_is_normal():
    """Reference: scipy.stats.norm.ppf in target units (mean*scale + center, sd*scale)."""
    rng = np.random.default_rng(12)
    d = _gaussian_draws(rng, 1, 20)
    r = regression_summary(d, 0.9, target_center=150.0, target_scale=77.0)
    loc = d[0, :, 0] * 77.0 + 150.0
    scale = np.exp(0.5 * d[0, :, 1]) * 77.0
    np.testing.assert_array_equal(r.lower, stats.norm.ppf(0.05, loc=loc, scale=scale))
    np.testing.assert_array_equal(r.upper, stats.norm.ppf(0.95, loc=loc, scale=scale))
    assert np.all(r.epistemic_var == 0) and np.all(r.mutual_information == 0)


def test_mixture_quantiles_match_monte_carlo():
    """Reference: brute-force Monte Carlo of the mixture, 4,000,000 samples per case.
    Tolerance: 0.02 target units; the Monte Carlo quantile's standard error here is
    below 0.005 (sqrt(p(1-p)/n)/density, density >= 0.05 at these tails)."""
    rng = np.random.default_rng(5)
    d = _gaussian_draws(rng, 25, 4)
    r = regression_summary(d, 0.9, target_center=3.0, target_scale=2.0)
    mu = d[:, :, 0] * 2.0 + 3.0
    sd = np.exp(0.5 * d[:, :, 1]) * 2.0
    n = 4_000_000
    for b in range(4):
        comp = rng.integers(0, 25, size=n)
        y = mu[comp, b] + sd[comp, b] * rng.standard_normal(n)
        q = np.quantile(y, [0.05, 0.95])
        assert abs(r.lower[b] - q[0]) < 0.02 and abs(r.upper[b] - q[1]) < 0.02
        # the root solves the mixture CDF equation (scipy.special.ndtr) to 1e-10
        assert abs(special.ndtr((r.lower[b] - mu[:, b]) / sd[:, b]).mean() - 0.05) < 1e-10


def test_bimodal_mixture_quantile_is_not_a_normal_approximation():
    """Two far-apart draws: the mixture's 50% quantile lies between the modes (CDF = 0.5
    there, by symmetry), and the 90% interval is far from the moment-matched normal's."""
    d = np.array([[[-5.0, np.log(0.01)]], [[5.0, np.log(0.01)]]])
    r = regression_summary(d, 0.9)
    assert r.mean[0] == 0.0
    assert r.lower[0] == pytest.approx(stats.norm.ppf(0.1, loc=-5, scale=0.1), abs=1e-6)
    assert r.upper[0] == pytest.approx(stats.norm.ppf(0.9, loc=5, scale=0.1), abs=1e-6)
    moment = stats.norm.ppf(0.95, scale=math.sqrt(r.total_var[0]))
    assert abs(r.upper[0] - moment) > 0.5


def test_variance_decomposition():
    """Law of total variance: mixture variance = var of means + mean of variances."""
    rng = np.random.default_rng(9)
    d = _gaussian_draws(rng, 30, 8)
    r = regression_summary(d, 0.9, target_scale=3.0)
    mu = d[:, :, 0] * 3.0
    var = np.exp(d[:, :, 1]) * 9.0
    np.testing.assert_allclose(r.mean, mu.mean(0), rtol=1e-12)
    np.testing.assert_allclose(r.epistemic_var, mu.var(0), rtol=1e-10)
    np.testing.assert_allclose(r.aleatoric_var, var.mean(0), rtol=1e-10)
    np.testing.assert_allclose(r.total_var, mu.var(0) + var.mean(0), rtol=1e-10)
    np.testing.assert_allclose(r.epistemic_std, mu.std(0), rtol=1e-10)
    np.testing.assert_allclose(r.interval_width, r.upper - r.lower)


def test_regression_mi_is_an_upper_bound_on_the_mixture_mutual_information():
    """I(y; s) = H[mixture] - mean_s H[N(mu_s, var_s)] (definition of mutual information),
    H[mixture] by scipy.integrate.quad; the reported value is the moment-matched-Gaussian
    bound (a Gaussian maximises entropy for a given variance), so it must be >= I, and
    H[N] = 0.5 ln(2 pi e var) (scipy.stats.norm.entropy)."""
    rng = np.random.default_rng(21)
    d = _gaussian_draws(rng, 6, 5)
    r = regression_summary(d, 0.9)
    mu = d[:, :, 0]
    sd = np.exp(0.5 * d[:, :, 1])
    for b in range(5):
        def f(y, b=b):
            dens = stats.norm.pdf(y, mu[:, b], sd[:, b]).mean()
            return -dens * math.log(dens) if dens > 0 else 0.0
        h_mix = integrate.quad(f, -40, 40, limit=400, points=list(mu[:, b]))[0]
        expected = stats.norm.entropy(scale=sd[:, b]).mean()
        assert r.expected_entropy[b] == pytest.approx(expected, abs=1e-12)
        true_mi = h_mix - expected
        assert -1e-7 <= true_mi <= r.mutual_information[b] + 1e-7
    # equal means, different variances: y still tells the draws apart (I > 0), and the bound is > 0
    d2 = np.array([[[0.0, 0.0]], [[0.0, np.log(9.0)]]])
    assert regression_summary(d2, 0.9).mutual_information[0] > 0.05


@settings(max_examples=100, deadline=None)
@given(
    arrays(np.float64, st.tuples(st.integers(1, 8), st.integers(1, 5), st.just(2)),
           elements=st.floats(-8, 8, allow_nan=False, allow_infinity=False)),
)
def test_regression_decomposition_properties(d):
    """predictive = expected + MI (to eps), MI >= 0, lower <= mean-ish ordering, lower < upper."""
    r = regression_summary(d, 0.9, target_center=1.0, target_scale=2.0)
    assert np.all(r.mutual_information >= 0)
    tol = 64 * EPS * np.maximum(1.0, np.abs(r.predictive_entropy))
    assert np.all(np.abs(r.predictive_entropy - r.expected_entropy - r.mutual_information) <= tol)
    assert np.all(r.lower < r.upper)
    one = regression_summary(np.broadcast_to(d[:1], d.shape), 0.9)
    assert np.all(one.mutual_information <= 64 * EPS)


def test_summarise_dispatch_and_conformal_interval():
    """Conformal interval (Lei et al. 2018, locally weighted split conformal): mean ± q * sd_total,
    used only at the calibrated level."""
    rng = np.random.default_rng(2)
    d = _gaussian_draws(rng, 10, 6)
    target = {"center": 1.0, "scale": 2.0, "conformal_q": 1.7, "conformal_level": 0.9}
    r = summarise("regression", d, 0.9, target)
    assert isinstance(r, RegressionSummary) and r.interval_method == "conformal"
    np.testing.assert_allclose(r.upper - r.mean, 1.7 * np.sqrt(r.total_var))
    other = summarise("regression", d, 0.8, target)
    assert other.interval_method == "mixture"
    c = summarise("classification", rng.normal(size=(4, 3, 5)), 0.9, target)
    assert isinstance(c, ClassificationSummary) and len(c) == 3


# -- temperature and joint rank (issue 26) ------------------------------------------------------
def test_temperature_scales_the_predictive_mean_and_keeps_the_draws_disagreement():
    # reference: temperature scaling of the predictive mean, softmax(ln p̄ / T) (Guo et al. 2017, sec. 4.2),
    # by scipy.special.softmax; scipy.stats.entropy for the entropy of the served mean
    rng = np.random.default_rng(4)
    z = rng.normal(scale=3.0, size=(16, 7, 5))
    plain = classification_summary(z, 0.9)
    for t in (0.5, 2.0):
        s = summarise("classification", z, 0.9, {"center": 0.0, "scale": 1.0, "temperature": t})
        want = special.softmax(np.log(plain.mean_probs) / t, axis=1)
        assert np.allclose(s.mean_probs, want, atol=1e-12)
        assert np.allclose(s.predictive_entropy, stats.entropy(want, axis=1), atol=1e-12)
        assert np.allclose(s.one_minus_max_prob, 1.0 - want.max(axis=1), atol=1e-12)
        assert np.array_equal(s.prediction, plain.prediction)  # the map keeps the order
        assert np.array_equal(s.mutual_information, plain.mutual_information)  # the draws' own
        assert np.all(s.lower <= s.mean_probs + 1e-12) and np.all(s.mean_probs <= s.upper + 1e-12)
        assert np.all(s.upper <= 1.0) and s.temperature == t
    same = summarise("classification", z, 0.9, {"temperature": 1.0})
    assert np.array_equal(same.mean_probs, plain.mean_probs)
    for bad in (0.0, -1.0, float("nan"), "hot"):
        with pytest.raises(ConfigError, match="target.temperature"):
            summarise("classification", z, 0.9, {"temperature": bad})


def test_joint_rank_worked_example():
    # hand-worked: quantiles 0, 0.1, ..., 1.0 of PE (11 knots, levels 0, 0.1, ..., 1) and of MI
    # 0, ..., 0 (half the reference cases have MI 0), 0.01 .. 0.05; u by linear interpolation,
    # above the top 1 + (x - q_1) / (q_1 - q_0.5); the score is the larger of the two ranks
    ref = {"predictive_entropy": np.linspace(0.0, 1.0, 11).tolist(),
           "mutual_information": [0.0] * 6 + [0.01, 0.02, 0.03, 0.04, 0.05]}
    pe = np.array([0.25, 0.25, 2.0, 0.0])
    mi = np.array([0.0, 0.045, 0.0, 0.1])
    got = summary_mod.joint_rank(pe, mi, ref)
    # case 0: u_PE 0.25, u_MI 0.5 (the highest level where MI is 0) -> 0.5
    # case 1: u_MI = 0.9 + 0.5 * 0.1 = 0.95; case 2: u_PE = 1 + (2 - 1) / 0.5 = 3;
    # case 3: u_MI = 1 + (0.1 - 0.05) / (0.05 - 0) = 2
    assert np.allclose(got, [0.5, 0.95, 3.0, 2.0])
    with pytest.raises(ConfigError, match="score_reference"):
        summary_mod.joint_rank(pe, mi, {"predictive_entropy": ref["predictive_entropy"]})
    with pytest.raises(ConfigError, match="increasing"):
        summary_mod.joint_rank(pe, mi, {**ref, "mutual_information": [0.3, 0.2, 0.1]})
    z = np.random.default_rng(1).normal(size=(8, 4, 3))
    assert classification_summary(z, 0.9).joint_rank is None
    s = summarise("classification", z, 0.9, {"score_reference": ref})
    assert np.allclose(s.joint_rank, summary_mod.joint_rank(s.predictive_entropy, s.mutual_information, ref))


def test_certain_draws_give_entropies_of_plus_zero() -> None:
    """Every draw certain of one class: H = 0 exactly (Shannon's definition, 0 ln 0 = 0), never the
    -0.0 a negated zero sum gives (a trial found "predictive_entropy": -0.0 in responses)."""
    logits = np.zeros((4, 2, 3))
    logits[..., 0] = 1e4                      # softmax = (1, 0, 0) in float64
    s = classification_summary(logits)
    for values in (s.predictive_entropy, s.expected_entropy, s.mutual_information):
        assert np.all(values == 0.0) and not np.any(np.signbit(values))
