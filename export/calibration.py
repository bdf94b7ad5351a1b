"""``demur calibrate``: a user's labelled held-out cases -> a threshold with a stated guarantee.

The calibration set is the user's: every row of ``--data FILE`` (CSV, columns
matched to the bundle's feature names in any order) is a calibration case. The
independent check is ``--test FILE2``, or ``--holdout F`` (a seeded share of the
file set aside and said so). The bundled scikit-learn sets (``digits``,
``diabetes``) keep their documented split (export/datasets.py): calibration on
the cal split, the check on the test split.

From Python::

    from demur.export import calibrate
    record = calibrate("build/model", x_holdout, y_holdout, target_accuracy=0.98,
                       confidence=0.9, max_abstain=0.3, test=(x_check, y_check))

Before anything is computed: the header must name exactly the bundle's features
(plus the target and ``--ignore`` columns); rows the bundle's training-row
fingerprint recognises (``demur.serve.core.fingerprint``) are refused, or with
``--drop-training-rows`` dropped with a warning saying how many; a set too
small for the target even with no error is refused with the number needed.

Then the rows run through exactly the serving path (``Engine`` -> ``summarise``
-> ``score_values``), ``demur.serve.offline.calibration`` chooses the threshold,
and the manifest gets the new records (``_manifest_records``: threshold,
calibration record, score drift reference; the one place they are assembled) and
a new seal. If the target cannot be met, nothing in the bundle changes and the
command exits non-zero with the best achievable figures.

Examples (the parcel depot's postcode digits)::

    demur calibrate build/demo/bundle --data build/demo/holdout-cal.csv --test build/demo/holdout-test.csv \\
        --target-accuracy 0.98 --confidence 0.9 --max-abstain 0.3 --report build/demo/report
    demur calibrate BUNDLE --data keyed-postcodes.csv --target digit --holdout 0.5 --target-abstain 0.05
    demur calibrate BUNDLE --data diabetes --coverage 0.9
"""

from __future__ import annotations

import argparse
import copy
import sys
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from demur.serve.adapters.engine import Engine
from demur.serve.core.bundle import Bundle, load_bundle, write_manifest
from demur.serve.core.decision import SCORE_TASKS, SCORE_UNITS, score_values
from demur.serve.core.drift import score_reference
from demur.serve.core.fingerprint import training_overlap
from demur.serve.core.summary import conformal_variance, summarise
from demur.serve.core.support import recalibrated
from demur.serve.errors import CalibrationInfeasible, ConfigError
from demur.serve.offline.calibration import (
    DEFAULT_MAX_ABSTAIN,
    ThresholdChoice,
    batch_spread,
    calibration_record,
    check_feasible,
    conformal_scale,
    fingerprint,
    select_for_abstain,
    select_for_accuracy,
)
from demur.serve.offline.metrics import classification_metrics, regression_metrics
from demur.serve.offline.report import ClassificationPlots, RegressionPlots, decision_lines, write_report

from demur.export.datasets import BUILTIN, column_order, load_dataset, read_labelled
from demur.export.errors import DatasetError

__all__ = ["BATCH_ROWS", "CalibrationOutcome", "FLOOR_QUANTILE", "calibrate", "calibrate_file", "case_array",
           "fitted_rows", "labelled_arrays", "labelled_file", "register"]

BATCH_ROWS = 256
"""Rows per graph run, bounding memory to about S * 256 * K floats."""

DEFAULT_REGRESSION_ABSTAIN = 0.05
"""Regression abstention target when none is given (5% of cases to people; our choice)."""

FLOOR_QUANTILE = 0.5
"""Regression: the aleatoric floor is this quantile (the median) of the per-case aleatoric
variance over label-free inputs: the VALIDATION split for the bundled sets, the calibration
inputs (labels unused) for a user's file. Why the median and not the minimum: measured on
load_diabetes (hidden [32], 40 epochs, S = 32), a minimum or 1% floor left the interval
NARROWER on inputs 3 training sd past the maximum (198 vs 200 target units) because the
model's epistemic spread there is about the size of the in-range noise; the median made it
wider (243 vs 203; unfloored 183 vs 200) for a 2% wider in-range interval. Why label-free:
the conformal score must not depend on the calibration labels. On the validation split it is
fixed before the calibration set and split conformal is exact (Lei et al. 2018, section 2.2);
from the calibration inputs it is a symmetric function of them that ignores the new case, a
small departure from exact exchangeability, said so in the record."""


@dataclass(frozen=True)
class CalibrationOutcome:
    """What ``calibrate_file`` did: the calibration ``record`` now in the manifest, the new
    ``checksum`` (seal), the report.json path (or None), every ``figure`` reported and the
    ``notes`` (warnings) printed beside them."""

    record: dict[str, Any]
    checksum: str
    report: str | None
    figures: dict[str, Any]
    notes: tuple[str, ...] = ()


@dataclass
class _Cases:
    """Labelled cases in bundle order: x float64[N, F], y class indices or values, lines for messages."""

    x: np.ndarray
    y: np.ndarray
    source: str
    lines: np.ndarray | None = None
    rows: int = 0
    dropped: int = 0
    notes: list[str] = field(default_factory=list)
    columns: str = "matched by name"


# -- the Python API -----------------------------------------------------------------


def calibrate(bundle: str | Path | Bundle, X: Any, y: Any, *, target_accuracy: float | None = None,
              confidence: float = 0.9, max_abstain: float = DEFAULT_MAX_ABSTAIN,
              target_abstain: float | None = None, coverage: float | None = None,
              test: tuple[Any, Any] | None = None, drop_training_rows: bool = False,
              batch: int | None = None, score: str | None = None, method: str = "fixed_sequence",
              graph: str = "auto", engine_seed: int | None = 0, report: str | Path | None = None) -> dict[str, Any]:
    """Calibrate ``bundle`` on every row of ``X`` (raw inputs float[N, F] in the bundle's
    feature order, float[N, *shape], or a table with ``.columns`` matched by name) with
    labels ``y`` (class names as text, or class indices 0..K-1; regression: values).

    Exactly one goal: ``target_accuracy`` (classifiers; with ``confidence`` and
    ``max_abstain``), ``target_abstain`` (expected share abstained), or for a regression
    bundle ``coverage`` (conformal interval level) and optionally ``target_abstain``.
    ``test``: an independent (X, y) for the check. ``batch``: the future batch size the
    spread is computed for (default n). Returns the calibration record written to the
    manifest; raises ``CalibrationInfeasible`` (bundle untouched) or ``ConfigError`` /
    ``DatasetError`` naming the argument or column at fault.
    """
    b = bundle if isinstance(bundle, Bundle) else load_bundle(bundle)
    _check_goal(b.manifest.task, target_accuracy, target_abstain, coverage)
    cal = _from_arrays(b, X, y, "arrays", "X")
    check = _from_arrays(b, test[0], test[1], "test arrays", "test") if test is not None else None
    return _calibrate(b, cal, check, None, target_accuracy=target_accuracy, confidence=confidence,
                      max_abstain=max_abstain, target_abstain=target_abstain, coverage=coverage,
                      drop_training_rows=drop_training_rows, batch=batch, score=score, method=method,
                      graph=graph, engine_seed=engine_seed, report=report, split=None).record


def calibrate_file(bundle: str | Path, data: str, *, target: str | None = None, test: str | None = None,
                   holdout: float | None = None, seed: int | None = None, ignore: Sequence[str] = (),
                   **options: Any) -> CalibrationOutcome:
    """``demur calibrate``: ``data`` is a CSV path (every row calibrates) or a bundled set
    (its documented cal split; the test split is the check). ``test``: a CSV for the check;
    ``holdout``: instead, set aside this share of ``data`` (seeded by ``seed``, default 0).
    ``options`` are ``calibrate``'s keyword arguments."""
    b = load_bundle(bundle)
    m = b.manifest
    _check_goal(m.task, options.get("target_accuracy"), options.get("target_abstain"), options.get("coverage"))
    trained = (m.raw.get("extensions", {}).get("training", {}) or {}).get("data", {}) or {}
    target = target or trained.get("target")
    floor_x, split = None, None
    if str(data) in BUILTIN:
        if holdout is not None:
            raise ConfigError(f"--holdout is for your own file; '{data}' keeps its documented split", field="holdout")
        same = str(trained.get("source", data)) == str(data)
        split_seed = int(seed if seed is not None else (trained.get("seed", 0) if same else 0))
        ds = load_dataset(data, None, seed=split_seed, task=m.task)
        if m.task == "classification" and tuple(ds.labels) != tuple(m.labels):
            raise DatasetError(f"data '{data}' has labels {list(ds.labels)}; bundle {b.path} has {list(m.labels)}",
                               field="data")
        if ds.n_features != m.inputs.size:
            raise DatasetError(f"data '{data}' has {ds.n_features} features; bundle {b.path} expects "
                               f"{m.inputs.size}", field="data")
        column_order(list(ds.feature_names), list(m.inputs.names), where=f"'{data}'")
        cal = _Cases(ds.x_cal, ds.y_cal, f"{data} (cal split, seed {split_seed})", rows=len(ds.y_cal))
        check = _Cases(ds.x_test, ds.y_test, f"{data} (test split, seed {split_seed})", rows=len(ds.y_test))
        floor_x = ds.x_val
        split = {"kind": "documented split", "seed": split_seed}
    else:
        if target is None:
            raise ConfigError("a CSV needs --target COLUMN (the label column); the bundle records none",
                              field="target")
        cal = _from_file(b, data, target, ignore)
        check = _from_file(b, test, target, ignore) if test is not None else None
        if holdout is not None:
            if check is not None:
                raise ConfigError("give --test FILE or --holdout F, not both", field="holdout")
            cal, check, split = _hold_out(cal, holdout, 0 if seed is None else int(seed))
    if test is not None and str(data) in BUILTIN:
        check = _from_file(b, test, target or "", ignore)
    return _calibrate(b, cal, check, floor_x, split=split, **options)


# -- reading and checking cases -----------------------------------------------------


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


def _from_arrays(bundle: Bundle, X: Any, y: Any, source: str, what: str, field_y: str | None = None) -> _Cases:
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
    return _Cases(x, yy, source, rows=len(x), columns="matched by name" if hasattr(X, "columns") else "by position")


def labelled_arrays(bundle: Bundle, X: Any, y: Any, what: str, field_y: str) -> tuple[np.ndarray, np.ndarray]:
    """(x float64[N, F], y class indices or values) from a user's arrays, checked exactly as
    ``calibrate`` checks its X and y; errors name ``what`` / ``field_y``. ``demur evaluate`` uses it."""
    cases = _from_arrays(bundle, X, y, what, what, field_y=field_y)
    return cases.x, cases.y


def _from_file(bundle: Bundle, path: str, target: str, ignore: Sequence[str]) -> _Cases:
    if not Path(path).is_file():
        from demur.export.errors import DatasetNotFound

        raise DatasetNotFound(f"data must be one of {list(BUILTIN)} or an existing CSV file; got {path!r}",
                              field="data")
    rows = read_labelled(path, list(bundle.manifest.inputs.names), target, ignore=ignore)
    y = _labels_to_index(bundle, np.asarray(rows.y, dtype=object), path, rows.lines, target)
    return _Cases(rows.x, y, path, lines=rows.lines, rows=len(rows.x))


def labelled_file(bundle: Bundle, path: str, target: str, ignore: Sequence[str] = ()) -> tuple[np.ndarray, np.ndarray]:
    """Every row of a user's labelled CSV as (x float64[N, F] in the bundle's feature order,
    y class indices or values), checked exactly as ``demur calibrate`` checks its ``--data``:
    columns by name, labels by the bundle's class names. ``demur evaluate`` reads a file so."""
    cases = _from_file(bundle, path, target, ignore)
    return cases.x, cases.y


def _hold_out(cal: _Cases, share: float, seed: int) -> tuple[_Cases, _Cases, dict[str, Any]]:
    if not 0.0 < share < 1.0:
        raise ConfigError(f"--holdout must be a share in (0, 1); got {share}", field="holdout")
    n_test = int(round(share * len(cal.y)))
    if n_test < 1 or n_test >= len(cal.y):
        raise ConfigError(f"--holdout {share} of {len(cal.y)} rows leaves an empty part", field="holdout")
    perm = np.random.default_rng(seed).permutation(len(cal.y))
    t, c = np.sort(perm[:n_test]), np.sort(perm[n_test:])

    def part(rows: np.ndarray, name: str) -> _Cases:
        lines = cal.lines[rows] if cal.lines is not None else None
        return _Cases(cal.x[rows], cal.y[rows], f"{cal.source} ({name})", lines=lines, rows=len(rows))

    split = {"kind": "holdout", "share": share, "seed": seed, "rule": "numpy.random.default_rng(seed).permutation; "
             f"the first {n_test} rows of the permutation are the check"}
    return part(c, "calibration part"), part(t, f"holdout {share:g}, seed {seed}"), split


def fitted_rows(bundle: Bundle, x: np.ndarray, what: str, *, field: str) -> Any:
    """Which rows of ``x`` the bundle's training-row fingerprint recognises
    (``demur.serve.core.fingerprint.training_overlap``), or None when the bundle keeps no
    fingerprint; a damaged one is a ``DatasetError`` naming ``field``."""
    record = bundle.manifest.raw.get("extensions", {}).get("training_rows")
    if record is None:
        return None
    try:
        return training_overlap(record, x)
    except ValueError as exc:
        raise DatasetError(f"cannot check {what} against the training rows: {exc}", field=field) from None


def _screen_training_rows(bundle: Bundle, cases: _Cases, drop: bool, what: str) -> None:
    """Refuse (or drop, with a note) rows the bundle's training-row fingerprint recognises."""
    overlap = fitted_rows(bundle, cases.x, what, field="data")
    if overlap is None:
        cases.notes.append(f"warning: bundle {bundle.path} records no training-row fingerprint, so {what} could "
                           "not be checked for rows the model was trained on")
        return
    if not overlap.count:
        return
    where = (f"lines {', '.join(str(v) for v in cases.lines[overlap.seen][:8])}" if cases.lines is not None
             else f"rows {', '.join(str(v) for v in np.flatnonzero(overlap.seen)[:8])}")
    said = (f"{overlap.count} of the {len(cases.y)} rows of {what} ({cases.source}) were used to train this model "
            f"({where}{' ...' if overlap.count > 8 else ''})")
    if overlap.checkable < len(cases.y):
        said += f"; about {overlap.estimated:.0f} in all (the fingerprint keeps a subsample of the training rows)"
    if not drop:
        raise DatasetError(f"{said}. A model is right more often on rows it has fitted, so a threshold calibrated on "
                           "them certifies an accuracy new cases will not see. Calibrate on rows held out from "
                           "training, or pass --drop-training-rows to leave them out", field="data")
    keep = ~overlap.seen
    cases.x, cases.y = cases.x[keep], cases.y[keep]
    cases.lines = cases.lines[keep] if cases.lines is not None else None
    cases.dropped = overlap.count
    cases.notes.append(f"warning: {said}; they were left out, {len(cases.y)} rows remain")
    if len(cases.y) < 2:
        raise DatasetError(f"{what}: no rows remain once the training rows are left out", field="data")


# -- the calibration itself -------------------------------------------------------


def _run(engine: Engine, x: np.ndarray) -> np.ndarray:
    parts = [engine.run(x[i:i + BATCH_ROWS]) for i in range(0, len(x), BATCH_ROWS)]
    return np.concatenate(parts, axis=1)


def _check_goal(task: str, target_accuracy: float | None, target_abstain: float | None,
                coverage: float | None) -> None:
    if task == "classification":
        if (target_accuracy is None) == (target_abstain is None):
            raise ConfigError("give exactly one of --target-accuracy or --target-abstain", field="target_accuracy")
        if coverage is not None:
            raise ConfigError("--coverage is for regression bundles; this one is a classifier", field="coverage")
    elif target_accuracy is not None:
        raise ConfigError("--target-accuracy is for classifiers; use --coverage (and --target-abstain) "
                          "for a regression bundle", field="target_accuracy")


def _calibrate(b: Bundle, cal: _Cases, check: _Cases | None, floor_x: np.ndarray | None, *,
               target_accuracy: float | None = None, confidence: float = 0.9,
               max_abstain: float = DEFAULT_MAX_ABSTAIN, target_abstain: float | None = None,
               coverage: float | None = None, drop_training_rows: bool = False, batch: int | None = None,
               score: str | None = None, method: str = "fixed_sequence", graph: str = "auto",
               engine_seed: int | None = 0, report: str | Path | None = None,
               split: dict[str, Any] | None = None) -> CalibrationOutcome:
    m = b.manifest
    score = score or m.decision.score
    if score not in SCORE_TASKS or m.task not in SCORE_TASKS[score]:
        fits = ", ".join(n for n, t in SCORE_TASKS.items() if m.task in t)
        raise ConfigError(f"--score {score} is not defined for {m.task}; use one of: {fits}", field="score")
    _check_goal(m.task, target_accuracy, target_abstain, coverage)
    if not 0.0 < confidence < 1.0:
        raise ConfigError(f"--confidence must be in (0, 1); got {confidence}", field="confidence")
    _screen_training_rows(b, cal, drop_training_rows, "the calibration data")
    if check is not None:
        _screen_training_rows(b, check, drop_training_rows, "the test data")
    if target_accuracy is not None:  # up front: too few rows even with no error
        check_feasible(len(cal.y), target_accuracy, round(1.0 - confidence, 12), max_abstain=max_abstain, method=method)
    notes = cal.notes + (check.notes if check is not None else [])
    if check is None:
        notes.append("note: no independent check (--test FILE or --holdout F): the report shows the calibration "
                     "cases only")

    engine = Engine(b, graph=graph, seed=engine_seed).load()
    d_cal = _run(engine, cal.x)
    d_test = _run(engine, check.x) if check is not None else None
    data_info: dict[str, Any] = {
        "source": cal.source, "rows": cal.rows, "n": int(len(cal.y)), "training_rows_dropped": cal.dropped,
        "columns": cal.columns, "sha256": fingerprint(cal.x, cal.y), "split": split,
        "test": None if check is None else {"source": check.source, "n": int(len(check.y)),
                                            "training_rows_dropped": check.dropped},
    }
    model = {"name": m.model_name, "version": m.model_version, "checksum_before": b.checksum,
             "task": m.task, "graph": engine.kind, "draws": engine.draws}
    figures: dict[str, Any] = {"model": model, "data": data_info}
    unit = SCORE_UNITS[score]
    raw = copy.deepcopy(m.raw)
    batch = int(batch) if batch is not None else len(cal.y)

    if m.task == "classification":
        s_cal = summarise("classification", d_cal, m.interval_level, m.target)
        sc_cal, ok_cal = score_values(s_cal, score), s_cal.prediction == cal.y
        figures["calibration_split"] = classification_metrics(s_cal.mean_probs, cal.y, sc_cal)
        # the plots show the check when there is one, else the calibration cases (said in the report)
        if check is not None:
            s_v = summarise("classification", d_test, m.interval_level, m.target)
            y_v, sc_v = check.y, score_values(s_v, score)
        else:
            s_v, y_v, sc_v = s_cal, cal.y, sc_cal
        ok_v = s_v.prediction == y_v
        try:
            if target_accuracy is not None:
                choice = select_for_accuracy(sc_cal, ok_cal, target_accuracy, round(1.0 - confidence, 12),
                                             max_abstain=max_abstain, method=method)
            else:
                choice = select_for_abstain(sc_cal, float(target_abstain), ok_cal)
        except CalibrationInfeasible as exc:
            figures.update(status="infeasible", message=exc.message, notes=notes,
                           test=classification_metrics(s_v.mean_probs, y_v, sc_v) if check is not None else None)
            if report:
                write_report(report, figures, ClassificationPlots(
                    sc_v, ok_v, s_v.mean_probs, y_v, None, score, unit, target_accuracy=target_accuracy,
                    split="test" if check is not None else "calibration"))
            raise
        record = calibration_record(choice, score=score, data=data_info)
        test = classification_metrics(s_v.mean_probs, y_v, sc_v, choice.threshold) if check is not None else None
        record["test"] = test["at_threshold"] if test else None
        if choice.accuracy_bound is not None:
            record["batch"] = {
                "at_calibration_estimate": batch_spread(choice.accuracy or 0.0, 1 - choice.abstain_rate, batch,
                                                        target_accuracy or 0.0),
                "at_certified_floor": batch_spread(choice.accuracy_bound, 1 - choice.abstain_rate, batch,
                                                   target_accuracy or 0.0),
            }
        plots: ClassificationPlots | RegressionPlots = ClassificationPlots(
            sc_v, ok_v, s_v.mean_probs, y_v, choice.threshold, score, unit,
            calibration_point=(choice.abstain_rate, choice.accuracy or 0.0), target_accuracy=target_accuracy,
            split="test" if check is not None else "calibration")
    else:
        coverage = m.interval_level if coverage is None else float(coverage)
        choice, record, test, plots, new_target, sc_cal = _regression(
            b, engine, cal, check, floor_x, d_cal, d_test, coverage,
            DEFAULT_REGRESSION_ABSTAIN if target_abstain is None else float(target_abstain), score, unit, data_info)
        figures["calibration_split"] = record.pop("_calibration_metrics")
        raw["target"] = new_target
        raw["interval_level"] = coverage

    record["notes"] = list(notes)
    checksum = _write(b, raw, _manifest_records(raw, score, choice, record, sc_cal, cal.x, m.inputs))
    model["checksum"] = checksum
    figures.update(status="calibrated", calibration=record, test=test, curve=list(choice.curve), notes=notes)
    report_path = str(write_report(report, figures, plots)) if report else None
    return CalibrationOutcome(record=record, checksum=checksum, report=report_path, figures=figures,
                              notes=tuple(notes))


def _regression(b: Bundle, engine: Engine, cal: _Cases, check: _Cases | None, floor_x: np.ndarray | None,
                d_cal: np.ndarray, d_test: np.ndarray | None, level: float, target_abstain: float,
                score: str, unit: str, data_info: dict[str, Any]) -> tuple[Any, ...]:
    """Split conformal with the aleatoric floor; returns (choice, record, test, plots, new target, scores)."""
    m = b.manifest
    base = {k: v for k, v in m.target.items() if not str(k).startswith("conformal_") and k != "aleatoric_floor"}
    floor_from = "the validation split" if floor_x is not None else "the calibration inputs (labels unused)"
    fx = floor_x if floor_x is not None else cal.x
    floor = float(np.quantile(summarise("regression", _run(engine, fx), level, base).aleatoric_var, FLOOR_QUANTILE))
    raw_cal = summarise("regression", d_cal, level, base)
    sd_cal = np.sqrt(conformal_variance(raw_cal.epistemic_var, raw_cal.aleatoric_var, floor))
    q = conformal_scale(cal.y, raw_cal.mean, sd_cal, 1.0 - level)
    new_target = {**base, "conformal_q": q, "conformal_level": level, "aleatoric_floor": floor}
    s_cal = summarise("regression", d_cal, level, new_target)
    sc_cal = score_values(s_cal, score)
    choice = select_for_abstain(sc_cal, target_abstain)
    v_cases, d_v = (check, d_test) if check is not None else (cal, d_cal)
    raw_v = summarise("regression", d_v, level, base)  # the model's own interval, before conformal
    s_v = summarise("regression", d_v, level, new_target)
    before = float(np.mean((v_cases.y >= raw_v.lower) & (v_cases.y <= raw_v.upper)))
    conformal = {"method": "split-conformal, locally weighted (Lei et al. 2018)", "level": level, "q": q,
                 "coverage_cal": float(np.mean((cal.y >= s_cal.lower) & (cal.y <= s_cal.upper))),
                 "model_coverage_before": before,
                 "model_coverage_before_on": "test" if check is not None else "calibration",
                 "residual": "|y - mean| / sqrt(epistemic_var + max(aleatoric_var, aleatoric_floor))",
                 "aleatoric_floor": floor,
                 "aleatoric_floor_rule": f"quantile {FLOOR_QUANTILE:g} of the per-case aleatoric variance on "
                                         f"{floor_from} ({len(fx)} cases), target units squared"}
    record = calibration_record(choice, score=score, data=data_info, conformal=conformal)
    test = None
    if check is not None:
        test = regression_metrics(check.y, s_v.mean, s_v.lower, s_v.upper, score_values(s_v, score),
                                  choice.threshold)
        record["test"] = test["at_threshold"] | {"coverage": test["coverage"], "coverage_before": before}
    else:
        record["test"] = None
    record["_calibration_metrics"] = regression_metrics(cal.y, s_cal.mean, s_cal.lower, s_cal.upper)
    sd_v = np.sqrt(conformal_variance(s_v.epistemic_var, s_v.aleatoric_var, floor))
    plots = RegressionPlots(v_cases.y, s_v.mean, sd_v, s_v.lower, s_v.upper,
                            np.abs(cal.y - raw_cal.mean) / sd_cal, level, score_values(s_v, score),
                            choice.threshold, score, unit, split="test" if check is not None else "calibration",
                            raw_lower=raw_v.lower, raw_upper=raw_v.upper)
    return choice, record, test, plots, new_target, sc_cal


def _manifest_records(raw: dict[str, Any], score: str, choice: ThresholdChoice, record: dict[str, Any],
                      scores: np.ndarray, x_cal: np.ndarray, inputs: Any) -> dict[str, Any]:
    """Every manifest record ``demur calibrate`` writes, assembled in this one place.

    Returns the updated sections (``decision``, ``drift_reference``, and ``support``: the
    support check's threshold re-set on the calibration rows, serve/core/support.py).
    """
    dec = dict(raw.get("decision") or {})
    dec.update(score=score, threshold=choice.threshold, calibration=record,
               basis=f"calibrated by demur calibrate ({choice.method}) on {len(scores)} held-out cases")
    drift = raw.get("drift_reference")
    drift = dict(drift) if isinstance(drift, dict) else {}
    drift["score"] = score_reference(score, scores)
    sections: dict[str, Any] = {"decision": dec, "drift_reference": drift}
    if raw.get("support"):
        sections["support"] = recalibrated(raw["support"], inputs, x_cal)
    return sections


def _write(b: Bundle, raw: dict[str, Any], sections: dict[str, Any]) -> str:
    raw.update(sections)
    checksum = write_manifest(b.path, raw)
    load_bundle(b.path)  # the rewritten bundle must verify
    return checksum


# -- the command line ---------------------------------------------------------------


def _main(args: argparse.Namespace) -> int:
    out = calibrate_file(
        args.bundle, args.data, target=args.target, test=args.test, holdout=args.holdout, seed=args.seed,
        ignore=tuple(args.ignore or ()), target_accuracy=args.target_accuracy, confidence=args.confidence,
        max_abstain=args.max_abstain, target_abstain=args.target_abstain, coverage=args.coverage,
        drop_training_rows=args.drop_training_rows, batch=args.batch, score=args.score, method=args.method,
        graph=args.graph, engine_seed=args.engine_seed, report=args.report,
    )
    for note in out.notes:
        print(note, file=sys.stderr)
    print(f"demur calibrate: {out.record['n']} calibration cases from {out.record['data']['source']}")
    for line in decision_lines(out.record):
        print(f"  {line}")
    print(f"bundle {args.bundle}: new checksum {out.checksum[:12]}")
    if out.report:
        print(f"report: {Path(out.report).parent / 'index.html'}")
    return 0


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add ``demur calibrate`` (see the module docstring)."""
    p = subparsers.add_parser(
        "calibrate",
        help="choose the abstention threshold on your labelled held-out data, with a guarantee",
        description=__doc__.split("\n\n")[1] if __doc__ else None,
    )
    p.add_argument("bundle", metavar="BUNDLE", help="bundle directory (rewritten in place on success)")
    p.add_argument("--data", required=True, metavar="FILE",
                   help="labelled CSV (every row calibrates; columns by name), or 'digits' / 'diabetes'")
    p.add_argument("--target", metavar="COLUMN", help="label column of the CSV (default: the one training used)")
    p.add_argument("--ignore", action="append", metavar="COLUMN", help="a CSV column to skip (repeatable)")
    check = p.add_mutually_exclusive_group()
    check.add_argument("--test", metavar="FILE2", help="labelled CSV for the independent check")
    check.add_argument("--holdout", type=float, metavar="F", help="set aside this share of --data for the check")
    p.add_argument("--seed", type=int, help="seed of --holdout (default 0), or of a bundled set's split")
    p.add_argument("--drop-training-rows", action="store_true",
                   help="leave out rows the model was trained on (with a warning) instead of refusing the file")
    goal = p.add_argument_group("what to guarantee")
    goal.add_argument("--target-accuracy", type=float, metavar="A",
                      help="accepted cases at least A correct in the population (classifiers)")
    goal.add_argument("--confidence", type=float, default=0.9, metavar="C",
                      help="with probability C over the calibration draw (delta = 1 - C; default 0.9)")
    goal.add_argument("--max-abstain", type=float, default=DEFAULT_MAX_ABSTAIN, metavar="F",
                      help="abstain on at most this share of cases; the most conservative threshold tested "
                           f"(default {DEFAULT_MAX_ABSTAIN})")
    goal.add_argument("--target-abstain", type=float, metavar="R",
                      help="send this share of cases to people (expected rate <= R)")
    goal.add_argument("--coverage", type=float, metavar="L",
                      help="regression: conformal interval coverage (default: the bundle's interval level)")
    goal.add_argument("--batch", type=int, metavar="N", help="batch size the spread is computed for (default n)")
    p.add_argument("--score", choices=sorted(SCORE_TASKS), help="decision score (default: the bundle's)")
    p.add_argument("--method", choices=("fixed_sequence", "bonferroni"), default="fixed_sequence",
                   help="multiple-testing rule for --target-accuracy (see serve/offline/calibration.py)")
    p.add_argument("--graph", default="auto", help="graph to run (default: what the server would choose)")
    p.add_argument("--engine-seed", type=int, default=0, help="sampler graph seed (reproducible runs)")
    p.add_argument("--report", metavar="DIR", help="write report.json, plots and index.html here")
    p.set_defaults(func=_main)
