"""Issue 26.2 / 26.3: the temperature and the joint rank are served identically by the server,
`demur calibrate` and `demur evaluate`, and the temperature `demur train` fits is the likelihood's.

References: temperature scaling of the predictive mean, softmax(ln p̄ / T), fitted by the NLL on
held-out cases (Guo et al., "On Calibration of Modern Neural Networks", ICML 2017, sec. 4.2),
computed here by scipy.special.softmax; ECE and NLL by the same helpers the tables use, checked
elsewhere against scikit-learn (tests/serve/offline/test_calibration.py).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import torch
from scipy import special, stats

from demur.export.calibration import calibrate
from demur.export.evaluation import evaluate
from demur.export.temperature import served_statistics
from demur.serve.adapters.engine import Engine
from demur.serve.config import ServeConfig
from demur.serve.core.bundle import load_bundle, write_manifest
from demur.serve.offline.calibration import select_for_abstain
from demur.serve.offline.metrics import expected_calibration_error, negative_log_likelihood
from demur.serve.web.app import create_app

T = 0.4


@pytest.fixture()
def tempered(tiny_bundle_factory, copy_bundle):
    """A copy of the tiny digits bundle serving T = 0.4 and a score reference."""
    path = copy_bundle(tiny_bundle_factory(task="classification", kind="stacked", draws=8))
    raw = json.loads((path / "manifest.json").read_text())
    levels = np.linspace(0.0, 1.0, 11)
    raw["target"] = {"center": 0.0, "scale": 1.0, "temperature": T, "score_reference": {
        "predictive_entropy": (levels * 2.3).tolist(), "mutual_information": (levels * 0.05).tolist()}}
    write_manifest(path, raw)
    return load_bundle(path)


def _served_by_hand(bundle, x):
    """The reference: per-draw softmax, their mean, then softmax(ln mean / T) (scipy)."""
    draws = Engine(bundle, graph="stacked", seed=0).load().run(x)
    mean = special.softmax(draws.astype(np.float64), axis=-1).mean(axis=0)
    return special.softmax(np.log(mean) / T, axis=1)


def test_server_calibrate_and_evaluate_apply_the_same_temperature(tempered, demo_dataset, tmp_path):
    ds = demo_dataset
    x, y = ds.x_test[:120], ds.y_test[:120]
    want = _served_by_hand(tempered, x)

    # the server: POST /v1/predict gives the tempered mean
    app = create_app(ServeConfig(bundle=str(tempered.path), seed=0, data_dir=str(tmp_path / "data")))
    results = app.test_client().post("/v1/predict", json={"cases": x[:5].tolist()}).get_json()["results"]
    assert np.allclose([r["mean"] for r in results], want[:5], atol=1e-6)
    assert np.allclose([r["uncertainty"]["predictive_entropy"] for r in results], stats.entropy(want[:5], axis=1),
                       atol=1e-6)

    # demur evaluate: its accuracy, ECE and NLL are those of the tempered mean
    ref = evaluate(tempered, x, y)["models"]["bundle"]["referral"]
    assert ref["ece"] == pytest.approx(expected_calibration_error(want, y), abs=1e-6)
    assert ref["nll"] == pytest.approx(negative_log_likelihood(want, y), abs=1e-6)
    assert "joint_rank" in ref["rankings"]

    # demur calibrate: the threshold is the abstain quantile of the tempered predictive entropy
    record = calibrate(tempered, x, y, target_abstain=0.2, score="predictive_entropy")
    expected = select_for_abstain(stats.entropy(want, axis=1), 0.2).threshold
    assert load_bundle(tempered.path).manifest.decision.threshold == pytest.approx(expected, abs=1e-6)
    assert record is not None


def test_a_joint_rank_rule_needs_a_score_reference(tiny_bundle_factory, copy_bundle):
    from demur.serve.errors import ManifestInvalid

    path = copy_bundle(tiny_bundle_factory(task="classification", kind="stacked", draws=8))
    raw = json.loads((path / "manifest.json").read_text())
    raw["decision"]["score"] = "joint_rank"
    raw["target"] = {"center": 0.0, "scale": 1.0}
    with pytest.raises(ManifestInvalid, match="score_reference"):
        write_manifest(path, raw)
    raw["target"]["temperature"] = -1.0
    raw["decision"]["score"] = "predictive_entropy"
    with pytest.raises(ManifestInvalid, match="target.temperature"):
        write_manifest(path, raw)


def test_the_fitted_temperature_recovers_a_known_one():
    # Guo et al. 2017: T minimises the held-out NLL, so it is the maximum-likelihood temperature.
    # Labels drawn from softmax(z0) with logits served as 2 * z0 (one draw): the MLE of T is
    # consistent, so on 20,000 cases it lands near 2 (tolerance 0.1, about 5 standard errors
    # from a run of this check).
    rng = np.random.default_rng(0)
    z0 = rng.normal(scale=2.0, size=(20000, 6))
    y = np.array([rng.choice(6, p=p) for p in special.softmax(z0, axis=1)])
    stats_ = served_statistics(torch.tensor(2.0 * z0[None], dtype=torch.float32), y,
                               torch.tensor(z0[None, :500], dtype=torch.float32), fit=True)
    assert stats_["temperature"] == pytest.approx(2.0, abs=0.1)
    ref = stats_["score_reference"]
    assert len(ref["predictive_entropy"]) == 101 and np.all(np.diff(ref["predictive_entropy"]) >= 0)
    assert served_statistics(torch.zeros(1, 3, 4), np.zeros(3, dtype=int), torch.zeros(1, 3, 4),
                             fit=False)["temperature"] == 1.0


@pytest.mark.slow
def test_joint_rank_keeps_the_guarantee_at_the_demo_target(demo_bundle, demo_dataset):
    """The population design of tests/serve/offline/test_calibration.py with the joint rank as the score: the
    pool is the 718 held-out digits (cal + test splits) through the serving path once, and IS the
    population; each of 1000 calibration sets is 359 digits drawn from it with replacement; a
    violation is the pool's accepted accuracy at the chosen threshold below the demo target 0.98.
    The joint rank's reference quantiles come from the training rows (demur train), never from the
    calibration rows, so the score is a fixed function of the case and Learn-then-Test's guarantee
    (Angelopoulos et al. 2021) holds as for any score. Check: the exact binomial 99% interval of the
    violation rate (scipy.stats.binomtest) reaches down to delta = 0.1."""
    from tests.serve.offline.test_calibration import DEMO_DELTA, _digits_pool, _violation_study

    from demur.serve.core.decision import score_values

    assert "score_reference" in demo_bundle.manifest.target
    _, correct, summary = _digits_pool(demo_bundle, demo_dataset)
    scores = score_values(summary, "joint_rank")

    def at(t):  # the pool's accepted accuracy and coverage at threshold t
        keep = scores <= t
        return float(correct[keep].mean()), float(keep.mean())

    reps = 1000
    pop, _, feasible, _ = _violation_study(scores, correct, at, "fixed_sequence", reps, seed=77)
    ci = stats.binomtest(pop, reps).proportion_ci(confidence_level=0.99, method="exact")
    print(f"\n[joint rank, digits pool of {len(scores)}] feasible {feasible}/{reps}; population violation rate "
          f"{pop / reps:.4f} (99% CI {ci.low:.4f}-{ci.high:.4f})")
    assert feasible >= reps // 2
    assert ci.low <= DEMO_DELTA


def test_the_held_out_class_retraining_serves_the_same_statistics(tmp_path, demo_dataset):
    """`demur evaluate --holdout-class` retrains the recorded recipe and exports it: the retrained
    bundle carries the mixture's temperature and score reference (as `demur train` records them), so
    a rule calibrated on the joint rank is recalibrated on it, not refused."""
    from demur.serve.cli import main

    ck, b = tmp_path / "ck", tmp_path / "b"
    assert main(["train", "--data", "digits", "--members", "2", "--epochs", "1", "--hidden", "16",
                 "--sigma-param", "log", "--fit-temperature", "--out", str(ck)]) == 0
    assert main(["export", str(ck), "--draws", "8", "--out", str(b)]) == 0
    calibrate(b, demo_dataset.x_cal, demo_dataset.y_cal, target_abstain=0.2, score="joint_rank")
    figures = evaluate(b, demo_dataset.x_test, demo_dataset.y_test, holdout=("9", demo_dataset))
    row = figures["models"]["bundle"]["holdout"]
    assert "joint_rank" in row["auroc"] and "joint_rank >" in row["rule"]
