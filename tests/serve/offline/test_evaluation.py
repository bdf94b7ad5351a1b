"""serve/offline/evaluation.py: AUROC, the referral table, the built-in shifts, the page.

References: AUROC against sklearn.metrics.roc_auc_score (ties and +inf scores included);  its
standard error (DeLong et al. 1988) against the spread of roc_auc_score over repeated
binormal samples;
accuracy at referral and AURC as defined in serve/offline/metrics.py (Geifman et al.
2019), recomputed by hand; the digits are scikit-learn's bundled load_digits.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from sklearn.datasets import load_digits
from sklearn.metrics import roc_auc_score

from demur.serve.offline import evaluation as evaluation_mod
from demur.serve.offline.evaluation import (
    auroc,
    auroc_difference,
    auroc_standard_error,
    referral_table,
    scores_of,
    shift_row,
    shifted_inputs,
    write_evaluation,
)


@pytest.mark.parametrize("seed", range(5))
def test_auroc_matches_sklearn(seed: int) -> None:
    rng = np.random.default_rng(seed)
    pos = np.round(rng.normal(1.0, 1.0, 40), 1)  # rounded: ties
    neg = np.round(rng.normal(0.0, 1.0, 60), 1)
    pos[:3] = np.inf
    labels = np.r_[np.ones(40), np.zeros(60)]
    finite = np.nan_to_num(np.r_[pos, neg], posinf=1e9)
    assert auroc(pos, neg) == pytest.approx(roc_auc_score(labels, finite))


def test_auroc_standard_error_matches_the_spread_of_sklearn_auroc() -> None:
    """DeLong et al. 1988's standard error, at the demo's counts (36 unseen digits against 323
    seen), averaged over 40 samples, is within 15% of the standard deviation of
    sklearn.metrics.roc_auc_score over 1,500 binormal samples (unit-variance normals d apart,
    whose true area is Phi(d / sqrt 2), scipy.stats.norm; the samples' mean area is checked
    against it first)."""
    from scipy.stats import norm

    rng = np.random.default_rng(7)
    d, n1, n2 = 2.2, 36, 323
    labels = np.r_[np.ones(n1), np.zeros(n2)]
    samples = [(rng.normal(d, 1.0, n1), rng.normal(0.0, 1.0, n2)) for _ in range(1500)]
    areas = np.array([roc_auc_score(labels, np.r_[p, n]) for p, n in samples])
    assert float(areas.mean()) == pytest.approx(float(norm.cdf(d / np.sqrt(2.0))), abs=0.003)
    estimated = np.mean([auroc_standard_error(p, n) for p, n in samples[:40]])
    assert estimated == pytest.approx(float(areas.std()), rel=0.15)


def _correlated(rng: np.random.Generator, n1: int, n2: int, shift_b: float) -> tuple[np.ndarray, ...]:
    """Two scores of the same cases: a shared latent plus each score's own noise."""
    pos, neg = rng.normal(2.0, 1.0, n1), rng.normal(0.0, 1.0, n2)
    return (pos + rng.normal(0, 0.6, n1), neg + rng.normal(0, 0.6, n2),
            pos + shift_b + rng.normal(0, 0.6, n1), neg + rng.normal(0, 0.6, n2))


def test_auroc_difference_paired_error_matches_the_spread_of_sklearn_differences() -> None:
    """DeLong et al. 1988's paired standard error of AUROC(a) - AUROC(b) on the same cases: the
    difference equals sklearn.metrics.roc_auc_score(a) - roc_auc_score(b), and its standard error
    (mean over 40 samples) is within 15% of the spread of those differences over 1,500 samples."""
    rng = np.random.default_rng(11)
    n1, n2 = 36, 323
    labels = np.r_[np.ones(n1), np.zeros(n2)]
    samples = [_correlated(rng, n1, n2, 0.3) for _ in range(1500)]
    diffs = np.array([roc_auc_score(labels, np.r_[pa, na]) - roc_auc_score(labels, np.r_[pb, nb])
                      for pa, na, pb, nb in samples])
    got = [auroc_difference(*smp) for smp in samples[:40]]
    assert got[0]["difference"] == pytest.approx(diffs[0], abs=1e-12)
    assert np.mean([g["standard_error"] for g in got]) == pytest.approx(float(diffs.std()), rel=0.15)
    with pytest.raises(ValueError, match="same cases"):
        auroc_difference(samples[0][0], samples[0][1], samples[0][2][:-1], samples[0][3])


def test_auroc_difference_p_value_holds_its_level_when_the_scores_are_alike() -> None:
    """Two equally good scores of the same cases: the two-sided p-value falls below 0.05 in about
    5% of 400 samples (scipy.stats.binomtest of the count against 0.05 does not reject at 0.001)."""
    from scipy.stats import binomtest

    rng = np.random.default_rng(5)
    hits = sum(auroc_difference(*_correlated(rng, 36, 323, 0.0))["p_value"] < 0.05 for _ in range(400))
    assert binomtest(int(hits), 400, 0.05).pvalue > 1e-3


def test_auroc_standard_error_edges() -> None:
    """Too few cases: nan; ties and +inf scores are midranked like the area (sklearn's
    roc_auc_score gives the same area with +inf replaced by a large finite score)."""
    assert np.isnan(auroc_standard_error(np.array([1.0]), np.array([0.0, 1.0])))
    pos, neg = np.array([np.inf, 2.0, 2.0, 1.0]), np.array([2.0, 0.0, 0.0, 1.0, -1.0])
    finite = auroc_standard_error(np.array([1e9, 2.0, 2.0, 1.0]), neg)
    assert auroc_standard_error(pos, neg) == pytest.approx(finite)
    assert 0.0 < finite < 0.5


def test_referral_table_by_hand() -> None:
    probs = np.array([[0.9, 0.1], [0.6, 0.4], [0.2, 0.8], [0.45, 0.55]])
    y = np.array([0, 1, 1, 0])  # cases 2 and 4 wrong
    table = referral_table(probs, y, scores_of(probs))
    assert table["accuracy"] == 0.5
    rows = table["rankings"]
    # 1 - max prob: 0.1, 0.4, 0.2, 0.45 -> refer 50% (cases 2, 4): both kept are right
    assert rows["one_minus_max_prob"]["accuracy_at_referral"]["0.50"] == 1.0
    assert rows["random"]["accuracy_at_referral"]["0.30"] == 0.5
    # AURC: risks over coverage steps 1..4 of the order (1, 3, 2, 4) = 0, 0, 1/3, 1/2
    assert rows["one_minus_max_prob"]["aurc"] == pytest.approx((0 + 0 + 1 / 3 + 1 / 2) / 4)


def test_shifts_of_digits() -> None:
    x = load_digits().data[:50].astype(np.float64)
    low, high = np.zeros(64), np.full(64, 16.0)
    s = shifted_inputs(x, low=low, high=high, center=x.mean(0), image_shape=(1, 8, 8))
    assert set(s) >= set(evaluation_mod.FAR_SHIFTS) | {"gaussian_noise", "permuted_features"}
    np.testing.assert_array_equal(s["inversion"], 16 - x)
    np.testing.assert_array_equal(s["rotation"].reshape(-1, 8, 8)[:, 0, :], x.reshape(-1, 8, 8)[:, :, 7])
    assert s["blank"].max() == 0 and s["saturated"].min() == 16
    tab = shifted_inputs(x, low=low, high=high, center=x.mean(0), image_shape=None)
    assert "rotation" not in tab and np.allclose(tab["inversion"], 2 * x.mean(0) - x)


def test_page_has_tables_and_the_caution(tmp_path: Path) -> None:
    probs = np.array([[0.9, 0.1], [0.6, 0.4], [0.2, 0.8], [0.45, 0.55]])
    y = np.array([0, 1, 1, 0])
    sc = scores_of(probs, np.array([0.01, 0.2, 0.05, 0.3]))
    body = {"referral": referral_table(probs, y, sc), "clean_accepted": 1.0,
            "shift": {"blank": shift_row(sc, {k: v + 1 for k, v in sc.items()}, np.zeros(4, dtype=bool))}}
    path = write_evaluation(tmp_path, {"title": "t", "models": {"bundle": body}})
    page = (tmp_path / "index.html").read_text()
    assert path.is_file() and (tmp_path / "referral.png").is_file() and (tmp_path / "shift.png").is_file()
    assert "<table>" in page and "never replaces" in page
    assert body["shift"]["blank"]["auroc"]["mutual_information"] == 1.0
