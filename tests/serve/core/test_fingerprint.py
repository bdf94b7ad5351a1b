"""serve/core/fingerprint.py: the training-row fingerprint.

Reference: hashlib.sha256 (FIPS 180-4) on the float32 little-endian bytes of one row,
computed here by hand; numpy's float32 cast for what counts as the same row.
"""

from __future__ import annotations

import base64
import hashlib

import numpy as np
import pytest
from scipy import stats

import demur.serve.core.fingerprint as fp
from demur.serve.core.fingerprint import row_hashes, seen_in_training, training_fingerprint, training_overlap


def test_row_hash_is_the_first_8_bytes_of_sha256_of_float32_row():
    row = np.array([0.0, 1.5, 16.0, 3.25])
    ref = int.from_bytes(hashlib.sha256(row.astype("<f4").tobytes()).digest()[:8], "little")
    assert int(row_hashes(row[None, :])[0]) == ref
    # -0.0 and 0.0 are one value; float64 noise below float32 precision is the same row
    assert row_hashes(np.array([[-0.0, 1.5, 16.0, 3.25]]))[0] == ref
    assert row_hashes(np.array([[0.0, 1.5 + 1e-12, 16.0, 3.25]]))[0] == ref
    assert row_hashes(np.array([[0.0, 1.5001, 16.0, 3.25]]))[0] != ref


def test_record_holds_no_values_and_finds_exact_training_rows():
    rng = np.random.default_rng(0)
    train, other = rng.integers(0, 17, (500, 64)).astype(float), rng.random((50, 64))
    rec = training_fingerprint(train)
    assert rec["rows"] == 500 and rec["method"] == fp.FINGERPRINT_METHOD
    assert len(base64.b64decode(rec["hashes"])) == 8 * len(np.unique(train, axis=0))
    x = np.concatenate([other, train[[3, 7, 3]]])
    seen = seen_in_training(rec, x)
    assert seen.tolist() == [False] * 50 + [True] * 3
    assert training_overlap(rec, other).count == 0


def test_subsampled_record_checks_rows_in_its_hash_range(monkeypatch):
    monkeypatch.setattr(fp, "MAX_ROWS", 100)
    rng = np.random.default_rng(1)
    train = rng.random((1000, 8))
    rec = training_fingerprint(train)
    ov = training_overlap(rec, train)
    assert len(base64.b64decode(rec["hashes"])) == 8 * 100
    assert ov.count == ov.checkable == 100  # every checkable training row is found
    assert ov.estimated == pytest.approx(1000.0)


def test_damaged_or_foreign_record_is_refused():
    with pytest.raises(ValueError, match="must use method"):
        training_overlap({"method": "md5"}, np.zeros((1, 2)))
    with pytest.raises(ValueError, match="damaged"):
        training_overlap({"method": fp.FINGERPRINT_METHOD, "hashes": "!!"}, np.zeros((1, 2)))


def _binned_breast_cancer(features: int = 10, bins: int = 4) -> np.ndarray:
    """scikit-learn's bundled load_breast_cancer, its first ``features`` columns each cut into
    ``bins`` quantile bins (0..bins-1): a public discrete-feature set in which different patients
    share feature vectors (10 x 4 bins: about 15% of a fresh row's vectors were seen in training)."""
    from sklearn.datasets import load_breast_cancer

    x = load_breast_cancer().data[:, :features]
    edges = np.quantile(x, np.linspace(0, 1, bins + 1)[1:-1], axis=0)
    return np.stack([np.digitize(x[:, j], edges[:, j]) for j in range(features)], axis=1).astype(float)


@pytest.mark.parametrize("features,bins", [(10, 4), (12, 3), (10, 3), (8, 4), (4, 4)])
def test_disjoint_split_of_discrete_features_is_natural_and_training_rows_are_caught(features, bins):
    """A held-out part split disjointly by index (seeded permutation, 400 train / 169 held out) is
    judged "natural": its matches are what the training rows' own repetition predicts (Good 1953's
    1 - N1/N, its upper 95% Clopper-Pearson bound via scipy.stats.beta, binomial test with
    scipy.stats.binom.sf). 200 training rows are "leak" wherever repeats are not near universal;
    40 training rows added to the held-out part are caught where repeats are rare (under 30%);
    where nearly every vector is common (4 features x 4 bins: 97%) a copy looks like fresh rows."""
    x = _binned_breast_cancer(features, bins)
    perm = np.random.default_rng(0).permutation(len(x))
    train, held = x[perm[:400]], x[perm[400:]]
    rec = training_fingerprint(train)
    natural = training_overlap(rec, held)
    assert natural.count > 0 and natural.verdict == "natural", natural.describe()
    keys = [r.tobytes() for r in train.astype("<f4")]
    repeats = 400 - sum(1 for k in set(keys) if keys.count(k) == 1)
    assert natural.repeat_rate == pytest.approx(stats.beta.ppf(0.95, repeats + 1, 400 - repeats))
    assert natural.repeat_rate >= repeats / 400
    itself = training_overlap(rec, train[:200])
    leaked = training_overlap(rec, np.concatenate([held, train[:40]]))
    assert itself.count == 200
    if natural.repeat_rate < 0.9:
        assert itself.verdict == "leak", itself.describe()
    if natural.repeat_rate < 0.3:
        assert leaked.verdict == "leak", leaked.describe()


def test_continuous_rows_a_few_copies_are_warned_a_file_of_them_refused_and_old_records_refuse_every_match():
    """Continuous features (load_breast_cancer as shipped): no training vector repeats; one copied row
    among 170 is within what 400 rows can rule out (warned, with counts), 50 are a leak; a record
    written before ``singletons`` existed judges every match a leak (the earlier behaviour)."""
    from sklearn.datasets import load_breast_cancer

    x = load_breast_cancer().data
    rec = training_fingerprint(x[:400])
    assert rec["singletons"] == 400 and training_overlap(rec, x[400:]).verdict == "none"
    one = training_overlap(rec, np.concatenate([x[400:], x[:1]]))
    assert one.verdict == "natural" and "1 of 170 rows match" in one.describe()
    assert training_overlap(rec, np.concatenate([x[400:], x[:50]])).verdict == "leak"
    old = {k: v for k, v in training_fingerprint(_binned_breast_cancer(4, 4)[:400]).items() if k != "singletons"}
    assert training_overlap(old, _binned_breast_cancer(4, 4)[400:]).verdict == "leak"
