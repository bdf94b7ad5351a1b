"""export/cases.py: a user's labelled cases for a bundle, read and checked once for calibrate and
evaluate. Data: scikit-learn's bundled load_digits (the built-in set); the checks are ours."""

from __future__ import annotations

import numpy as np
import pytest

from demur.export.cases import builtin_splits, cases_from_arrays, hold_out, label_column
from demur.export.datasets import load_dataset
from demur.export.errors import DatasetError
from demur.serve.errors import ConfigError


def test_label_column_is_the_given_one_else_refused_when_the_bundle_records_none(tiny_bundle_factory) -> None:
    bundle = tiny_bundle_factory()
    assert label_column(bundle, "digit") == "digit"
    with pytest.raises(ConfigError, match="needs --target COLUMN") as info:
        label_column(bundle, None)
    assert info.value.field == "target"


def test_builtin_splits_are_the_documented_ones_and_must_fit_the_bundle(tiny_bundle_factory) -> None:
    ds, seed = builtin_splits(tiny_bundle_factory(), "digits", 3)
    want = load_dataset("digits", seed=3)
    assert seed == 3 and np.array_equal(ds.x_cal, want.x_cal) and np.array_equal(ds.y_test, want.y_test)
    assert builtin_splits(tiny_bundle_factory(), "digits", None)[1] == 0  # no training record: seed 0
    with pytest.raises(DatasetError, match="has 64 features; bundle .* expects 10"):
        builtin_splits(tiny_bundle_factory(task="regression"), "digits", None)


def test_arrays_are_checked_once_with_the_field_named(tiny_bundle_factory) -> None:
    bundle = tiny_bundle_factory()
    x = load_dataset("digits").x_test[:20]
    cases = cases_from_arrays(bundle, x, np.arange(20) % 10, "x", "x", field_y="y")
    assert cases.x.shape == (20, 64) and cases.columns == "by position"
    with pytest.raises(DatasetError, match="one-hot or probabilities") as info:
        cases_from_arrays(bundle, x, np.eye(10)[np.arange(20) % 10], "x", "x", field_y="y")
    assert info.value.field == "y"


def test_hold_out_sets_a_seeded_share_aside(tiny_bundle_factory) -> None:
    bundle = tiny_bundle_factory()
    cases = cases_from_arrays(bundle, load_dataset("digits").x_test[:40], np.arange(40) % 10, "x", "x")
    cal, check, split = hold_out(cases, 0.25, 7)
    assert (len(cal.y), len(check.y)) == (30, 10) and split["kind"] == "holdout" and split["seed"] == 7
    again = hold_out(cases, 0.25, 7)[1]
    assert np.array_equal(check.x, again.x)  # the same seed sets the same rows aside
    with pytest.raises(ConfigError, match="share in \\(0, 1\\)"):
        hold_out(cases, 1.0, 0)
