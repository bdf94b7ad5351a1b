"""serve/core/fingerprint.py: the training-row fingerprint.

Reference: hashlib.sha256 (FIPS 180-4) on the float32 little-endian bytes of one row,
computed here by hand; numpy's float32 cast for what counts as the same row.
"""

from __future__ import annotations

import base64
import hashlib

import numpy as np
import pytest

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
