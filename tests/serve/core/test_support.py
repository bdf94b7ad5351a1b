"""serve/core/support.py: the support check, its stated false-alarm rate, the floored
standardisation, and the check through HTTP (decision, reason, /v1/model, metric label).

References: the k-NN distance against sklearn.neighbors.NearestNeighbors; the false-alarm
rate against its stated level over many random splits of scikit-learn's bundled digits
(sklearn.datasets.load_digits), with an exact binomial test (scipy.stats.binomtest); the
split-conformal rank ceil((n+1)(1-alpha)) (Lei et al. 2018; Vovk et al. 2005).
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable
from typing import Any

import numpy as np
import pytest
from prometheus_client.parser import text_string_to_metric_families
from scipy.stats import binomtest
from sklearn.datasets import load_digits
from sklearn.neighbors import NearestNeighbors

from demur.serve.core import support as support_mod
from demur.serve.core.bundle import SupportSection, load_bundle, write_manifest
from demur.serve.core.support import (
    IMAGE_SCALE_FLOOR,
    REASON,
    TABULAR_SCALE_FLOOR,
    conformal_threshold,
    recalibrated,
    standardisation,
    support_from_manifest,
    support_record,
)

DIGITS = load_digits().data.astype(np.float64)


def _spec(x: np.ndarray, image: bool = True) -> dict[str, Any]:
    center, scale = standardisation(x, shared_units=image)
    return {"names": [f"px_r{j // 8}c{j % 8}" for j in range(x.shape[1])], "shape": [x.shape[1]],
            "center": center.tolist(), "scale": scale.tolist(), "low": x.min(0).tolist(),
            "high": x.max(0).tolist(), "kind": "image" if image else "tabular"}


class _Manifest:
    """What support_from_manifest reads of a manifest: the typed support section and the inputs."""

    def __init__(self, raw: dict[str, Any], inputs: Any) -> None:
        record = raw.get("support")
        self.support = SupportSection(threshold=None, record=record) if record else None
        self.inputs = inputs


def _check(x_train: np.ndarray, x_held: np.ndarray, alpha: float = 0.01) -> Any:
    spec = _spec(x_train)
    return support_from_manifest(_Manifest({"support": support_record(x_train, x_held, spec, alpha=alpha)},
                                           _SpecView(spec)))


class _SpecView:
    def __init__(self, spec: dict[str, Any]) -> None:
        self.__dict__.update(spec)


def test_standardisation_floors_near_constant_features() -> None:
    x = DIGITS[:900]
    center, scale = standardisation(x, shared_units=True)
    np.testing.assert_allclose(center, x.mean(0))
    assert scale.min() >= IMAGE_SCALE_FLOOR * x.std() - 1e-12
    # where the std is above the floor it is the plain std (numpy's population std)
    big = x.std(0) > IMAGE_SCALE_FLOOR * x.std()
    np.testing.assert_allclose(scale[big], x.std(0)[big])
    # the case of the issue: a x3 digit no longer reaches z-scores in the hundreds
    z = (3 * DIGITS[1000:1100] - center) / scale
    assert np.abs(z).max() < 30
    tab = np.column_stack([np.r_[np.zeros(999), 1.0], np.linspace(0, 10, 1000), np.full(1000, 7.0)])
    _, s = standardisation(tab)
    assert s[0] == pytest.approx(TABULAR_SCALE_FLOOR * 1.0)  # std 0.032 floored at 5% of the range 0-1
    assert s[1] == pytest.approx(tab[:, 1].std()) and s[2] == 1.0


def test_knn_distance_matches_sklearn() -> None:
    x_train, x_new = DIGITS[:800], DIGITS[800:900]
    check = _check(x_train, DIGITS[900:1000])
    spec = _spec(x_train)
    z = lambda a: (a - np.asarray(spec["center"])) / np.asarray(spec["scale"])  # noqa: E731
    ref = NearestNeighbors(n_neighbors=support_mod.NEIGHBOURS).fit(z(x_train).astype(np.float32))
    dist, _ = ref.kneighbors(z(x_new))
    np.testing.assert_allclose(check.distance(x_new), dist[:, -1], rtol=1e-4, atol=1e-4)
    many = DIGITS[1000:]          # past _DIRECT_ROWS: the block preselection's path
    assert len(many) > support_mod._DIRECT_ROWS
    dist, _ = ref.kneighbors(z(many))
    np.testing.assert_allclose(check.distance(many), dist[:, -1], rtol=1e-4, atol=1e-4)


def test_conformal_rank_and_small_samples() -> None:
    s = np.arange(1.0, 201.0)  # n = 200, alpha 0.05: rank ceil(201 * 0.95) = 191
    t, bound = conformal_threshold(s, 0.05)  # written midway to the next distance, never on one
    assert t == 191.5 and bound == pytest.approx(1 - 191 / 201)
    t, bound = conformal_threshold(s[:50], 0.01)  # too few for 1%: the largest (0.1% above it), bound 1/51
    assert t == pytest.approx(50.05) and t > 50.0 and bound == pytest.approx(1 / 51)


@pytest.mark.slow
def test_false_alarm_rate_holds_its_stated_level_over_random_splits() -> None:
    """Flagged share of fresh in-distribution digits <= alpha: exact one-sided binomial test over
    150 random train/held-out/test splits (scipy.stats.binomtest), and not far below it."""
    rng = np.random.default_rng(7)
    alpha, flagged, total = 0.05, 0, 0
    for _ in range(150):
        idx = rng.permutation(len(DIGITS))
        tr, held, te = DIGITS[idx[:900]], DIGITS[idx[900:1200]], DIGITS[idx[1200:1210]]
        check = _check(tr, held, alpha)
        flagged += int(check.check(te).outside.sum())
        total += len(te)
    rate = flagged / total
    assert binomtest(flagged, total, alpha, alternative="greater").pvalue > 0.001, rate
    assert binomtest(flagged, total, alpha - 1 / 301, alternative="less").pvalue > 0.001, rate


def test_reasons_name_the_feature_or_the_distance() -> None:
    check = _check(DIGITS[:900], DIGITS[900:1200])
    clean = DIGITS[1200:1300]
    x3 = 3 * clean[:1]
    rng = np.random.default_rng(0)
    noise = rng.uniform(DIGITS[:900].min(0), DIGITS[:900].max(0), size=(1, 64))
    res = check.check(np.vstack([x3, noise, np.zeros((1, 64))]))
    assert res.outside.all()
    assert res.reason[0].startswith(f"{REASON}: feature px_r") and "above training range 0-" in res.reason[0]
    assert res.reason[1].startswith(f"{REASON}: distance to training data ")
    assert check.check(clean).outside.mean() <= 0.05


def test_recalibrated_keeps_the_sample_and_records_the_split() -> None:
    spec = _spec(DIGITS[:900])
    rec = support_record(DIGITS[:900], DIGITS[900:990], spec)
    inside = rec["heldout"]["n"] - rec["heldout"]["outside_range"]
    assert rec["heldout"]["split"] == "validation" and rec["false_alarm_bound"] == pytest.approx(1 / (inside + 1))
    again = recalibrated(rec, spec, DIGITS[990:1390])
    assert again["sample"] == rec["sample"] and again["heldout"]["n"] == 400
    assert again["false_alarm_bound"] <= 0.01


def test_old_manifest_has_no_check() -> None:
    assert support_from_manifest(_Manifest({}, None)) is None


# --- through HTTP -----------------------------------------------------------------------


@pytest.fixture()
def support_client(tiny_bundle_factory: Callable[..., Any], copy_bundle: Callable[[Any], Any],
                   make_app: Callable[..., Any]) -> Any:
    """The tiny classifier with a support record fitted on digits (its input spec kept)."""
    path = copy_bundle(tiny_bundle_factory())
    raw = json.loads((path / "manifest.json").read_text())
    raw["inputs"]["low"], raw["inputs"]["high"] = DIGITS[:900].min(0).tolist(), DIGITS[:900].max(0).tolist()
    raw["support"] = support_record(DIGITS[:900], DIGITS[900:1200], raw["inputs"])
    raw["decision"]["threshold"] = 1e9  # the score alone accepts everything
    write_manifest(path, raw)
    return make_app(load_bundle(path)).test_client()


def _abstentions(text: str) -> dict[str, float]:
    return {s.labels["reason"]: s.value for fam in text_string_to_metric_families(text)
            for s in fam.samples if s.name == "demur_abstentions_total"}


def test_http_abstains_outside_training_data_and_counts_it(support_client: Any) -> None:
    cases = [DIGITS[1300].tolist(), (3 * DIGITS[1300]).tolist()]
    body = support_client.post("/v1/predict", json={"cases": cases}).get_json()
    inside, outside = body["results"]
    assert inside["decision"] == "accept"
    assert outside["decision"] == "abstain" and outside["reason"].startswith(f"{REASON}: feature px_r")
    assert "review_id" in outside or "review" in outside  # went to review like any abstention
    counts = _abstentions(support_client.get("/metrics").get_data(as_text=True))
    assert counts.get("outside_training_data") == 1.0 and counts.get("score", 0.0) == 0.0
    model = support_client.get("/v1/model").get_json()
    assert model["support"]["checked"] is True and model["support"]["alpha"] == 0.01
    assert "sample" not in model["support"]


def test_http_old_bundle_says_it_is_unchecked(client: Any) -> None:
    model = client.get("/v1/model").get_json()
    assert model["support"]["checked"] is False and "no support record" in model["support"]["reason"]


def test_one_held_out_case_outside_the_range_does_not_switch_the_distance_off() -> None:
    """Found by a new user: on a small held-out set (n + 1 < 1/alpha) one held-out case outside
    the training range used to make the threshold infinite, and the distance check silently
    accepted uniform noise. The distance threshold is now set on the cases inside the range
    (split-conformal on that sub-population, Lei et al. 2018), and the range check's own rate
    is recorded with a Clopper-Pearson bound (checked against scipy.stats.binomtest)."""
    spec = _spec(DIGITS[:900])
    heldout = np.vstack([DIGITS[900:990], DIGITS[990:991] * 3])  # one case far outside 0-16
    rec = support_record(DIGITS[:900], heldout, spec)
    assert math.isfinite(rec["threshold"]) and rec["threshold"] < 1e6
    assert rec["range_flagged"]["flagged"] >= 1
    m, n = rec["range_flagged"]["flagged"], rec["range_flagged"]["n"]
    want = binomtest(m, n).proportion_ci(confidence_level=0.90, method="exact").high  # one side of a 90% CI
    assert rec["range_flagged"]["upper_95"] == pytest.approx(want, rel=1e-9)
    check = support_from_manifest(_Manifest({"support": rec}, _SpecView(spec)))
    noise = np.random.default_rng(0).uniform(0, 16, size=(200, 64))
    assert check.check(noise).outside.mean() > 0.9
