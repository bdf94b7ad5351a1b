"""Training data as four fixed splits (torch-free: numpy and scikit-learn).

The demo is the parcel-sorting depot: handwritten postcode digits, 8x8 grey
images with values 0..16 (scikit-learn's bundled ``load_digits``, 1,797
images). ``"diabetes"`` (scikit-learn's ``load_diabetes``, 442 patients,
raw units) is the built-in regression example; any CSV of numeric features
with a target column works too.

Every source is cut the same way, once, with a fixed seed::

    train 0.55   fits the weights
    val   0.05   reported during training (early warning, not for tuning the test)
    cal   0.20   the bundled sets' calibration cases (a user's own file calibrates whole)
    test  0.20   the reported accuracy / ECE

Split sizes are round(fraction * N) for val, cal and test; train takes the
rest. Classification splits are stratified by label whenever every split can
hold every class (otherwise a plain shuffled split). Inputs stay raw and flat
(float64[N, F]); standardisation is learned from the train split by
``demur.export.training``.
"""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass
from pathlib import Path
from collections.abc import Sequence
from typing import Literal

import numpy as np

from demur.export.errors import DatasetError, DatasetNotFound, EmptyDataset, NonNumericFeature, TargetColumnMissing

__all__ = [
    "BUILTIN",
    "FRACTIONS",
    "MAX_CLASSES",
    "Dataset",
    "LabelledRows",
    "column_order",
    "load_dataset",
    "read_features",
    "read_labelled",
    "read_training_columns",
    "split_indices",
    "write_labelled",
]

FRACTIONS = {"train": 0.55, "val": 0.05, "cal": 0.20, "test": 0.20}
"""Share of rows in each split (train takes what rounding leaves)."""

MAX_CLASSES = 20
"""An integer target with at most this many distinct values is read as class labels."""

BUILTIN = ("digits", "diabetes")
"""Names ``load_dataset`` accepts besides a CSV path."""

Task = Literal["classification", "regression"]


@dataclass(frozen=True)
class Dataset:
    """Four splits of raw inputs ``x_*``: float64[N, F] and targets ``y_*``.

    ``y_*`` are int64 class indices into ``labels`` (classification) or
    float64 values in the target's own units (regression; ``labels`` then
    holds the target's name). ``image_shape`` is (C, H, W) when each row is an
    image in C order (digits: (1, 8, 8)), else None. ``source``, ``target``
    and ``seed`` say how to load the same splits again.
    """

    name: str
    task: Task
    labels: tuple[str, ...]
    feature_names: tuple[str, ...]
    x_train: np.ndarray
    y_train: np.ndarray
    x_val: np.ndarray
    y_val: np.ndarray
    x_cal: np.ndarray
    y_cal: np.ndarray
    x_test: np.ndarray
    y_test: np.ndarray
    image_shape: tuple[int, ...] | None = None
    source: str = ""
    target: str | None = None
    seed: int = 0

    @property
    def n_features(self) -> int:
        return len(self.feature_names)

    @property
    def input_shape(self) -> tuple[int, ...]:
        """Shape of one case without the batch axis: image_shape or (F,)."""
        return self.image_shape if self.image_shape is not None else (self.n_features,)

    @property
    def outputs(self) -> int:
        """Network outputs K: number of classes, or 2 (mean, log-variance)."""
        return len(self.labels) if self.task == "classification" else 2

    def split(self, name: str) -> tuple[np.ndarray, np.ndarray]:
        """(x, y) of split ``name``: one of train, val, cal, test."""
        if name not in FRACTIONS:
            raise DatasetError(f"split must be one of {list(FRACTIONS)}; got {name!r}", field="split")
        return getattr(self, f"x_{name}"), getattr(self, f"y_{name}")


def load_dataset(
    source: str | Path,
    target: str | None = None,
    seed: int = 0,
    *,
    task: Task | None = None,
) -> Dataset:
    """Load ``"digits"``, ``"diabetes"`` or a CSV file and cut the four splits.

    For a CSV, ``target`` names the label column; every other column must be
    numeric. The task is classification when the target is non-numeric, or
    integer-valued with at most ``MAX_CLASSES`` distinct values; otherwise
    regression. Pass ``task=`` to force it.
    """
    src = str(source)
    if src == "digits":
        return _digits(seed)
    if src == "diabetes":
        return _diabetes(seed)
    return _csv(Path(src), target, seed, task)


def split_indices(n: int, seed: int, strata: np.ndarray | None = None) -> dict[str, np.ndarray]:
    """Row indices of each split, stratified on ``strata`` when it can be.

    Deterministic for a given (n, seed, strata).
    """
    from sklearn.model_selection import train_test_split

    sizes = {k: int(round(FRACTIONS[k] * n)) for k in ("test", "cal", "val")}
    sizes["train"] = n - sum(sizes.values())
    if min(sizes.values()) < 1:
        raise EmptyDataset(
            f"need enough rows for 4 splits (train/val/cal/test); got {n} rows", field="rows"
        )
    use_strata = strata is not None
    if use_strata:
        _, counts = np.unique(strata, return_counts=True)
        use_strata = min(sizes.values()) >= len(counts) and counts.min() >= 4
    rest = np.arange(n)
    out: dict[str, np.ndarray] = {}
    for i, name in enumerate(("test", "cal", "val")):
        rest, out[name] = train_test_split(
            rest,
            test_size=sizes[name],
            random_state=seed + i,
            stratify=strata[rest] if use_strata and strata is not None else None,
        )
    out["train"] = rest
    return {k: np.sort(v) for k, v in out.items()}


def _make(
    name: str, task: Task, labels: tuple[str, ...], names: tuple[str, ...], x: np.ndarray, y: np.ndarray,
    seed: int, *, image_shape: tuple[int, ...] | None = None, source: str = "", target: str | None = None,
) -> Dataset:
    idx = split_indices(len(x), seed, y if task == "classification" else None)
    parts = {}
    for k, rows in idx.items():
        parts[f"x_{k}"] = np.ascontiguousarray(x[rows], dtype=np.float64)
        parts[f"y_{k}"] = y[rows]
    return Dataset(
        name=name, task=task, labels=labels, feature_names=names, image_shape=image_shape,
        source=source or name, target=target, seed=seed, **parts,
    )


def _digits(seed: int) -> Dataset:
    from sklearn.datasets import load_digits

    bunch = load_digits()
    names = tuple(f"px_r{r}c{c}" for r in range(8) for c in range(8))
    return _make(
        "digits", "classification", tuple(str(i) for i in range(10)), names,
        bunch.data.astype(np.float64), bunch.target.astype(np.int64), seed,
        image_shape=(1, 8, 8), source="digits", target="digit",
    )


def _diabetes(seed: int) -> Dataset:
    from sklearn.datasets import load_diabetes

    bunch = load_diabetes(scaled=False)
    return _make(
        "diabetes", "regression", ("progression",), tuple(bunch.feature_names),
        bunch.data.astype(np.float64), bunch.target.astype(np.float64), seed,
        source="diabetes", target="progression",
    )


def _csv(path: Path, target: str | None, seed: int, task: Task | None) -> Dataset:
    if not path.is_file():
        raise DatasetNotFound(
            f"data must be one of {list(BUILTIN)} or an existing CSV file; got {str(path)!r}", field="data"
        )
    if target is None:
        raise TargetColumnMissing(f"a CSV needs a target column (--target); none given for {path}", field="target")
    if task is not None and task not in ("classification", "regression"):
        raise DatasetError(f"task must be 'classification' or 'regression'; got {task!r}", field="task")
    header, body = _read_rows(path)
    if target not in header:
        raise TargetColumnMissing(
            f"target column {target!r} is not in {path}; columns are {header}", field=target
        )
    t = header.index(target)
    feat_cols = [j for j in range(len(header)) if j != t]
    if not feat_cols:
        raise DatasetError(f"{path} has no feature columns besides the target {target!r}", field="data")
    x = np.empty((len(body), len(feat_cols)), dtype=np.float64)
    for i, (line, row) in enumerate(body):
        for k, j in enumerate(feat_cols):
            x[i, k] = _number(row[j], header[j], line, path)
    raw_y = [row[t].strip() for _, row in body]
    numeric = _all_numbers(raw_y)
    if task is None:
        if numeric is None:
            task = "classification"
        else:
            integral = bool(np.all(np.isfinite(numeric)) and np.all(numeric == np.round(numeric)))
            task = "classification" if integral and len(np.unique(numeric)) <= MAX_CLASSES else "regression"
    if task == "regression":
        if numeric is None:
            bad = next(i for i, v in enumerate(raw_y) if _maybe_float(v) is None)
            raise NonNumericFeature(
                f"regression target {target!r} must be numeric; line {body[bad][0]} has {raw_y[bad]!r}", field=target
            )
        y = numeric.astype(np.float64)
        labels: tuple[str, ...] = (target,)
    else:
        if numeric is not None:
            values = np.unique(numeric)
            keys = [_num_label(v) for v in numeric]
            labels = tuple(_num_label(v) for v in values)
        else:
            keys = raw_y
            labels = tuple(sorted(set(raw_y)))
        if len(labels) < 2:
            raise DatasetError(f"classification target {target!r} has only {len(labels)} distinct value(s); need >= 2",
                               field=target)
        index = {lab: i for i, lab in enumerate(labels)}
        y = np.array([index[k] for k in keys], dtype=np.int64)
    names = tuple(header[j] for j in feat_cols)
    return _make(path.stem, task, labels, names, x, y, seed, source=str(path), target=target)


def _read_rows(path: Path) -> tuple[list[str], list[tuple[int, list[str]]]]:
    """The header (cells stripped) and the non-blank data rows with their line numbers."""
    if not path.is_file():
        raise DatasetNotFound(f"no such file: {str(path)!r}", field="data")
    with path.open(newline="", encoding="utf-8-sig") as fh:
        reader = csv.reader(fh)
        rows = [(reader.line_num, row) for row in reader if any(cell.strip() for cell in row)]
    if not rows:
        raise EmptyDataset(f"{path} is empty: expected a header row and data rows", field="data")
    header = [h.strip() for h in rows[0][1]]
    body = rows[1:]
    if not body:
        raise EmptyDataset(f"{path} has a header but no data rows", field="data")
    for line, row in body:
        if len(row) != len(header):
            raise DatasetError(
                f"{path} line {line} has {len(row)} cells; the header has {len(header)}", field="data"
            )
    return header, body


def _maybe_float(cell: str) -> float | None:
    try:
        v = float(cell)
    except ValueError:
        return None
    return v if math.isfinite(v) else None


def _number(cell: str, column: str, line: int, path: Path) -> float:
    v = _maybe_float(cell.strip())
    if v is None:
        shown = repr(cell) if cell.strip() else "an empty cell"
        raise NonNumericFeature(
            f"feature column {column!r} must hold finite numbers; {path.name} line {line} has {shown}",
            field=column,
        )
    return v


def _all_numbers(values: list[str]) -> np.ndarray | None:
    out = [_maybe_float(v) for v in values]
    if any(v is None for v in out):
        return None
    return np.array(out, dtype=np.float64)


def _num_label(v: float) -> str:
    return str(int(v)) if float(v).is_integer() else repr(float(v))


# -- a user's labelled file, read by column name -------------------------------------


@dataclass(frozen=True)
class LabelledRows:
    """Labelled cases in a bundle's feature order.

    ``x``: float64[N, F] raw inputs, columns in the order of ``names`` (the
    bundle's feature names); ``y``: the target column's cells as text (the
    caller maps them to labels or numbers); ``lines``: the file line of each
    row (1 = header), for messages; ``source``: the path read.
    """

    x: np.ndarray
    y: list[str]
    lines: np.ndarray
    source: str
    target: str


def column_order(header: Sequence[str], names: Sequence[str], *, target: str | None = None,
                 ignore: Sequence[str] = (), where: str = "the file") -> list[int]:
    """Position in ``header`` of each of ``names`` (any order), or ``DatasetError``.

    Every problem is named at once, before any cell is read: columns the bundle
    needs but the header lacks, columns the header has that are neither a
    feature, the target nor in ``ignore`` (with the closest feature name, for
    typos), and columns that appear twice.
    """
    import difflib

    counts: dict[str, int] = {}
    for h in header:
        counts[h] = counts.get(h, 0) + 1
    known = set(names) | set(ignore) | ({target} if target else set())
    duplicated = sorted(h for h, c in counts.items() if c > 1)
    missing = [n for n in names if n not in counts]
    unknown = [h for h in dict.fromkeys(header) if h not in known]
    if target is not None and target not in counts:
        missing.append(f"{target} (the target)")
    if duplicated or missing or unknown:
        parts = []
        if missing:
            parts.append(f"missing column(s) {_listed(missing)}")
        if unknown:
            hints = {u: difflib.get_close_matches(u, list(names), n=1) for u in unknown}
            shown = [f"{u!r} (did you mean {h[0]!r}?)" if h else repr(u) for u, h in hints.items()]
            parts.append(f"unknown column(s) {', '.join(shown[:8])}{' ...' if len(shown) > 8 else ''}")
        if duplicated:
            parts.append(f"duplicated column(s) {_listed(duplicated)}")
        first = (missing or unknown or duplicated)[0].split(" (the target)")[0]
        raise DatasetError(
            f"the header of {where} does not match the bundle's {len(names)} feature names: {'; '.join(parts)}. "
            "Columns are matched by name, in any order; rename them to the bundle's names "
            "(GET /v1/model, or inputs.names in the bundle's manifest.json, lists them), or name unrelated columns "
            "to skip (--ignore COLUMN on the command line)",
            field=first,
        )
    return [header.index(n) for n in names]


def _listed(items: Sequence[str], most: int = 8) -> str:
    shown = ", ".join(repr(i) for i in items[:most])
    return shown + (f" and {len(items) - most} more" if len(items) > most else "")


def read_labelled(path: str | Path, names: Sequence[str], target: str, *,
                  ignore: Sequence[str] = ()) -> LabelledRows:
    """Read a labelled CSV whose columns are the bundle's feature ``names`` (any order),
    the ``target`` column and any ``ignore``d ones; every row is kept.

    The header is checked first (``column_order``); then every feature cell must be a
    finite number (``NonNumericFeature`` names the column and line).
    """
    path = Path(path)
    header, body = _read_rows(path)
    cols = column_order(header, names, target=target, ignore=ignore, where=str(path))
    t = header.index(target)
    return LabelledRows(x=_cells(header, body, cols, path), y=[row[t].strip() for _, row in body],
                        lines=np.array([line for line, _ in body], dtype=np.int64), source=str(path), target=target)


def read_features(path: str | Path, names: Sequence[str], *, ignore: Sequence[str] = ()) -> np.ndarray:
    """The feature columns of an unlabelled CSV (any order; ``ignore``d columns may be present)
    as float64[N, F] in the order of ``names``, checked as ``read_labelled`` checks them."""
    path = Path(path)
    header, body = _read_rows(path)
    return _cells(header, body, column_order(header, names, ignore=ignore, where=str(path)), path)


def read_training_columns(path: str | Path, target: str | None) -> tuple[np.ndarray, list[str]]:
    """Every column of a CSV with a header but ``target``, in file order: float64[N, F] and the
    column names (``demur export --data``: a user's training rows define the model's inputs,
    so there are no names to match yet; later files are read by name with ``read_features``)."""
    path = Path(path)
    header, body = _read_rows(path)
    cols = [i for i, h in enumerate(header) if h != target]
    if target is not None and len(cols) == len(header):
        raise TargetColumnMissing(f"--target {target!r} is not a column of {path}; columns are {header}",
                                  field="target")
    return _cells(header, body, cols, path), [header[i] for i in cols]


def _cells(header: Sequence[str], body: Sequence[tuple[int, Sequence[str]]], cols: Sequence[int],
           path: Path) -> np.ndarray:
    x = np.empty((len(body), len(cols)), dtype=np.float64)
    for i, (line, row) in enumerate(body):
        for k, j in enumerate(cols):
            x[i, k] = _number(row[j], header[j], line, path)
    return x


def write_labelled(path: str | Path, x: np.ndarray, y: Sequence[object], names: Sequence[str], target: str) -> Path:
    """Write cases as a CSV with a header of feature ``names`` and the ``target`` column
    (numbers with repr precision, so ``read_labelled`` gives back the same float64)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    x = np.asarray(x, dtype=np.float64).reshape(len(x), -1)
    with path.open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow([*names, target])
        for row, label in zip(x, y):
            w.writerow([*(repr(float(v)) for v in row), label])
    return path
