"""serve/core/drift.py: the drift reference, PSI and the two-sample KS statistic.

References named beside each check: a hand-computed PSI worked example (the
arithmetic is in the test), ``scipy.stats.ks_2samp`` for KS, scikit-learn's
bundled digits (``sklearn.datasets.load_digits``) for clean vs shifted inputs,
and the common-practice PSI reading (< 0.1 stable, > 0.25 major; a rule of thumb).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st

import demur.serve.core.drift as drift
from demur.serve.core.drift import DriftMonitor, bin_fractions, feature_reference, ks_statistic, psi, score_reference
from demur.serve.errors import ConfigError


# -- PSI ------------------------------------------------------------------------------
# Worked example, computed by hand: reference fractions q = (.25, .25, .25, .25),
# recent fractions p = (.1, .2, .3, .4); PSI = sum (p - q) ln(p / q)
#   = (-.15) ln(.4) + (-.05) ln(.8) + (.05) ln(1.2) + (.15) ln(1.6)
#   = .137444 + .011157 + .009116 + .070501 = 0.228218 (nats)
WORKED_PSI = 0.228218


def test_psi_worked_example() -> None:
    # reference: the hand computation above
    assert psi([0.25] * 4, [0.1, 0.2, 0.3, 0.4]) == pytest.approx(WORKED_PSI, abs=1e-6)


def test_monitor_psi_worked_example_from_raw_values() -> None:
    # Same worked example through the monitor: cut points 1.5, 2.5, 3.5 with 25 % of the
    # reference in each bin; the window holds 1 x 1, 2 x 2, 3 x 3, 4 x 4 -> p = (.1, .2, .3, .4).
    ref = {"features": {"edges": [[1.5, 2.5, 3.5]], "fractions": [[0.25] * 4], "bins": 4, "n": 100}}
    mon = DriftMonitor(ref, window=10)
    values = np.array([1, 2, 2, 3, 3, 3, 4, 4, 4, 4], dtype=float)[:, None]
    mon.observe(values, np.zeros(10))
    assert mon.feature_psi()[0] == pytest.approx(WORKED_PSI, abs=1e-6)


def test_psi_is_zero_for_identical_distributions() -> None:
    # PSI(p, p) = 0 by the formula (every term has p - q = 0)
    rng = np.random.default_rng(1)
    x = rng.integers(0, 17, size=(400, 6)).astype(float)
    ref = {"features": feature_reference(x)}
    mon = DriftMonitor(ref, window=400)
    mon.observe(x, np.zeros(400))
    np.testing.assert_array_equal(mon.feature_psi(), np.zeros(6))
    assert psi([0.2, 0.3, 0.5], [0.2, 0.3, 0.5]) == 0.0


def test_empty_bin_is_floored_not_infinite() -> None:
    # an empty recent bin uses the floor: (1e-4 - .5) ln(1e-4 / .5) + (1 - .5) ln(1 / .5), finite
    value = psi([0.5, 0.5], [0.0, 1.0])
    expected = (1e-4 - 0.5) * math.log(1e-4 / 0.5) + 0.5 * math.log(2.0)
    assert value == pytest.approx(expected, rel=1e-12)


def test_monitor_bins_follow_bin_fractions_convention() -> None:
    # a value equal to a cut point falls in the lower bin, as in bin_fractions (searchsorted "left")
    rng = np.random.default_rng(2)
    train = rng.integers(0, 17, size=(500, 5)).astype(float)
    recent = rng.integers(0, 17, size=(120, 5)).astype(float)  # many ties with the cut points
    feats = feature_reference(train)
    mon = DriftMonitor({"features": feats}, window=120)
    mon.observe(recent, np.zeros(120))
    for j in range(5):
        want = psi(feats["fractions"][j], bin_fractions(recent[:, j], feats["edges"][j]))
        assert mon.feature_psi()[j] == pytest.approx(want, abs=1e-12)


@settings(max_examples=60, deadline=None)
@given(batches=st.lists(st.integers(min_value=0, max_value=23), min_size=1, max_size=12),
       window=st.integers(min_value=1, max_value=30), seed=st.integers(0, 2**16))
def test_ring_buffer_holds_exactly_the_last_window_cases(batches: list[int], window: int, seed: int) -> None:
    # reference: recomputing PSI and KS from scratch on the last `window` cases
    # (bin_fractions + psi, and scipy.stats.ks_2samp)
    rng = np.random.default_rng(seed)
    train = rng.normal(size=(300, 3))
    ref = {"features": feature_reference(train),
           "score": score_reference("mutual_information", rng.gamma(2.0, size=50))}
    mon = DriftMonitor(ref, window=window)
    xs, ss = [np.empty((0, 3))], [np.empty(0)]
    for b in batches:
        x, s = rng.normal(loc=0.5, size=(b, 3)), rng.gamma(2.5, size=b)
        mon.observe(x, s)
        xs.append(x)
        ss.append(s)
    x_all, s_all = np.concatenate(xs)[-window:], np.concatenate(ss)[-window:]
    assert mon.filled == len(x_all)
    if len(x_all) == 0:
        np.testing.assert_array_equal(mon.feature_psi(), np.zeros(3))
        assert math.isnan(mon.score_ks())
        return
    want = [psi(ref["features"]["fractions"][j], bin_fractions(x_all[:, j], ref["features"]["edges"][j]))
            for j in range(3)]
    np.testing.assert_allclose(mon.feature_psi(), want, rtol=0, atol=1e-12)
    assert mon.score_ks() == pytest.approx(scipy.stats.ks_2samp(s_all, ref["score"]["values"]).statistic, abs=1e-12)


# -- KS -------------------------------------------------------------------------------
@pytest.mark.parametrize("n,m,ties", [(1, 1, False), (5, 300, False), (200, 150, False), (500, 2000, False),
                                      (60, 90, True), (333, 17, True)])
def test_ks_statistic_equals_scipy(n: int, m: int, ties: bool) -> None:
    # reference: scipy.stats.ks_2samp(a, b).statistic (two-sided, exact definition sup |F_a - F_b|)
    rng = np.random.default_rng(n * 1000 + m)
    if ties:
        a, b = rng.integers(0, 6, size=n).astype(float), rng.integers(1, 7, size=m).astype(float)
    else:
        a, b = rng.normal(size=n), rng.normal(loc=0.3, scale=1.2, size=m)
    assert ks_statistic(a, b) == pytest.approx(scipy.stats.ks_2samp(a, b).statistic, abs=1e-15)


@pytest.mark.parametrize("n,m", [(300, 90), (500, 2000), (200, 359)])
def test_ks_critical_value_matches_the_limiting_kolmogorov_distribution(n: int, m: int) -> None:
    # reference: scipy.stats.kstwobign (limit law of sqrt(n m / (n + m)) D); its upper
    # 0.001 point times sqrt((n + m) / (n m)) is the large-sample critical value
    rng = np.random.default_rng(n)
    mon = DriftMonitor({"score": score_reference("mutual_information", rng.random(m), keep=m)}, window=n)
    mon.observe(np.zeros((n, 0)), rng.random(n))
    want = scipy.stats.kstwobign.isf(drift.KS_ALPHA) * math.sqrt((n + m) / (n * m))
    assert mon.score_ks_critical() == pytest.approx(want, rel=1e-6)
    # and the first term of the Kolmogorov series, c = sqrt(-ln(alpha / 2) / 2) (Smirnov 1948),
    # which the tail 2 exp(-2 c^2) makes exact to ~1e-7 at alpha = 0.001
    assert mon.score_ks_critical() == pytest.approx(
        math.sqrt(-math.log(drift.KS_ALPHA / 2) / 2) * math.sqrt((n + m) / (n * m)), rel=1e-4)


def test_ks_empty_sample_is_nan() -> None:
    assert math.isnan(ks_statistic([], [1.0, 2.0]))


def test_monitor_without_score_reference_gives_nan_ks() -> None:
    mon = DriftMonitor({"features": feature_reference(np.arange(20.0)[:, None])}, window=5)
    mon.observe(np.ones((3, 1)), np.ones(3))
    assert math.isnan(mon.score_ks())


def test_bad_window_and_bad_reference_are_named() -> None:
    with pytest.raises(ConfigError, match="drift window must be at least 1"):
        DriftMonitor({}, window=0)
    bad = {"features": {"edges": [[1.0, 2.0]], "fractions": [[0.5, 0.5]]}}
    with pytest.raises(ConfigError, match=r"fractions\[0\] must have 3 entries"):
        DriftMonitor(bad, window=5)


# -- the digits: clean vs shifted -----------------------------------------------------
def test_digits_clean_split_is_stable_and_shifted_inputs_drift(demo_dataset: object) -> None:
    """Reference: scikit-learn's bundled digits (load_digits) in demur's fixed splits; PSI
    reading is common practice (< 0.1 stable, > 0.25 major shift; a rule of thumb).

    Clean: the held-out test split against the training split's quantile bins.
    Shifted: the same cases brighter by 4 grey levels (clipped at 16) on the left half.
    """
    x_train, _ = demo_dataset.split("train")  # type: ignore[attr-defined]
    x_test, _ = demo_dataset.split("test")  # type: ignore[attr-defined]
    ref = {"features": feature_reference(x_train)}
    window = len(x_test)
    clean = DriftMonitor(ref, window=window)
    clean.observe(x_test, np.zeros(window))
    psi_clean = clean.feature_psi()

    left = np.array([c < 4 for r in range(8) for c in range(8)])
    shifted_x = x_test.copy()
    shifted_x[:, left] = np.clip(shifted_x[:, left] + 4.0, 0.0, 16.0)
    shifted = DriftMonitor(ref, window=window)
    shifted.observe(shifted_x, np.zeros(window))
    psi_shift = shifted.feature_psi()

    print(f"\ndigits PSI, window {window}: clean max {psi_clean.max():.3f} mean {psi_clean.mean():.3f}; "
          f"shifted left half: min {psi_shift[left].min():.3f} median {np.median(psi_shift[left]):.3f}, "
          f"right half max {psi_shift[~left].max():.3f}")
    assert psi_clean.max() < 0.25  # no major shift on held-out data of the same source
    assert np.median(psi_shift[left]) > 0.25  # the shifted features read as a major shift
    np.testing.assert_allclose(psi_shift[~left], psi_clean[~left])  # untouched features unchanged


def test_a_large_input_is_monitored_on_a_fixed_sample_of_its_features() -> None:
    """Past DRIFT_MAX_FEATURES features the reference keeps a seeded random subset; the monitor's
    PSI of each monitored feature equals the PSI (the formula in this module's docstring, checked
    above against its published form) computed directly on that column."""
    rng = np.random.default_rng(0)
    x_train = rng.normal(size=(400, 3000))
    ref = feature_reference(x_train)
    assert len(ref["indices"]) == drift.DRIFT_MAX_FEATURES == len(ref["edges"])
    assert ref == feature_reference(x_train)                       # the same sample every export
    recent = rng.normal(size=(100, 3000))
    recent[:, ref["indices"][7]] += 2.0                            # one monitored pixel shifts
    mon = DriftMonitor({"features": ref}, window=100)
    mon.observe(recent, np.zeros(100))
    got = mon.feature_psi()
    j = ref["indices"][7]
    want = psi(np.asarray(ref["fractions"][7]), bin_fractions(recent[:, j], ref["edges"][7]))
    assert got[7] == pytest.approx(want) and got.argmax() == 7
    small = feature_reference(x_train[:, :64])
    assert "indices" not in small and len(small["edges"]) == 64
    with pytest.raises(ValueError, match="monitors feature"):
        mon.observe(recent[:, :100], np.zeros(100))
