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

import copy
import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import numpy as np

from demur.serve.adapters.engine import Engine
from demur.serve.core.bundle import SCORE_TASKS, SCORE_UNITS, Bundle, SupportSection, load_bundle, write_manifest
from demur.serve.core.decision import DecisionRule, ServedRule, Verdicts, score_values
from demur.serve.core.drift import score_reference
from demur.serve.core.summary import conformal_variance, summarise
from demur.serve.core.support import recalibrated, support_from_manifest
from demur.serve.errors import CalibrationInfeasible, ConfigError
from demur.serve.offline.calibration import (
    DEFAULT_MAX_ABSTAIN,
    ThresholdChoice,
    batch_spread,
    calibration_record,
    check_feasible,
    choose_conformal_score,
    fingerprint,
    select_for_abstain,
    select_for_accuracy,
)
from demur.serve.offline.chunked import draws_in_chunks
from demur.serve.offline.metrics import classification_metrics, regression_metrics
from demur.serve.offline.report import ClassificationPlots, RegressionPlots, write_report

from demur.export.cases import (
    Cases,
    builtin_splits,
    cases_from_arrays,
    cases_from_file,
    hold_out,
    label_column,
    screen_training_rows,
)
from demur.export.datasets import BUILTIN
from demur.export.recertification import is_review_export, recertify_file

__all__ = ["CalibrationOutcome", "FLOOR_QUANTILE", "calibrate", "calibrate_file"]

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
    ``checksum`` (seal), the report.json path (or None), every ``figure`` reported, the
    ``notes`` (warnings) printed beside them, and the served rule's per-case ``verdicts`` on the
    calibration cases (``Verdicts``: abstain, outside, in row order after any rows dropped) as
    the rewritten bundle's ``ServedRule`` decides them, the figures the server gives."""

    record: dict[str, Any]
    checksum: str
    report: str | None
    figures: dict[str, Any]
    notes: tuple[str, ...] = ()
    verdicts: Verdicts | None = None


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
    cal = cases_from_arrays(b, X, y, "arrays", "X")
    check = cases_from_arrays(b, test[0], test[1], "test arrays", "test") if test is not None else None
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
    ``options`` are ``calibrate``'s keyword arguments. A review export (``GET
    /v1/reviews/export?format=csv``) as ``data`` recertifies the served rule from its audit
    items instead (export/recertification.py)."""
    if str(data) not in BUILTIN and is_review_export(data):  # the review export, as it is
        return recertify_file(bundle, data, test=test, holdout=holdout, seed=seed, ignore=tuple(ignore),
                              target=None if target in (None, "label") else target, **options)
    b = load_bundle(bundle)
    _check_goal(b.manifest.task, options.get("target_accuracy"), options.get("target_abstain"),
                options.get("coverage"))
    floor_x, split = None, None
    if str(data) in BUILTIN:
        if holdout is not None:
            raise ConfigError(f"--holdout is for your own file; '{data}' keeps its documented split", field="holdout")
        ds, split_seed = builtin_splits(b, str(data), seed)
        cal = Cases(ds.x_cal, ds.y_cal, f"{data} (cal split, seed {split_seed})", rows=len(ds.y_cal))
        check = Cases(ds.x_test, ds.y_test, f"{data} (test split, seed {split_seed})", rows=len(ds.y_test))
        floor_x = ds.x_val
        split = {"kind": "documented split", "seed": split_seed}
        if test is not None:
            check = cases_from_file(b, test, label_column(b, target), ignore)
    else:
        target = label_column(b, target)
        cal = cases_from_file(b, data, target, ignore)
        check = cases_from_file(b, test, target, ignore) if test is not None else None
        if holdout is not None:
            if check is not None:
                raise ConfigError("give --test FILE or --holdout F, not both", field="holdout")
            cal, check, split = hold_out(cal, holdout, 0 if seed is None else int(seed))
    return _calibrate(b, cal, check, floor_x, split=split, **options)


# -- the calibration itself -------------------------------------------------------


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


def _calibrate(b: Bundle, cal: Cases, check: Cases | None, floor_x: np.ndarray | None, *,
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
    if not 0.0 < confidence < 1.0:
        raise ConfigError(f"--confidence must be in (0, 1); got {confidence}", field="confidence")
    screen_training_rows(b, cal, drop_training_rows, "the calibration data")
    if check is not None:
        screen_training_rows(b, check, drop_training_rows, "the test data")
    if target_accuracy is not None:  # up front: too few rows even with no error
        check_feasible(len(cal.y), target_accuracy, round(1.0 - confidence, 12), max_abstain=max_abstain, method=method)
    notes = cal.notes + (check.notes if check is not None else [])
    if check is None:
        notes.append("note: no independent check (--test FILE or --holdout F): the report shows the calibration "
                     "cases only")

    engine = Engine(b, graph=graph, seed=engine_seed).load()
    support = recalibrated(m.support.record, m.inputs, cal.x) if m.support is not None else None
    served = _served_rule(m, score, support)
    d_cal = draws_in_chunks(engine, cal.x)
    d_test = draws_in_chunks(engine, check.x) if check is not None else None
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
        sc_cal, out_cal = served.ranking(s_cal, cal.x)
        ok_cal = s_cal.prediction == cal.y
        figures["calibration_split"] = classification_metrics(s_cal.mean_probs, cal.y, sc_cal)
        # the plots show the check when there is one, else the calibration cases (said in the report)
        if check is not None:
            s_v = summarise("classification", d_test, m.interval_level, m.target)
            y_v, sc_v = check.y, score_values(s_v, score)
        else:
            s_v, y_v, sc_v = s_cal, cal.y, sc_cal
        ok_v = s_v.prediction == y_v
        try:
            ranked = np.where(out_cal, np.inf, sc_cal)  # the served rule as one number
            if target_accuracy is not None:
                choice = select_for_accuracy(ranked, ok_cal, target_accuracy, round(1.0 - confidence, 12),
                                             max_abstain=max_abstain, method=method)
            else:
                choice = select_for_abstain(ranked, float(target_abstain), ok_cal)
        except CalibrationInfeasible as exc:
            figures.update(status="infeasible", message=exc.message, notes=notes,
                           test=classification_metrics(s_v.mean_probs, y_v, sc_v) if check is not None else None)
            if report:
                write_report(report, figures, ClassificationPlots(
                    sc_v, ok_v, s_v.mean_probs, y_v, None, score, unit, target_accuracy=target_accuracy,
                    split="test" if check is not None else "calibration"))
            raise
        record = calibration_record(choice, score=score, data=data_info)
        record["achieved"].update(_support_share(out_cal, sc_cal > choice.threshold))
        test = classification_metrics(s_v.mean_probs, y_v, sc_v) if check is not None else None
        if test is not None:
            test["at_threshold"] = _served_figures(served, choice.threshold, s_v, check.x, ok_v)
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
            b, engine, served, cal, check, floor_x, d_cal, d_test, coverage,
            DEFAULT_REGRESSION_ABSTAIN if target_abstain is None else float(target_abstain), score, unit, data_info)
        figures["calibration_split"] = record.pop("_calibration_metrics")
        if record["conformal"].get("warning"):
            notes.append("warning: " + record["conformal"]["warning"])
        raw["target"] = new_target
        raw["interval_level"] = coverage

    gap = float(np.min(np.abs(sc_cal - choice.threshold)))
    record["achieved"]["threshold_gap"] = gap  # to the nearest calibration score, score units
    if gap <= 1e-5 * max(abs(choice.threshold), 1e-12):
        notes.append(f"warning: a calibration score lies within {gap:.3g} of the threshold, about float32 round-off: "
                     "that case may be decided either way when it is sent in another batch")
    record["notes"] = list(notes)
    checksum = _write(b, raw, _manifest_records(raw, score, choice, record, sc_cal, support))
    verdicts = _check_served(b.path, cal.x, d_cal, choice)
    model["checksum"] = checksum
    figures.update(status="calibrated", calibration=record, test=test, curve=list(choice.curve), notes=notes)
    report_path = str(write_report(report, figures, plots)) if report else None
    return CalibrationOutcome(record=record, checksum=checksum, report=report_path, figures=figures,
                              notes=tuple(notes), verdicts=verdicts)


def _coverage_warning(before: float, level: float, q: float, mean: np.ndarray, y: np.ndarray) -> str | None:
    """The warning for a regression model whose own ``level`` interval covered only ``before`` of
    the held-out cases (None from half the level up). Two causes look alike in coverage and need
    different fixes: means on another scale than the target (a standardised target left
    unstandardised: the means' centre or spread is off by more than the target's own spread) and
    an overconfident model on the right scale (the conformal correction is then the fix)."""
    if before >= 0.5 * level:
        return None
    mean, y = np.asarray(mean, dtype=np.float64), np.asarray(y, dtype=np.float64)
    spread = float(np.std(y)) or 1.0
    ratio = float(np.std(mean)) / spread
    if abs(float(np.mean(mean) - np.mean(y))) > spread or not 0.2 <= ratio <= 5.0:
        return (f"the model's own {level:.0%} interval covered only {before:.1%} of the cases and its means are off "
                f"the target's scale (centre {float(np.mean(mean)):.4g} against {float(np.mean(y)):.4g}, spread "
                f"{ratio:.2g} x the target's): a regression model trained on a standardised target needs "
                "export_model(target={'center', 'scale'}) or demur export --target-stats; the conformal correction "
                f"(q = {q:.3g}) widens the interval to hide it, so check the model before serving it")
    return (f"the model's own {level:.0%} interval covered only {before:.1%} of the cases: its means are on the "
            "target's scale but its intervals are too narrow (overconfident); the served interval is the conformal "
            f"one (q = {q:.3g}), which restores the stated coverage. A wider posterior or a larger aleatoric floor "
            "would give the model's own intervals the same")


def _regression(b: Bundle, engine: Engine, served: ServedRule, cal: Cases, check: Cases | None,
                floor_x: np.ndarray | None, d_cal: np.ndarray, d_test: np.ndarray | None, level: float,
                target_abstain: float,
                score: str, unit: str, data_info: dict[str, Any]) -> tuple[Any, ...]:
    """Split conformal with the aleatoric floor; returns (choice, record, test, plots, new target, scores)."""
    m = b.manifest
    base = {k: v for k, v in m.target.items() if not str(k).startswith("conformal_") and k != "aleatoric_floor"}
    floor_from = "the validation split" if floor_x is not None else "the calibration inputs (labels unused)"
    fx = floor_x if floor_x is not None else cal.x
    floor_summary = summarise("regression", draws_in_chunks(engine, fx), level, base)
    floor = float(np.quantile(floor_summary.aleatoric_var, FLOOR_QUANTILE))
    raw_cal = summarise("regression", d_cal, level, base)
    sd_cal = np.sqrt(conformal_variance(raw_cal.epistemic_var, raw_cal.aleatoric_var, floor))
    chosen = choose_conformal_score(cal.y, raw_cal.mean, sd_cal, 1.0 - level)
    q = chosen["q"]
    new_target = {**base, "conformal_q": q, "conformal_level": level, "aleatoric_floor": floor,
                  "conformal_score": chosen["score"]}
    s_cal = summarise("regression", d_cal, level, new_target)
    sc_cal, out_cal = served.ranking(s_cal, cal.x)
    choice = select_for_abstain(np.where(out_cal, np.inf, sc_cal), target_abstain)
    v_cases, d_v = (check, d_test) if check is not None else (cal, d_cal)
    raw_v = summarise("regression", d_v, level, base)  # the model's own interval, before conformal
    s_v = summarise("regression", d_v, level, new_target)
    before = float(np.mean((v_cases.y >= raw_v.lower) & (v_cases.y <= raw_v.upper)))
    conformal = {"method": f"split-conformal, {chosen['score']} residuals (Lei et al. 2018)", "level": level, "q": q,
                 "score": chosen["score"], "score_choice": {k: chosen[k] for k in ("choice", "q_rows", "why")},
                 "coverage_cal": float(np.mean((cal.y >= s_cal.lower) & (cal.y <= s_cal.upper))),
                 "model_coverage_before": before,
                 "model_coverage_before_on": "test" if check is not None else "calibration",
                 "residual": ("|y - mean|" if chosen["score"] == "absolute" else
                              "|y - mean| / sqrt(epistemic_var + max(aleatoric_var, aleatoric_floor))"),
                 "aleatoric_floor": floor,
                 "aleatoric_floor_rule": f"quantile {FLOOR_QUANTILE:g} of the per-case aleatoric variance on "
                                         f"{floor_from} ({len(fx)} cases), target units squared"}
    warning = _coverage_warning(before, level, q, raw_v.mean, v_cases.y)
    if warning:
        conformal["warning"] = warning
    record = calibration_record(choice, score=score, data=data_info, conformal=conformal)
    record["achieved"].update(_support_share(out_cal, sc_cal > choice.threshold))
    test = None
    if check is not None:
        test = regression_metrics(check.y, s_v.mean, s_v.lower, s_v.upper)
        inside = (check.y >= s_v.lower) & (check.y <= s_v.upper)
        test["at_threshold"] = _served_figures(served, choice.threshold, s_v, check.x, inside, check.y - s_v.mean)
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
                      scores: np.ndarray, support: dict[str, Any] | None) -> dict[str, Any]:
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
    if support is not None:
        sections["support"] = support
    return sections


def _served_rule(m: Any, score: str, support: dict[str, Any] | None) -> ServedRule:
    """The rule the bundle will serve, its threshold still open: the support check as it will be
    written (re-set on the calibration rows) and ``score``. The one rule object
    (serve/core/decision.py): calibrate certifies exactly what the server runs."""
    section = SupportSection(threshold=None, record=support) if support else None  # as load_bundle will parse it
    check = support_from_manifest(SimpleNamespace(support=section, inputs=m.inputs)) if section else None
    return ServedRule(DecisionRule(score, 0.0, "calibrated"), check)


def _support_share(outside: np.ndarray, above: np.ndarray) -> dict[str, Any]:
    """The served rule's abstentions split by cause: outside the training data (the support
    check, whatever the score) and, of the rest, on the score."""
    n = max(len(outside), 1)
    return {"outside_training_data": int(outside.sum()), "outside_rate": float(outside.sum() / n),
            "abstain_on_score": int((above & ~outside).sum())}


def _served_figures(served: ServedRule, threshold: float, summary: Any, x: np.ndarray, good: np.ndarray,
                    err: np.ndarray | None = None) -> dict[str, Any]:
    """The served rule at ``threshold`` on held-out cases: abstain rate (support check counted
    separately) and, on accepted cases, accuracy (``good`` = correct) or coverage and RMSE."""
    v = ServedRule(dataclasses.replace(served.rule, threshold=threshold), served.support).decide(summary, x)
    keep = ~v.abstain
    out: dict[str, Any] = {"threshold": float(threshold), "abstain_rate": float(v.abstain.mean()),
                           "accepted": int(keep.sum()),
                           **_support_share(v.outside if v.outside is not None else np.zeros(len(keep), bool),
                                            v.score > threshold)}
    if err is None:
        out["accuracy_accepted"] = float(good[keep].mean()) if keep.any() else None
    else:
        out["coverage_accepted"] = float(good[keep].mean()) if keep.any() else None
        out["rmse_accepted"] = float(np.sqrt(np.mean(err[keep] ** 2))) if keep.any() else None
    return out


def _check_served(path: Path, x: np.ndarray, draws: np.ndarray, choice: ThresholdChoice) -> Verdicts:
    """The rewritten bundle's served rule (``ServedRule.from_manifest``, as the server builds it)
    must accept exactly the calibration cases the choice counted; else nothing certified is served."""
    m = load_bundle(path).manifest
    v = ServedRule.from_manifest(m).decide(summarise(m.task, draws, m.interval_level, m.target), x)
    if int((~v.abstain).sum()) != choice.accepted:
        raise RuntimeError(f"the served rule accepts {int((~v.abstain).sum())} calibration cases; calibrate counted "
                           f"{choice.accepted}: a bug in demur, please report it")
    return v


def _write(b: Bundle, raw: dict[str, Any], sections: dict[str, Any]) -> str:
    raw.update(sections)
    checksum = write_manifest(b.path, raw)
    load_bundle(b.path)  # the rewritten bundle must verify
    return checksum
