"""export/training.py: ELBO training, metrics and ``demur train``.

References: Guo et al., "On Calibration of Modern Neural Networks", ICML 2017,
eq. 3 (ECE, worked example below computed by hand); scikit-learn
(accuracy_score, log_loss); scipy.stats.norm (Gaussian log-density);
sklearn's bundled digits and diabetes data; torch.load(weights_only=True).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats
import torch
from sklearn.datasets import load_diabetes
from sklearn.metrics import accuracy_score, log_loss

import demur.export.training as training
from demur.export.datasets import load_dataset
from demur.export.errors import LayerConfigError
from demur.export.layers import VariationalLinear, variational_layers
from demur.serve.offline.metrics import expected_calibration_error
from demur.export.checkpoints import load_checkpoint
from demur.export.training import predictive_metrics, standardise_inputs, train
from demur.serve.cli import main

from tests.export._local import local_layer


def test_kl_warmup_is_linear_then_flat_and_rho_gets_its_own_step():
    """KL annealing as documented: beta = min(1, (step + 1) / (warmup * total)) * weight (linear ramp,
    common practice); Adam's param groups carry the separate rho step size."""
    assert [training.kl_weight(s, 10, warmup=0.5, weight=2.0) for s in (0, 4, 9)] == [0.4, 2.0, 2.0]
    model = torch.nn.Sequential(training.build_model("mlp", [4], 2, "radial", hidden=(3,)))
    groups = training.elbo_optimiser(model, lr=0.01, rho_lr=0.001).param_groups
    assert [g["lr"] for g in groups] == [0.01, 0.001] and len(groups[1]["params"]) == 4


def test_cosine_schedule_follows_sgdr_equation_5():
    """``lr_schedule="cosine"``: after t of T steps every group's step size is SGDR's eq. (5)
    (Loshchilov & Hutter, ICLR 2017) with one cycle and eta_min = 0, eta (1 + cos(pi t / T)) / 2;
    checked step by step for both param groups (means and rho), ending at 0."""
    def optimiser() -> torch.optim.Optimizer:
        model = torch.nn.Sequential(training.build_model("mlp", [4], 2, "radial", hidden=(3,)))
        return training.elbo_optimiser(model, lr=0.01, rho_lr=0.001)

    opt = optimiser()
    schedule = training._lr_schedule(opt, "cosine", 12)
    for t in range(1, 13):
        opt.step(), schedule.step()
        expected = [eta * (1.0 + math.cos(math.pi * t / 12)) / 2.0 for eta in (0.01, 0.001)]
        assert [g["lr"] for g in opt.param_groups] == pytest.approx(expected, abs=1e-12)
    assert [g["lr"] for g in opt.param_groups] == pytest.approx([0.0, 0.0], abs=1e-12)
    flat = optimiser()
    kept = training._lr_schedule(flat, "constant", 12)
    for _ in range(5):
        flat.step(), kept.step()
    assert [g["lr"] for g in flat.param_groups] == [0.01, 0.001]


def test_ece_worked_example():
    # Guo et al. 2017, eq. 3, by hand: two cases at confidence 0.9 (one right) and two at
    # 0.6 (both right): ECE = 2/4 * |0.5 - 0.9| + 2/4 * |1.0 - 0.6| = 0.4
    probs = np.array([[0.9, 0.1], [0.9, 0.1], [0.4, 0.6], [0.4, 0.6]])
    y = np.array([0, 1, 1, 1])
    assert expected_calibration_error(probs, y) == pytest.approx(0.4, abs=1e-12)
    # perfectly confident and right -> 0
    assert expected_calibration_error(np.eye(3), np.arange(3)) == pytest.approx(0.0)


def test_classification_metrics_match_sklearn():
    # references: sklearn.metrics.accuracy_score and log_loss on the draw-averaged softmax
    rng = np.random.default_rng(0)
    draws = torch.as_tensor(rng.normal(size=(6, 50, 4)) * 2, dtype=torch.float32)
    y = rng.integers(0, 4, size=50)
    probs = torch.softmax(draws.double(), dim=-1).mean(0).numpy()
    m = predictive_metrics(draws, y, "classification")
    assert m["accuracy"] == pytest.approx(accuracy_score(y, probs.argmax(1)))
    assert m["nll"] == pytest.approx(log_loss(y, probs, labels=range(4)), rel=1e-9)
    assert m["ece"] == pytest.approx(expected_calibration_error(probs, y))


def test_regression_metrics_match_scipy_norm():
    # reference: scipy.stats.norm.logpdf in target units, one draw (a one-component mixture)
    rng = np.random.default_rng(1)
    mean_std, logvar = rng.normal(size=20), rng.normal(size=20) * 0.3
    target = {"center": 150.0, "scale": 75.0}
    y = rng.normal(150, 75, size=20)
    draws = torch.as_tensor(np.stack([mean_std, logvar], -1)[None], dtype=torch.float64)
    m = predictive_metrics(draws, y, "regression", target)
    mu = mean_std * 75 + 150
    sd = np.exp(logvar / 2) * 75
    assert m["nll"] == pytest.approx(-scipy.stats.norm.logpdf(y, mu, sd).mean(), rel=1e-9)
    assert m["rmse"] == pytest.approx(np.sqrt(np.mean((mu - y) ** 2)))


def test_standardisation_floors_constant_features():
    # digits: the corner pixel px_r0c0 is 0 in every image; images share one unit, so every
    # scale is floored at 0.3 x the pooled pixel std (demur.serve.core.support.standardisation)
    ds = load_dataset("digits")
    spec = training._input_spec(ds, "mlp")
    floor = 0.3 * ds.x_train.std()
    assert spec["scale"][0] == pytest.approx(floor) and spec["center"][0] == 0.0
    np.testing.assert_allclose(spec["center"], ds.x_train.mean(0))
    z = standardise_inputs(spec, ds.x_train)
    assert z.dtype == np.float32 and z.shape == (989, 64)
    varying = ds.x_train.std(0) > floor
    np.testing.assert_allclose(z[:, varying].std(0), 1.0, atol=1e-5)
    conv = training._input_spec(ds, "conv")
    assert conv["shape"] == [1, 8, 8] and standardise_inputs(conv, ds.x_test[:3]).shape == (3, 1, 8, 8)


def test_bad_settings_are_named():
    ds = load_dataset("diabetes")
    with pytest.raises(LayerConfigError, match="arch 'conv' needs image inputs"):
        train(ds, arch="conv", epochs=1)
    with pytest.raises(LayerConfigError, match="unknown training settings"):
        train(ds, epochs=1, learning_rate=0.1)
    with pytest.raises(LayerConfigError, match="epochs must be >= 1"):
        train(ds, epochs=0)
    with pytest.raises(LayerConfigError, match="lr_schedule must be one of") as err:
        train(ds, epochs=1, lr_schedule="linear")
    assert err.value.field == "lr_schedule"


def test_training_is_seedable():
    ds = load_dataset("digits")
    threads = torch.get_num_threads()
    a = train(ds, epochs=1, seed=5, hidden=(16,), progress=False)
    assert torch.get_num_threads() == threads  # the thread setting is restored afterwards
    b = train(ds, epochs=1, seed=5, hidden=(16,), progress=False)
    c = train(ds, epochs=1, seed=6, hidden=(16,), progress=False)
    la, lb, lc = (variational_layers(r.model)[0].weight_mu for r in (a, b, c))
    assert torch.equal(la, lb) and not torch.equal(la, lc)


def test_gaussian_mlp_smoke():
    # 10 classes: chance is 0.1; a few epochs already learn most digits
    r = train(load_dataset("digits"), posterior="gaussian", epochs=5, hidden=(64, 64), progress=False)
    assert r.metrics["test"]["accuracy"] > 0.5
    assert r.meta["arch"]["posterior"] == "gaussian"


def test_conv_smoke():
    r = train(load_dataset("digits"), arch="conv", posterior="radial", epochs=5, channels=(8, 16), progress=False)
    assert r.metrics["test"]["accuracy"] > 0.5
    assert r.meta["inputs"]["shape"] == [1, 8, 8]


def test_csv_regression_smoke(tmp_path):
    # sklearn's bundled diabetes data written as a CSV; better than predicting the
    # training mean (RMSE below the test targets' std) -- a baseline, common practice
    ref = load_diabetes(scaled=False)
    lines = [",".join(ref.feature_names + ["progression"])]
    lines += [",".join(f"{v:g}" for v in (*row, t)) for row, t in zip(ref.data, ref.target)]
    csv = tmp_path / "diabetes.csv"
    csv.write_text("\n".join(lines) + "\n")
    ds = load_dataset(csv, "progression")
    r = train(ds, epochs=40, out=tmp_path / "run", progress=False, hidden=(32, 32))
    assert ds.task == "regression" and r.meta["labels"] == ["progression"]
    assert r.meta["target"]["center"] == pytest.approx(ds.y_train.mean())
    assert r.metrics["test"]["rmse"] < ds.y_test.std()
    assert math.isfinite(r.metrics["test"]["nll"])
    model, meta = load_checkpoint(tmp_path / "run")
    assert meta["task"] == "regression" and model(torch.zeros(2, 10)).shape == (2, 2)


def test_cli_train_writes_checkpoint_and_prints_summary(tmp_path, capsys):
    code = main(["train", "--data", "digits", "--posterior", "gaussian", "--epochs", "1", "--hidden", "16",
                 "--out", str(tmp_path / "run"), "--no-progress"])
    assert code == 0
    out = capsys.readouterr().out
    assert "test accuracy" in out and "ECE" in out and "checkpoint.pt" in out
    assert (tmp_path / "run" / "checkpoint.pt").is_file()


def test_cli_reports_a_missing_target_column(tmp_path, capsys):
    csv = tmp_path / "p.csv"
    csv.write_text("a,b\n1,2\n")
    code = main(["train", "--data", str(csv), "--target", "postcode", "--out", str(tmp_path / "run")])
    assert code == 1
    assert "'postcode' is not in" in capsys.readouterr().err


@pytest.mark.slow
def test_demo_radial_mlp_reaches_95_percent_on_digits(tmp_path):
    # The bar: the demo radial MLP with the default settings reaches accuracy >= 0.95
    # on the digits test split (359 images of sklearn's bundled digits). ECE (Guo et al. 2017,
    # 15 bins) and the wall time are printed, not asserted (no timed tests).
    r = train(load_dataset("digits"), arch="mlp", posterior="radial", out=tmp_path, progress=False)
    t = r.metrics["test"]
    print(f"\n{training.summary_line(r)}; sigma median {r.metrics['sigma']['median']:.4f}")
    assert t["accuracy"] >= 0.95
    assert 0.0 <= t["ece"] < 0.1


def test_ensemble_checkpoint_round_trips_and_exports_the_mixture(tmp_path, capsys):
    """`demur train --members 3` -> one checkpoint of 3 members (torch.load(weights_only=True) reads
    it) -> `demur export` serves each member's own posterior draws, 10 // 3 = 3 each; reference:
    each member's stored draws through F.linear/torch.relu by hand, torch.softmax per draw,
    averaged over all draws (the mixture predictive; Wilson & Izmailov, NeurIPS 2020), 1e-5."""
    import torch.nn.functional as F

    from demur.export.draws import DrawNetwork
    from demur.serve.adapters.engine import Engine
    from demur.serve.core.bundle import load_bundle
    from demur.serve.core.summary import summarise

    ck, out = tmp_path / "ck", tmp_path / "b"
    assert main(["train", "--data", "digits", "--members", "3", "--epochs", "1", "--hidden", "16",
                 "--out", str(ck), "--seed", "1"]) == 0
    assert "ensemble of 3 (radial)" in capsys.readouterr().out
    raw = torch.load(ck / "checkpoint.pt", weights_only=True)
    assert raw["members"] == 3 and len(raw["state_dict"]) == 3 and raw["training"]["member_seeds"] == [3, 4, 5]
    members, meta = load_checkpoint(ck)
    assert isinstance(members, list) and len(members) == 3 and "test" in meta["metrics"]
    assert not torch.equal(members[0][1].weight_mu, members[1][1].weight_mu)  # own initialisations
    assert main(["export", str(ck), "--draws", "10", "--seed", "2", "--out", str(out)]) == 0
    b = load_bundle(out)
    assert b.manifest.posterior["family"] == "ensemble" and b.manifest.graphs["stacked"].draws == 9
    ds = load_dataset("digits", seed=1)
    x = ds.x_test[:20]
    xs = torch.from_numpy(standardise_inputs(meta["inputs"], x)).float()
    net = DrawNetwork(members, "stacked", 10, seed=2, input_shape=[64])
    logits = []
    for member in net.members:  # the stored draws, applied by hand
        first, _ = (lay for lay in member if isinstance(lay, VariationalLinear))
        l1, l2 = first._draw_mode, _._draw_mode
        for p in range(3):  # the first layer stores local noise where draws enter (export/local.py)
            h = torch.relu(local_layer(xs, first, l1.stored[0][p], l1.stored[1][p]))
            logits.append(F.linear(h, l2.w[p], l2.b[p]))
    want = torch.softmax(torch.stack(logits).double(), -1).mean(0).numpy()
    m = b.manifest
    got = summarise(m.task, Engine(b).load().run(x), m.interval_level, m.target).mean_probs
    assert np.abs(got - want).max() <= 1e-5
    from demur.export.bench.engine import _load_model
    from demur.export.errors import ExportError

    with pytest.raises(ExportError, match="holds an ensemble of 3"):  # demur bench measures one network
        _load_model(ck)


def test_an_ensemble_needs_two_members():
    with pytest.raises(LayerConfigError, match="at least 2 members"):
        training.train_ensemble(load_dataset("digits"), 1)


def test_trained_spreads_from_two_initial_spreads_converge_on_the_digits():
    """Issue 26.1: with sigma = exp(rho) the posterior spread is set by the ELBO, not by the
    initialisation. From initial per-weight spreads 0.01 and 0.1 (a factor 10, log ratio 2.30) the
    trained median spreads of a radial MLP on the digits (scikit-learn's load_digits) end within a
    factor 2 of each other; with softplus and the old gentle rho step (1e-3) they stay about 10x
    apart (measured: log ratio 0.41 against 2.10, 20 epochs). Constant steps: the property is the
    parameterisation's; the default cosine decay halves how far any rho travels in 20 epochs (log
    ratio 1.34 there; 0.09 after 60 cosine epochs, measured)."""
    ds = load_dataset("digits")

    def log_ratio(**kw):
        spreads = [train(ds, posterior="radial", epochs=20, hidden=(32,), init_spread=s, kl_weight=0.1,
                         lr_schedule="constant", progress=False, **kw).metrics["sigma"]["spread_median"]
                   for s in (0.01, 0.1)]
        return math.log(spreads[1] / spreads[0])

    assert log_ratio(sigma_param="log", rho_lr=1e-2) < math.log(2.0)
    assert log_ratio(sigma_param="softplus", rho_lr=1e-3) > math.log(5.0)


def test_a_record_without_a_later_setting_is_retrained_as_it_was_trained():
    """`demur evaluate --holdout-class` retrains a bundle with the settings it records; a setting
    added later (``silent_inputs``, ``lr_schedule``) that the record lacks takes the value demur
    trained with before it existed ("learn", "constant"), not today's default."""
    from types import SimpleNamespace

    from demur.export.evaluation import _recipe

    def bundle(settings: dict) -> SimpleNamespace:
        training_record = SimpleNamespace(settings=settings, arch={"kind": "mlp"})
        return SimpleNamespace(manifest=SimpleNamespace(training=training_record))

    old = _recipe(bundle({"epochs": 60, "lr": 3e-3, "seed": 2}))
    assert old["recorded"] and old["seed"] == 2
    assert old["settings"]["lr_schedule"] == "constant" and old["settings"]["silent_inputs"] == "learn"
    new = _recipe(bundle({"lr_schedule": "cosine", "silent_inputs": "energy"}))
    assert new["settings"]["lr_schedule"] == "cosine" and new["settings"]["silent_inputs"] == "energy"
    assert training.DEFAULTS["lr_schedule"] == "cosine"
    assert _recipe(None)["settings"]["lr_schedule"] == training.DEFAULTS["lr_schedule"]  # nothing recorded
