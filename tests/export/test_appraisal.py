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
    assert "training split" in capsys.readouterr().err
    assert not (tmp_path / "a").exists() and not (tmp_path / "b").exists()
