"""serve/core/projection.py and the projected support check of large inputs.

References: the scaling of the very sparse random projection (Li, Hastie & Church, KDD 2006:
E[|z R|^2] = |z|^2); the exact k-NN distance in the full space from
sklearn.neighbors.NearestNeighbors; data: scikit-learn's bundled 8x8 digits
(sklearn.datasets.load_digits), each pixel blown up to 6x6 and copied to 3 channels, a
3x48x48 "image" of 6,912 features (past PROJECT_ABOVE, so the check projects).
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np
import pytest
from sklearn.datasets import load_digits
from sklearn.neighbors import NearestNeighbors

from demur.serve.core.bundle import SupportSection
from demur.serve.core.projection import PROJECT_ABOVE, PROJECTION_DIMS, Projection
from demur.serve.core.support import NEIGHBOURS, standardisation, support_from_manifest, support_record
from demur.serve.errors import ManifestInvalid

DIGITS = load_digits().data.astype(np.float64)
BIG = np.kron(DIGITS.reshape(-1, 8, 8), np.ones((6, 6)))[:, None].repeat(3, axis=1).reshape(len(DIGITS), -1)
TRAIN, HELD, TEST = BIG[:1000], BIG[1000:1400], BIG[1400:]


class _Inputs:
    def __init__(self, spec: dict[str, Any]) -> None:
        self.__dict__.update(spec)


class _Manifest:
    def __init__(self, record: dict[str, Any], spec: dict[str, Any]) -> None:
        self.support = SupportSection(threshold=None, record=record)
        self.inputs = _Inputs(spec)


@pytest.fixture(scope="module")
def spec() -> dict[str, Any]:
    center, scale = standardisation(TRAIN, shared_units=True)
    return {"names": [f"px{j}" for j in range(BIG.shape[1])], "shape": [3, 48, 48], "center": center.tolist(),
            "scale": scale.tolist(), "low": TRAIN.min(0).tolist(), "high": TRAIN.max(0).tolist(), "kind": "image"}


@pytest.fixture(scope="module")
def record(spec: dict[str, Any]) -> dict[str, Any]:
    return support_record(TRAIN, HELD, spec)


def test_squared_norms_are_kept_in_expectation() -> None:
    """Li, Hastie & Church 2006: with each column scaled by sqrt(F / (dims k)), E[|z R|^2] = |z|^2."""
    z = np.random.default_rng(0).standard_normal((400, 6912)).astype(np.float32)
    ratios = [(np.square(Projection.build(6912, 256, seed).apply(z)).sum(1) / np.square(z).sum(1)).mean()
              for seed in range(5)]
    assert np.mean(ratios) == pytest.approx(1.0, abs=0.03)


def test_projected_distance_is_close_to_the_exact_one(spec: dict[str, Any], record: dict[str, Any]) -> None:
    assert BIG.shape[1] > PROJECT_ABOVE and record["projection"]["dims"] == PROJECTION_DIMS
    check = support_from_manifest(_Manifest(record, spec))
    z = lambda a: (a - np.asarray(spec["center"])) / np.asarray(spec["scale"])  # noqa: E731
    exact = NearestNeighbors(n_neighbors=NEIGHBOURS).fit(z(TRAIN)).kneighbors(z(TEST))[0][:, -1]
    rel = np.abs(check.distance(TEST) / exact - 1.0)
    # measured: median 1.5%, largest 8.4%; the bounds leave room for another seed's R
    assert np.median(rel) < 0.05 and rel.max() < 0.2


def test_the_record_stays_small_and_the_check_still_refuses_far_off_images(spec: dict[str, Any],
                                                                            record: dict[str, Any]) -> None:
    """2,000 x 6,912 float32 rows would be 55 MB of sample; projected, 1,000 x 512. Clean held-out
    images are flagged near the stated 1% (split-conformal; the bound is the record's), inverted
    (16 - x) and uniform-noise images all."""
    assert record["sample"]["shape"] == [len(TRAIN), PROJECTION_DIMS]
    assert len(json.dumps(record)) < 4_000_000
    check = support_from_manifest(_Manifest(record, spec))
    assert check.check(TEST).outside.mean() <= 0.03
    noise = np.random.default_rng(1).uniform(TRAIN.min(0), TRAIN.max(0), size=TEST.shape)
    assert check.check(16.0 - TEST).outside.all() and check.check(noise).outside.all()


def test_the_projection_is_rebuilt_identically_at_load(spec: dict[str, Any], record: dict[str, Any]) -> None:
    first = support_from_manifest(_Manifest(record, spec)).distance(TEST[:50])
    again = support_from_manifest(_Manifest(json.loads(json.dumps(record)), spec)).distance(TEST[:50])
    np.testing.assert_array_equal(first, again)


def test_a_malformed_projection_is_refused(spec: dict[str, Any], record: dict[str, Any]) -> None:
    for bad in ({**record["projection"], "features": 10}, {**record["projection"], "kind": "dense"},
                {**record["projection"], "dims": 0}, "512"):
        with pytest.raises(ManifestInvalid) as info:
            support_from_manifest(_Manifest({**record, "projection": bad}, spec))
        assert info.value.field == "support"


def test_small_inputs_are_not_projected() -> None:
    center, scale = standardisation(DIGITS[:900], shared_units=True)
    small = {"names": [f"p{j}" for j in range(64)], "center": center.tolist(), "scale": scale.tolist(),
             "low": DIGITS[:900].min(0).tolist(), "high": DIGITS[:900].max(0).tolist()}
    rec = support_record(DIGITS[:900], DIGITS[900:1200], small)
    assert "projection" not in rec and rec["sample"]["shape"] == [900, 64]
