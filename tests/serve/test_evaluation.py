"""serve/offline/evaluation.py: AUROC, the referral table, the built-in shifts, the page.

References: AUROC against sklearn.metrics.roc_auc_score (ties and +inf scores included);
accuracy at referral and AURC as defined in serve/offline/calibration.py (Geifman et al.
2019), recomputed by hand; the digits are scikit-learn's bundled load_digits.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from sklearn.datasets import load_digits
from sklearn.metrics import roc_auc_score

from demur.serve.offline import evaluation as evaluation_mod
from demur.serve.offline.evaluation import auroc, referral_table, scores_of, shift_row, shifted_inputs, write_evaluation


@pytest.mark.parametrize("seed", range(5))
def test_auroc_matches_sklearn(seed: int) -> None:
    rng = np.random.default_rng(seed)
    pos = np.round(rng.normal(1.0, 1.0, 40), 1)  # rounded: ties
    neg = np.round(rng.normal(0.0, 1.0, 60), 1)
    pos[:3] = np.inf
    labels = np.r_[np.ones(40), np.zeros(60)]
    finite = np.nan_to_num(np.r_[pos, neg], posinf=1e9)
    assert auroc(pos, neg) == pytest.approx(roc_auc_score(labels, finite))


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
