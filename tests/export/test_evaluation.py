"""``demur evaluate`` from the command line, on the bundled digits and on a user's own file.

References: scikit-learn's bundled 8x8 digits (``sklearn.datasets.load_digits``, the
documented split of export/datasets.py); accuracy recomputed by hand from the served
predictions (``Engine`` -> ``summarise``, the one serving path).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from demur.export.datasets import load_dataset, write_labelled
from demur.serve.adapters.engine import Engine
from demur.serve.cli import main
from demur.serve.core.summary import summarise


def _served_accuracy(bundle, x, y) -> float:
    m = bundle.manifest
    s = summarise(m.task, Engine(bundle, graph="auto", seed=0).load().run(x), m.interval_level, m.target)
    return float((s.prediction == y).mean())


def test_evaluate_on_the_bundled_digits_writes_the_page(tiny_bundle_factory, tmp_path, capsys):
    """The documented split's test part is evaluated (sklearn's load_digits); no traceback."""
    bundle = tiny_bundle_factory()
    assert main(["evaluate", str(bundle.path), "--data", "digits", "--out", str(tmp_path / "ev")]) == 0
    figures = json.loads((tmp_path / "ev" / "evaluation.json").read_text())
    ds = load_dataset("digits")
    acc = figures["models"]["bundle"]["referral"]["accuracy"]
    assert acc == pytest.approx(_served_accuracy(bundle, ds.x_test, ds.y_test), abs=1e-9)
    assert "wrote" in capsys.readouterr().out


def test_evaluate_on_a_users_csv_uses_every_row_by_column_name(tiny_bundle_factory, tmp_path):
    """A held-out CSV with named columns in a shuffled order and class names as labels: every row
    is evaluated, columns matched by name (the same figures as the ordered arrays)."""
    bundle = tiny_bundle_factory()
    ds = load_dataset("digits")
    names = list(ds.feature_names)
    perm = np.random.default_rng(0).permutation(len(names))
    path = write_labelled(tmp_path / "held.csv", ds.x_cal[:, perm], [str(v) for v in ds.y_cal],
                          [names[j] for j in perm], "digit")
    out = tmp_path / "ev"
    assert main(["evaluate", str(bundle.path), "--data", str(path), "--target", "digit", "--out", str(out)]) == 0
    figures = json.loads((out / "evaluation.json").read_text())
    assert figures["models"]["bundle"]["referral"]["accuracy"] == pytest.approx(
        _served_accuracy(bundle, ds.x_cal, ds.y_cal), abs=1e-9)


def test_evaluate_on_a_csv_refuses_what_it_cannot_do_naming_the_option(tiny_bundle_factory, tmp_path, capsys):
    """No label column, or a retraining option a held-out file cannot feed: exit 1 and a message, no traceback."""
    bundle = tiny_bundle_factory()
    ds = load_dataset("digits")
    path = write_labelled(tmp_path / "held.csv", ds.x_cal[:20], [str(v) for v in ds.y_cal[:20]],
                          list(ds.feature_names), "digit")
    assert main(["evaluate", str(bundle.path), "--data", str(path), "--out", str(tmp_path / "a")]) == 1
    assert "--target COLUMN" in capsys.readouterr().err
    assert main(["evaluate", str(bundle.path), "--data", str(path), "--target", "digit", "--baseline",
                 "--out", str(tmp_path / "b")]) == 1
    assert "--train FILE" in capsys.readouterr().err
    assert not (tmp_path / "a").exists() and not (tmp_path / "b").exists()


# -- the unseen-class table ------------------------------------------------------------
@pytest.fixture(scope="module")
def small_trained_bundle(tmp_path_factory):
    """A `demur train` + `demur export` bundle, small and quick: 2 radial members, 16 hidden units,
    2 epochs, so the retraining `--holdout-class` does is quick too (it reads these settings)."""
    root = tmp_path_factory.mktemp("trained")
    assert main(["train", "--data", "digits", "--posterior", "radial", "--members", "2", "--hidden", "16",
                 "--epochs", "2", "--out", str(root / "ckpt"), "--no-progress"]) == 0
    assert main(["export", str(root / "ckpt"), "--draws", "8", "--out", str(root / "bundle")]) == 0
    from demur.serve.core.bundle import load_bundle

    return load_bundle(root / "bundle")


def test_holdout_class_retrains_as_recorded_and_uses_every_row_of_the_class(small_trained_bundle, tmp_path, capsys):
    """`--holdout-class 9` retrains with the bundle's recorded settings and takes every nine in
    the data as unseen: scikit-learn's load_digits has 180 of them (none is trained on), against
    the test split's other digits. The row carries each score's AUROC with its standard error."""
    from sklearn.datasets import load_digits

    out = tmp_path / "ev"
    assert main(["evaluate", str(small_trained_bundle.path), "--data", "digits", "--holdout-class", "9",
                 "--baseline", "--out", str(out)]) == 0
    assert "unseen class (180 rows)" in capsys.readouterr().out
    figures = json.loads((out / "evaluation.json").read_text())
    ds = load_dataset("digits")
    for name in ("bundle", "deterministic", "ensemble"):
        row = figures["models"][name]["holdout"]
        assert row["n"] == int((load_digits().target == 9).sum()) == 180
        assert row["n_seen"] == int((ds.y_test != 9).sum())
        assert set(row["auroc"]) == set(row["auroc_se"]) and all(0 < v < 0.2 for v in row["auroc_se"].values())
        assert "all four splits" in row["rows"]
    assert "recorded training settings" in figures["models"]["deterministic"]["network"]
    versus = figures["models"]["bundle"]["holdout"]["against_deterministic"]
    assert versus["score"] == small_trained_bundle.manifest.raw["decision"]["score"]
    assert versus["standard_error"] > 0 and 0.0 <= versus["p_value"] <= 1.0
    assert "Unseen class 9" in (out / "index.html").read_text()


def test_holdout_class_sets_the_retrained_rule_as_the_bundle_was_calibrated(small_trained_bundle, tmp_path):
    """A calibrated bundle: the retrained network's rule uses the same score and goal (here an
    abstain rate of 20% on predictive entropy), so the unseen class's "accepted" share is the
    served rule's, and the paired comparison uses that score."""
    import shutil

    from demur.export import calibrate, evaluate
    from demur.serve.core.bundle import load_bundle

    path = tmp_path / "bundle"
    shutil.copytree(small_trained_bundle.path, path)
    ds = load_dataset("digits")
    calibrate(path, ds.x_cal, ds.y_cal, target_abstain=0.2, score="predictive_entropy")
    figures = evaluate(load_bundle(path), ds.x_test, ds.y_test, x_train=ds.x_train, y_train=ds.y_train,
                       baseline=True, holdout=("9", ds))
    row = figures["models"]["bundle"]["holdout"]
    assert row["rule"].startswith("predictive_entropy > ") and "target_abstain 0.2" in row["rule"]
    assert row["against_deterministic"]["score"] == "predictive_entropy"


def test_unseen_rows_measure_a_users_own_model(tiny_bundle_factory, tmp_path):
    """A model of the user's own (no recorded training) cannot be retrained by demur, so
    `holdout` is refused naming the field and the way that works: `unseen=` rows of a class the
    model never saw. Given rows identical to the held-out ones, every score's AUROC is exactly 0.5
    (the Mann-Whitney statistic of two equal samples; sklearn.metrics.roc_auc_score agrees)."""
    from sklearn.metrics import roc_auc_score

    from demur.export import evaluate
    from demur.serve.errors import ConfigError

    bundle = tiny_bundle_factory()
    ds = load_dataset("digits")
    x, y = ds.x_test[:60], ds.y_test[:60]
    with pytest.raises(ConfigError, match=r"unseen=") as info:
        evaluate(bundle, x, y, holdout=("9", ds))
    assert info.value.field == "holdout_class"
    figures = evaluate(bundle, x, y, unseen=x.copy(), unseen_label="copies")
    row = figures["models"]["bundle"]["holdout"]
    assert row["label"] == "copies" and row["n"] == row["n_seen"] == 60
    same = np.r_[np.arange(60.0), np.arange(60.0)]
    assert roc_auc_score(np.r_[np.ones(60), np.zeros(60)], same) == pytest.approx(0.5)
    assert all(v == pytest.approx(0.5, abs=1e-12) for v in row["auroc"].values())
    assert "unseen_class" not in figures["models"]["bundle"]["shift"]
    assert any("also in x" in n for n in figures["notes"])


@pytest.mark.parametrize(("kwargs", "field"), [
    ({"unseen": np.ones((3, 5))}, "unseen"),
    ({"unseen": np.empty((0, 64))}, "unseen"),
    ({"unseen": "rows"}, "unseen"),
    ({"unseen": np.full((2, 64), np.nan)}, "unseen"),
    ({"y": np.zeros(10, dtype=np.int64)}, "y"),
    ({"y": np.full(60, 12)}, "y"),
    ({"x": np.full((60, 64), np.inf)}, "x"),
    ({"baseline": True, "x_train": np.ones((20, 7)), "y_train": np.zeros(20, dtype=np.int64)}, "x_train"),
    ({"baseline": True, "x_train": np.ones((20, 64)), "y_train": np.zeros(3, dtype=np.int64)}, "y_train"),
])
def test_evaluate_refuses_bad_arrays_naming_the_argument(tiny_bundle_factory, kwargs, field):
    """Wrong widths, empty or non-numeric rows, NaN/inf, labels of the wrong length or out of
    range: a DemurError naming the argument, before any model runs (no numpy traceback)."""
    from demur.export import evaluate
    from demur.serve.errors import DemurError

    ds = load_dataset("digits")
    args = {"x": ds.x_test[:60], "y": ds.y_test[:60], **kwargs}
    with pytest.raises(DemurError) as info:
        evaluate(tiny_bundle_factory(), args.pop("x"), args.pop("y"), **args)
    assert info.value.field == field


def test_evaluate_refuses_training_rows_and_an_out_that_is_a_file(small_trained_bundle, tmp_path):
    """Rows the bundle was trained on (its training-row fingerprint) would flatter the tables:
    refused naming x; an --out that is a file is refused before anything runs."""
    from demur.export import evaluate
    from demur.serve.errors import DemurError

    ds = load_dataset("digits")
    with pytest.raises(DemurError, match="used to train") as info:
        evaluate(small_trained_bundle, ds.x_train[:50], ds.y_train[:50])
    assert info.value.field == "x"
    (tmp_path / "file").write_text("x")
    with pytest.raises(DemurError) as out:
        evaluate(small_trained_bundle, ds.x_test[:50], ds.y_test[:50], out=tmp_path / "file")
    assert out.value.field == "out"


def test_unseen_file_on_the_command_line(tiny_bundle_factory, tmp_path, capsys):
    """`--unseen FILE`: columns by name, a target column ignored; a missing file is refused naming
    --unseen (exit 1, no traceback)."""
    bundle = tiny_bundle_factory()
    ds = load_dataset("digits")
    names = list(ds.feature_names)
    nines = write_labelled(tmp_path / "nines.csv", ds.x_val[ds.y_val == 9][:, ::-1],
                           ["9"] * int((ds.y_val == 9).sum()), names[::-1], "digit")
    assert main(["evaluate", str(bundle.path), "--data", "digits", "--unseen", str(nines), "--target", "digit",
                 "--out", str(tmp_path / "ev")]) == 0
    row = json.loads((tmp_path / "ev" / "evaluation.json").read_text())["models"]["bundle"]["holdout"]
    assert row["n"] == int((ds.y_val == 9).sum()) and row["label"] == "nines.csv"
    capsys.readouterr()
    assert main(["evaluate", str(bundle.path), "--data", "digits", "--unseen", str(tmp_path / "none.csv"),
                 "--out", str(tmp_path / "ev2")]) == 1
    assert "--unseen" in capsys.readouterr().err


def test_baseline_on_your_own_csv_learns_from_your_training_file(tiny_bundle_factory, tmp_path):
    """`--data held.csv --baseline --train train.csv`: the plain networks learn from the user's
    labelled training file (class names as text), and the tables sit beside the bundle's."""
    bundle = tiny_bundle_factory()
    ds = load_dataset("digits")
    names = list(ds.feature_names)
    held = write_labelled(tmp_path / "held.csv", ds.x_cal, [str(v) for v in ds.y_cal], names, "digit")
    train = write_labelled(tmp_path / "train.csv", ds.x_train[:300], [str(v) for v in ds.y_train[:300]], names,
                           "digit")
    assert main(["evaluate", str(bundle.path), "--data", str(held), "--target", "digit", "--baseline", "--train",
                 str(train), "--out", str(tmp_path / "ev")]) == 0
    models = json.loads((tmp_path / "ev" / "evaluation.json").read_text())["models"]
    assert set(models) == {"bundle", "deterministic", "ensemble"}
    assert "records no architecture" in models["deterministic"]["network"]
