"""export/datasets.py: the fixed splits and CSV loading.

References: scikit-learn's bundled datasets (sklearn.datasets.load_digits,
load_diabetes) for sizes and values; the CSV cases are small files written
here, checked against what the rules in the module docstring say.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from sklearn.datasets import load_diabetes, load_digits

from demur.export.datasets import FRACTIONS, load_dataset, split_indices
from demur.export.errors import (
    DatasetError,
    DatasetNotFound,
    EmptyDataset,
    NonNumericFeature,
    TargetColumnMissing,
)

SPLITS = ("train", "val", "cal", "test")


def test_fractions_sum_to_one():
    assert sum(FRACTIONS.values()) == pytest.approx(1.0)


def test_digits_splits_partition_sklearn_digits():
    # reference: sklearn.datasets.load_digits -- 1,797 images of 8x8 pixels, values 0..16
    ref = load_digits()
    ds = load_dataset("digits", seed=0)
    n = len(ref.target)
    assert n == 1797
    sizes = {k: len(ds.split(k)[0]) for k in SPLITS}
    assert sizes == {"train": 989, "val": 90, "cal": 359, "test": 359}
    assert sum(sizes.values()) == n
    # every split row is one of sklearn's rows, none used twice
    x_all = np.concatenate([ds.split(k)[0] for k in SPLITS])
    y_all = np.concatenate([ds.split(k)[1] for k in SPLITS])
    order = np.lexsort(np.c_[x_all, y_all].T)
    ref_order = np.lexsort(np.c_[ref.data, ref.target].T)
    np.testing.assert_array_equal(x_all[order], ref.data[ref_order])
    np.testing.assert_array_equal(y_all[order], ref.target[ref_order])
    assert ds.x_train.min() == 0 and ds.x_train.max() == 16  # raw, not standardised
    assert ds.task == "classification" and ds.labels == tuple(str(i) for i in range(10))
    assert ds.image_shape == (1, 8, 8) and ds.input_shape == (1, 8, 8) and ds.outputs == 10
    assert ds.feature_names[0] == "px_r0c0" and ds.feature_names[9] == "px_r1c1" and ds.feature_names[-1] == "px_r7c7"
    assert ds.x_train.dtype == np.float64 and ds.y_train.dtype == np.int64


def test_digits_splits_are_stratified():
    # stratified: each class's share in a split is within one case of the split's share
    ds = load_dataset("digits")
    total = np.bincount(load_digits().target)
    for k in SPLITS:
        counts = np.bincount(ds.split(k)[1], minlength=10)
        expected = total * len(ds.split(k)[1]) / total.sum()
        assert np.abs(counts - expected).max() <= 1.5, k


def test_splits_repeat_for_a_seed_and_change_with_it():
    a, b, c = load_dataset("digits", seed=0), load_dataset("digits", seed=0), load_dataset("digits", seed=1)
    np.testing.assert_array_equal(a.x_test, b.x_test)
    assert not np.array_equal(a.x_test, c.x_test)
    assert (a.source, a.seed, c.seed) == ("digits", 0, 1)


def test_diabetes_is_raw_regression():
    # reference: sklearn.datasets.load_diabetes(scaled=False) -- 442 patients, 10 features, raw units
    ref = load_diabetes(scaled=False)
    ds = load_dataset("diabetes")
    assert ds.task == "regression" and ds.outputs == 2 and ds.image_shape is None
    assert sum(len(ds.split(k)[0]) for k in SPLITS) == len(ref.target) == 442
    assert ds.feature_names == tuple(ref.feature_names)
    assert ds.x_train[:, 0].max() > 1  # age in years, not the scaled version
    assert sorted(np.concatenate([ds.split(k)[1] for k in SPLITS])) == sorted(ref.target)


def test_split_indices_partition_small_n():
    idx = split_indices(40, seed=3)
    allrows = np.sort(np.concatenate(list(idx.values())))
    np.testing.assert_array_equal(allrows, np.arange(40))
    assert {k: len(v) for k, v in idx.items()} == {"test": 8, "cal": 8, "val": 2, "train": 22}
    with pytest.raises(EmptyDataset, match="got 5 rows"):
        split_indices(5, seed=0)


def _write(tmp_path: Path, text: str, name: str = "parcels.csv") -> Path:
    p = tmp_path / name
    p.write_text(text)
    return p


def _rows(n: int, label) -> str:
    rng = np.random.default_rng(0)
    lines = ["weight_kg,length_cm,kind"]
    for i in range(n):
        lines.append(f"{rng.uniform(0.1, 30):.3f},{rng.uniform(5, 120):.1f},{label(i)}")
    return "\n".join(lines) + "\n"


def test_csv_string_labels_are_classification(tmp_path):
    p = _write(tmp_path, _rows(100, lambda i: ["letter", "parcel", "bulky"][i % 3]))
    ds = load_dataset(p, "kind")
    assert ds.task == "classification" and ds.labels == ("bulky", "letter", "parcel")
    assert ds.feature_names == ("weight_kg", "length_cm") and ds.image_shape is None
    assert sum(len(ds.split(k)[0]) for k in SPLITS) == 100
    assert set(np.unique(ds.y_train)) == {0, 1, 2}


def test_csv_small_integer_target_is_classification_and_floats_are_regression(tmp_path):
    ints = load_dataset(_write(tmp_path, _rows(60, lambda i: i % 4), "a.csv"), "kind")
    assert ints.task == "classification" and ints.labels == ("0", "1", "2", "3")
    many = load_dataset(_write(tmp_path, _rows(60, lambda i: i), "b.csv"), "kind")
    assert many.task == "regression"  # 60 distinct integers > MAX_CLASSES
    floats = load_dataset(_write(tmp_path, _rows(60, lambda i: i % 3 + 0.5), "c.csv"), "kind")
    assert floats.task == "regression" and floats.labels == ("kind",)
    forced = load_dataset(_write(tmp_path, _rows(60, lambda i: i % 4), "d.csv"), "kind", task="regression")
    assert forced.task == "regression" and forced.y_train.dtype == np.float64


def test_csv_missing_target_names_the_column(tmp_path):
    p = _write(tmp_path, _rows(30, lambda i: i % 2))
    columns = r"\['weight_kg', 'length_cm', 'kind'\]"
    with pytest.raises(TargetColumnMissing, match=rf"'postcode' is not in .*{columns}") as info:
        load_dataset(p, "postcode")
    assert info.value.field == "postcode"
    with pytest.raises(TargetColumnMissing, match="--target"):
        load_dataset(p, None)


def test_csv_non_numeric_feature_names_column_and_line(tmp_path):
    text = _rows(30, lambda i: i % 2).replace("\n", "\nheavy,12.0,1\n", 1)  # line 2
    with pytest.raises(NonNumericFeature, match=r"'weight_kg'.*line 2 has 'heavy'") as info:
        load_dataset(_write(tmp_path, text), "kind")
    assert info.value.field == "weight_kg"
    blank = _rows(30, lambda i: i % 2).replace("\n", "\n1.0,,1\n", 1)
    with pytest.raises(NonNumericFeature, match=r"'length_cm'.*line 2 has an empty cell"):
        load_dataset(_write(tmp_path, blank, "blank.csv"), "kind")


def test_csv_empty_missing_and_ragged_files(tmp_path):
    with pytest.raises(EmptyDataset, match="is empty"):
        load_dataset(_write(tmp_path, "", "empty.csv"), "kind")
    with pytest.raises(EmptyDataset, match="no data rows"):
        load_dataset(_write(tmp_path, "weight_kg,kind\n", "header.csv"), "kind")
    with pytest.raises(DatasetNotFound, match="nowhere.csv"):
        load_dataset(tmp_path / "nowhere.csv", "kind")
    with pytest.raises(DatasetError, match="line 3 has 2 cells; the header has 3"):
        load_dataset(_write(tmp_path, "a,b,kind\n1,2,0\n1,2\n", "ragged.csv"), "kind")
    with pytest.raises(DatasetError, match="must be numeric; line 2"):
        load_dataset(_write(tmp_path, _rows(30, lambda i: "x"), "txt.csv"), "kind", task="regression")
    with pytest.raises(DatasetError, match="only 1 distinct"):
        load_dataset(_write(tmp_path, _rows(30, lambda i: "same"), "one.csv"), "kind")


def test_csv_line_numbers_count_blank_lines(tmp_path):
    text = "weight_kg,kind\n1.0,0\n\n2.0,1\noops,0\n" + "".join(f"{i}.5,{i % 2}\n" for i in range(20))
    with pytest.raises(NonNumericFeature, match="line 5 has 'oops'"):
        load_dataset(_write(tmp_path, text), "kind")


def test_labelled_file_round_trips_and_is_matched_by_name(tmp_path):
    """write_labelled / read_labelled: repr precision gives back the same float64 (sklearn's
    load_digits values), and a file with its columns in another order reads into the same array."""
    from demur.export.datasets import read_labelled, write_labelled

    ds = load_dataset("digits")
    names = list(ds.feature_names)
    p = write_labelled(tmp_path / "cal.csv", ds.x_cal, [str(v) for v in ds.y_cal], names, "digit")
    rows = read_labelled(p, names, "digit")
    np.testing.assert_array_equal(rows.x, ds.x_cal)
    assert rows.y[:3] == [str(v) for v in ds.y_cal[:3]] and rows.lines[0] == 2
    perm = np.random.default_rng(2).permutation(64)
    q = write_labelled(tmp_path / "perm.csv", ds.x_cal[:, perm], [str(v) for v in ds.y_cal],
                       [names[j] for j in perm], "digit")
    np.testing.assert_array_equal(read_labelled(q, names, "digit").x, ds.x_cal)


def test_column_order_names_every_problem():
    from demur.export.datasets import column_order

    with pytest.raises(DatasetError) as info:
        column_order(["b", "a", "zz", "a", "label"], ["a", "b", "c"], target="label")
    msg = info.value.message
    assert "missing column(s) 'c'" in msg and "unknown column(s) 'zz'" in msg and "duplicated column(s) 'a'" in msg
    assert column_order(["c", "id", "a", "b", "label"], ["a", "b", "c"], target="label", ignore=["id"]) == [2, 3, 0]


def test_training_columns_are_every_column_but_the_target_in_file_order(tmp_path):
    """``demur export --data``: the user's training rows define the inputs, read by the same reader
    (one CSV reader, export/datasets.py) with the same cell checks."""
    from demur.export.datasets import read_training_columns
    from demur.export.errors import NonNumericFeature, TargetColumnMissing

    path = tmp_path / "train.csv"
    path.write_text("b,label,a\n1,x,2\n3,y,4\n")
    x, names = read_training_columns(path, "label")
    assert names == ["b", "a"] and x.tolist() == [[1.0, 2.0], [3.0, 4.0]]
    with pytest.raises(TargetColumnMissing, match="--target 'digit' is not a column") as info:
        read_training_columns(path, "digit")
    assert info.value.field == "target"
    with pytest.raises(NonNumericFeature, match="feature column 'label' must hold finite numbers"):
        read_training_columns(path, None)
