"""A user's labelled cases for a bundle, read and checked once, for ``demur calibrate`` and
``demur evaluate`` alike.

Arrays (``cases_from_arrays``: by position, or a table's ``.columns`` by name), a CSV
(``cases_from_file``: columns matched to the bundle's feature names in any order, labels to
its class names) or a bundled scikit-learn set (``builtin_splits``: its documented splits,
with the seed training used). Rows the bundle's training-row fingerprint recognises are
refused or dropped (``screen_training_rows``), and ``hold_out`` sets a seeded share aside as
the independent check.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from demur.serve.core.bundle import Bundle, TrainingData
from demur.serve.core.fingerprint import training_overlap
from demur.serve.errors import ConfigError

from demur.export.datasets import BUILTIN, Dataset, column_order, load_dataset, read_labelled
from demur.export.errors import DatasetError, DatasetNotFound

__all__ = ["Cases", "builtin_splits", "case_array", "cases_from_arrays", "cases_from_file", "fitted_rows",
           "hold_out", "label_column", "screen_training_rows"]


@dataclass
class Cases:
    """Labelled cases in a bundle's feature order: ``x`` float64[N, F], ``y`` class indices (or
    values, regression), ``lines`` their file lines for messages (None for arrays), ``rows`` read,
    ``dropped`` training rows left out, ``notes`` warnings to print, how ``columns`` were matched."""

    x: np.ndarray
    y: np.ndarray
    source: str
    lines: np.ndarray | None = None
    rows: int = 0
    dropped: int = 0
    notes: list[str] = field(default_factory=list)
    columns: str = "matched by name"



def _labels_to_index(bundle: Bundle, y: Any, source: str, lines: np.ndarray | None, what: str) -> np.ndarray:
    m = bundle.manifest
    arr = np.asarray(y)
    if m.task == "regression":
        try:
            out = arr.astype(np.float64).ravel()
        except ValueError as exc:
            raise DatasetError(f"{what} must be numbers for a regression bundle; {exc}", field=what) from None
        bad = np.flatnonzero(~np.isfinite(out))
        if len(bad):
            where = f"line {lines[bad[0]]}" if lines is not None else f"row {bad[0]}"
            raise DatasetError(f"{what} must be finite; {source} {where} has {out[bad[0]]}", field=what)
        return out
    labels = [str(v) for v in m.labels]
    if lines is None and (arr.dtype.kind in "iu" or (arr.dtype.kind == "f" and np.all(arr == np.round(arr)))):
        if _numbers_not_indices(labels):
            shown = next(f"label {lab!r} is index {i}" for i, lab in enumerate(labels) if lab != str(i))
            raise DatasetError(f"{what} holds numbers, and the bundle's labels are numbers that are not their own "
                               f"indices ({shown}), so a number could be read as the wrong class; pass the labels "
                               f"as text (e.g. y.astype(str)), which are matched to the names {labels[:20]}",
                               field=what)
        idx = arr.astype(np.int64).ravel()
        bad = np.flatnonzero((idx < 0) | (idx >= len(labels)))
        if len(bad):
            raise DatasetError(f"{what} holds class indices, which must be in 0..{len(labels) - 1}; row {bad[0]} "
                               f"has {idx[bad[0]]}", field=what)
        return idx
    index = {lab: i for i, lab in enumerate(labels)}
    out = np.empty(arr.size, dtype=np.int64)
    for i, cell in enumerate(arr.ravel().tolist()):
        key = _label_key(str(cell).strip(), index)
        if key is None:
            where = f"line {lines[i]}" if lines is not None else f"row {i}"
            raise DatasetError(f"{what}: {source} {where} has label {str(cell)[:40]!r}; the bundle's labels are "
                               f"{labels[:20]}", field=what)
        out[i] = index[key]
    return out


def _numbers_not_indices(labels: Sequence[str]) -> bool:
    """Labels that read as numbers but are not 0..K-1 in order (a model trained without digit 7:
    labels '0'..'6', '8', '9'): an integer y is then ambiguous, index or name."""
    try:
        values = [float(lab) for lab in labels]
    except ValueError:
        return False
    return values != [float(i) for i in range(len(labels))]


def _label_key(cell: str, index: dict[str, int]) -> str | None:
    if cell in index:
        return cell
    try:  # "3.0" in a file for label "3"
        v = float(cell)
    except ValueError:
        return None
    text = str(int(v)) if v.is_integer() else repr(v)
    return text if text in index else None


def case_array(bundle: Bundle, X: Any, what: str) -> np.ndarray:
    """Raw cases for ``bundle`` as float64[N, F] in its feature order, from an array (float[N, F]
    or [N, *shape], by position) or a table with ``.columns`` (matched by name); at least one
    row, every cell finite, else ``DatasetError`` naming ``what`` (and the row and feature)."""
    names = list(bundle.manifest.inputs.names)
    if hasattr(X, "columns"):  # a table: match by name, as for a file
        cols = column_order([str(c) for c in X.columns], names, where=f"{what} (columns)")
        X = np.asarray(X.to_numpy() if hasattr(X, "to_numpy") else X, dtype=np.float64)[:, cols]
    try:
        x = np.asarray(X, dtype=np.float64)
    except (TypeError, ValueError):
        raise DatasetError(f"{what} must be a numeric array of cases; got {type(X).__name__}", field=what) from None
    size = bundle.manifest.inputs.size
    if x.ndim < 2 or int(np.prod(x.shape[1:])) != size or not len(x):
        raise DatasetError(f"{what} must be float[N, {size}] (or [N, *{list(bundle.manifest.inputs.shape)}]) with "
                           f"N >= 1; got shape {list(x.shape)}", field=what)
    x = x.reshape(len(x), size)
    if not np.all(np.isfinite(x)):
        r, c = (int(v) for v in np.argwhere(~np.isfinite(x))[0])
        raise DatasetError(f"{what} must hold finite numbers; row {r}, feature {names[c]!r} is {x[r, c]}",
                           field=what)
    return x


def cases_from_arrays(bundle: Bundle, X: Any, y: Any, source: str, what: str, field_y: str | None = None) -> Cases:
    """A user's arrays as ``Cases`` (``case_array`` for ``X``; ``y`` class names as text, class
    indices 0..K-1, or values); errors name ``what`` / ``field_y``."""
    x = case_array(bundle, X, what)
    field_y = field_y or ("y" if what == "X" else f"{what} labels")
    shape = list(np.shape(y))
    if len(shape) > 2 or (len(shape) == 2 and shape[1] != 1):
        raise DatasetError(f"{field_y} must hold one label per row (class names, or class indices 0..K-1; a "
                           f"regression target: values), shape [N]; got shape {shape} (one-hot or probabilities? "
                           "pass y.argmax(axis=1))", field=field_y)
    yy = _labels_to_index(bundle, y, source, None, field_y)
    if len(yy) != len(x):
        raise DatasetError(f"{what} has {len(x)} rows but {field_y} has {len(yy)} labels", field=field_y)
    return Cases(x, yy, source, rows=len(x), columns="matched by name" if hasattr(X, "columns") else "by position")


def cases_from_file(bundle: Bundle, path: str, target: str, ignore: Sequence[str] = ()) -> Cases:
    """Every row of a user's labelled CSV: columns matched to the bundle's feature names (any
    order), labels to its class names; ``DatasetError`` naming the column and line at fault."""
    if not Path(path).is_file():
        raise DatasetNotFound(f"data must be one of {list(BUILTIN)} or an existing CSV file; got {path!r}",
                              field="data")
    rows = read_labelled(path, list(bundle.manifest.inputs.names), target, ignore=ignore)
    y = _labels_to_index(bundle, np.asarray(rows.y, dtype=object), path, rows.lines, target)
    return Cases(rows.x, y, path, lines=rows.lines, rows=len(rows.x))


def hold_out(cal: Cases, share: float, seed: int) -> tuple[Cases, Cases, dict[str, Any]]:
    """Set aside ``share`` of ``cal`` (seeded) as the independent check: (calibration part, check, split record)."""
    if not 0.0 < share < 1.0:
        raise ConfigError(f"--holdout must be a share in (0, 1); got {share}", field="holdout")
    n_test = int(round(share * len(cal.y)))
    if n_test < 1 or n_test >= len(cal.y):
        raise ConfigError(f"--holdout {share} of {len(cal.y)} rows leaves an empty part", field="holdout")
    perm = np.random.default_rng(seed).permutation(len(cal.y))
    t, c = np.sort(perm[:n_test]), np.sort(perm[n_test:])

    def part(rows: np.ndarray, name: str) -> Cases:
        lines = cal.lines[rows] if cal.lines is not None else None
        return Cases(cal.x[rows], cal.y[rows], f"{cal.source} ({name})", lines=lines, rows=len(rows))

    split = {"kind": "holdout", "share": share, "seed": seed, "rule": "numpy.random.default_rng(seed).permutation; "
             f"the first {n_test} rows of the permutation are the check"}
    return part(c, "calibration part"), part(t, f"holdout {share:g}, seed {seed}"), split


def fitted_rows(bundle: Bundle, x: np.ndarray, what: str, *, field: str) -> Any:
    """Which rows of ``x`` the bundle's training-row fingerprint recognises
    (``demur.serve.core.fingerprint.training_overlap``), or None when the bundle keeps no
    fingerprint; a damaged one is a ``DatasetError`` naming ``field``."""
    fingerprint = bundle.manifest.fingerprint
    if fingerprint is None:
        return None
    try:
        return training_overlap(fingerprint.record, x)
    except ValueError as exc:
        raise DatasetError(f"cannot check {what} against the training rows: {exc}", field=field) from None


def screen_training_rows(bundle: Bundle, cases: Cases, drop: bool, what: str) -> None:
    """The leakage check (``demur.serve.core.fingerprint``): matches with the training rows that
    natural duplication explains are kept with a warning giving the counts; clearly more is
    refused, or with ``drop`` the matching rows are left out, with a note."""
    overlap = fitted_rows(bundle, cases.x, what, field="data")
    if overlap is None:
        cases.notes.append(f"warning: bundle {bundle.path} records no training-row fingerprint, so {what} could "
                           "not be checked for rows the model was trained on")
        return
    if overlap.verdict == "none":
        return
    where = (f"lines {', '.join(str(v) for v in cases.lines[overlap.seen][:8])}" if cases.lines is not None
             else f"rows {', '.join(str(v) for v in np.flatnonzero(overlap.seen)[:8])}")
    counts = f"{what} ({cases.source}): {overlap.describe()}"
    if overlap.checkable < len(cases.y):
        counts += f"; about {overlap.estimated:.0f} in all (the fingerprint keeps a subsample of the training rows)"
    if overlap.verdict == "natural":
        cases.notes.append(f"warning: {counts}. That is no more than rows drawn apart from the training data share "
                           "with it when features are discrete (different people, same values), so they are kept"
                           + ("; --drop-training-rows leaves out only rows clearly copied from training, and these "
                              "are not" if drop else ""))
        return
    said = (f"{counts}: clearly more than natural duplication explains, so rows of the training data are in it "
            f"({where}{' ...' if overlap.count > 8 else ''})")
    if not drop:
        raise DatasetError(f"{said}. A model is right more often on rows it has fitted, so a threshold calibrated on "
                           "them certifies an accuracy new cases will not see. Calibrate on rows held out from "
                           "training, or pass --drop-training-rows to leave the matching rows out", field="data")
    keep = ~overlap.seen
    cases.x, cases.y = cases.x[keep], cases.y[keep]
    cases.lines = cases.lines[keep] if cases.lines is not None else None
    cases.dropped = overlap.count
    cases.notes.append(f"warning: {said}; the {overlap.count} matching rows were left out, {len(cases.y)} rows remain")
    if len(cases.y) < 2:
        raise DatasetError(f"{what}: no rows remain once the training rows are left out", field="data")


def label_column(bundle: Bundle, target: str | None) -> str:
    """The label column of a user's CSV: ``target``, else the one the bundle's training used;
    ``ConfigError`` when neither is known."""
    data = _trained_on(bundle)
    target = target or (data.target if data is not None else None)
    if target is None:
        raise ConfigError("a CSV needs --target COLUMN (the label column); the bundle records none", field="target")
    return str(target)


def builtin_splits(bundle: Bundle, data: str, seed: int | None) -> tuple[Dataset, int]:
    """The bundled set ``data`` (one of ``BUILTIN``) cut as training cut it: the split seed is
    ``seed``, else the one the bundle's training used when it was trained on ``data``, else 0.
    Its labels and features must be the bundle's (``DatasetError`` otherwise)."""
    m = bundle.manifest
    trained = _trained_on(bundle)
    same = trained is None or trained.source in ("", str(data))
    split_seed = int(seed if seed is not None else (trained.seed if trained is not None and same else 0))
    ds = load_dataset(data, None, seed=split_seed, task=m.task)
    if m.task == "classification" and tuple(ds.labels) != tuple(m.labels):
        raise DatasetError(f"data '{data}' has labels {list(ds.labels)}; bundle {bundle.path} has {list(m.labels)}",
                           field="data")
    if ds.n_features != m.inputs.size:
        raise DatasetError(f"data '{data}' has {ds.n_features} features; bundle {bundle.path} expects "
                           f"{m.inputs.size}", field="data")
    column_order(list(ds.feature_names), list(m.inputs.names), where=f"'{data}'")
    return ds, split_seed


def _trained_on(bundle: Bundle) -> TrainingData | None:
    """How the bundle's training rows were loaded (``extensions.training.data``), or None."""
    training = bundle.manifest.training
    return training.data if training is not None else None
