"""serve/offline/regression.py against references outside demur.

CRPS: the definition CRPS(F, y) = integral of (F(t) - 1[t >= y])^2 dt (Gneiting & Raftery 2007,
JASA 102, eq. 20; eq. 21 is its kernel form), integrated numerically with scipy.integrate.quad,
and the Gaussian closed form (Gneiting et al. 2005, eq. 5). NLL: scipy.stats.norm.pdf directly.
PIT: scipy.stats.norm.cdf; values drawn from the predictive law itself are uniform (Dawid 1984),
checked with scipy.stats.kstest.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, stats

from demur.serve.offline.regression import (
    coverage_table,
    crps_gaussian,
    crps_mixture,
    far_shifts,
    nll_mixture,
    pit_values,
    referral_by_epistemic,
    regression_scores,
)


def _crps_by_integral(mu: np.ndarray, sd: np.ndarray, y: float) -> float:
    """The CRPS definition, numerically: the mixture CDF's squared distance to the step at y."""
    cdf = lambda t: float(np.mean(stats.norm.cdf((t - mu) / sd)))  # noqa: E731
    lo, hi = float(np.min(mu - 12 * sd)), float(np.max(mu + 12 * sd))
    left = integrate.quad(lambda t: cdf(t) ** 2, lo, y, limit=200, epsabs=1e-12)[0]
    right = integrate.quad(lambda t: (1 - cdf(t)) ** 2, y, hi, limit=200, epsabs=1e-12)[0]
    return left + right


@pytest.mark.parametrize("mu,sd,y", [(0.0, 1.0, 0.3), (5.0, 2.5, -1.0), (-2.0, 0.1, -2.05), (150.0, 48.0, 300.0)])
def test_gaussian_crps_closed_form_equals_the_integral(mu, sd, y):
    want = _crps_by_integral(np.array([mu]), np.array([sd]), y)
    assert crps_gaussian(mu, sd, y) == pytest.approx(want, rel=1e-6)
    assert crps_mixture(np.array([[mu]]), np.array([[sd]]), np.array([y]))[0] == pytest.approx(want, rel=1e-6)


def test_mixture_crps_equals_the_integral_and_nll_equals_the_density():
    rng = np.random.default_rng(0)
    mu = rng.normal(100, 20, size=(7, 5))
    sd = rng.uniform(5, 30, size=(7, 5))
    y = rng.normal(100, 40, size=5)
    got = crps_mixture(mu, sd, y)
    for b in range(5):
        assert got[b] == pytest.approx(_crps_by_integral(mu[:, b], sd[:, b], y[b]), rel=1e-6)
    dens = stats.norm.pdf(y[None, :], mu, sd).mean(axis=0)
    np.testing.assert_allclose(nll_mixture(mu, sd, y), -np.log(dens), rtol=1e-10)


def test_pit_of_draws_from_the_law_is_uniform_and_one_component_is_norm_cdf():
    rng = np.random.default_rng(1)
    mu = rng.normal(0, 3, size=(4, 4000))
    sd = rng.uniform(0.5, 2, size=(4, 4000))
    pick = rng.integers(0, 4, size=4000)
    y = rng.normal(mu[pick, np.arange(4000)], sd[pick, np.arange(4000)])
    assert stats.kstest(pit_values(mu, sd, y), "uniform").pvalue > 0.01
    np.testing.assert_allclose(pit_values(mu[:1], sd[:1], y), stats.norm.cdf((y - mu[0]) / sd[0]))
    sc = regression_scores(mu, sd, y)
    assert sum(sc["pit"]["counts"]) == 4000 and sc["pit"]["chi2_p"] > 0.001
    rows = coverage_table(mu, sd, y, (y - 1, y + 1, 0.9, "test"))
    for row in rows[:-1]:  # a correct law covers at its level (binomial sd about 0.008 here)
        assert row["coverage"] == pytest.approx(row["level"], abs=0.03)
    assert rows[-1]["coverage"] == 1.0 and rows[-1]["mean_width"] == pytest.approx(2.0)


def test_referral_drops_the_largest_epistemic_variance_first():
    y = np.array([0.0, 0.0, 0.0, 0.0])
    mean = np.array([0.0, 1.0, 2.0, 10.0])
    ev = np.array([0.1, 0.2, 0.3, 5.0])
    rows = referral_by_epistemic(y, mean, ev, mean - 1, mean + 1, rates=(0.0, 0.25, 0.5))
    assert rows[0]["rmse"] == pytest.approx(np.sqrt(np.mean(mean**2)))
    assert rows[1]["kept"] == 3 and rows[1]["mae"] == pytest.approx(1.0)
    assert rows[2]["coverage"] == 1.0
    far = far_shifts(np.ones((2, 3)), low=np.zeros(3), high=np.full(3, 2.0))
    assert far["every_feature_x10"].max() == 10 and far["first_feature_far"][0, 0] == 8.0
