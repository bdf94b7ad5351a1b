"""``demur calibrate BUNDLE --data reviewed.csv``: recertify the served rule from the review export.

The review export (``GET /v1/reviews/export?format=csv``) is taken as it is: the features by
name, the reviewer's ``label`` as the target, the item's ``kind`` and ``inclusion`` (the chance
it was sent to people), no flags. Only rows of this bundle (``model_checksum``, its seal) are
used. The method, and why only random inclusions certify, is in
``demur.serve.offline.recertify``: accepted accuracy is certified from audit items alone (a
uniform sample of accepted traffic); abstentions enter only the abstention-rate estimate, with
their inclusion weights. The new threshold is never above the served one, and it is written to
the bundle exactly as ``demur calibrate`` writes one, so the rule served is the rule certified.
"""

from __future__ import annotations

import copy
import csv
import tempfile
from pathlib import Path
from typing import Any

import numpy as np

from demur.serve.adapters.engine import Engine
from demur.serve.core.bundle import load_bundle, write_manifest
from demur.serve.core.decision import ServedRule
from demur.serve.core.summary import summarise
from demur.serve.errors import ConfigError
from demur.serve.offline.calibration import DEFAULT_MAX_ABSTAIN, calibration_record, fingerprint
from demur.serve.offline.chunked import draws_in_chunks
from demur.serve.offline.recertify import RecertifyError, recertify

from demur.export.cases import cases_from_file
from demur.export.errors import DatasetError

__all__ = ["REVIEW_EXPORT_COLUMNS", "is_review_export", "recertify_file"]

REVIEW_EXPORT_COLUMNS = ("id", "kind", "model_name", "model_version", "model_checksum", "client_case_id",
                         "created", "decided", "reviewer", "label", "value", "prediction", "note", "inclusion",
                         "score")
"""The review export's own columns (serve/web/review_api.py); every other column is a feature."""


def _as_served(rows: list[dict[str, str]], mine: np.ndarray, kind: np.ndarray, ranked: np.ndarray,
               correct: np.ndarray, labels: Any) -> tuple[np.ndarray, np.ndarray]:
    """Audit items as they were served: the export's ``score`` and ``prediction`` columns.

    A fresh-draw graph (flip, sampler) scores a case anew on every call: rescored, an audit item
    the server accepted could land above the served threshold (and was refused as "accepted by
    another rule") or change its predicted class. The certificate is about the accepted
    predictions that were served, so those are what it counts. Rows without the columns (an
    export of an earlier version) keep the rescored values."""
    picked = [rows[i] for i in np.flatnonzero(mine)]
    ranked, correct = ranked.copy(), correct.copy()
    for j, row in enumerate(picked):
        if kind[j] != "audit":
            continue
        text = (row.get("score") or "").strip()
        try:
            value = float(text)
        except ValueError:
            value = float("nan")
        if np.isfinite(value):
            ranked[j] = value
        pred = row.get("prediction") or ""
        if pred in labels:
            correct[j] = pred == row.get("label")
    return ranked, correct


def _header(path: str | Path) -> list[str]:
    with open(path, newline="", encoding="utf-8") as f:
        return next(csv.reader(f), [])


def is_review_export(path: str | Path) -> bool:
    """True when ``path`` is a CSV with the review export's columns (kind, label, inclusion, ...)."""
    try:
        header = _header(path)
    except (OSError, UnicodeDecodeError, csv.Error):
        return False
    return {"kind", "label", "model_checksum", "inclusion"} <= set(header)


def recertify_file(bundle: str | Path, path: str | Path, *, target_accuracy: float | None = None,
                   confidence: float = 0.9, max_abstain: float = DEFAULT_MAX_ABSTAIN, graph: str = "auto",
                   engine_seed: int | None = 0, **unused: Any) -> Any:
    """Recertify ``bundle``'s served rule on the review export ``path``; rewrite its threshold.

    Returns ``CalibrationOutcome`` (demur.export.calibration). Raises ``ConfigError`` /
    ``DatasetError`` naming what cannot be used, ``CalibrationInfeasible`` when the audit does
    not certify the target at any threshold at or below the served one.
    """
    from demur.export.calibration import CalibrationOutcome

    given = sorted(k for k, v in unused.items() if v not in (None, False, (), "fixed_sequence"))
    if given:
        raise ConfigError(f"a review export recertifies the served rule from its audit items; {given} do not "
                          "apply (give --target-accuracy, --confidence, --max-abstain only)", field=given[0])
    if target_accuracy is None:
        raise ConfigError("recertifying from reviewed cases needs --target-accuracy (what the audit must certify)",
                          field="target_accuracy")
    b = load_bundle(bundle)
    m = b.manifest
    if m.task != "classification":
        raise ConfigError("recertification from reviewed cases is for classifiers (regression coverage needs a "
                          "fresh labelled file: demur calibrate --data FILE --coverage L)", field="data")
    header = _header(path)
    meta = [c for c in REVIEW_EXPORT_COLUMNS if c in header and c != "label"]
    features = [c for c in header if c not in REVIEW_EXPORT_COLUMNS]
    with tempfile.TemporaryDirectory(prefix="demur-reviewed-") as tmp:
        if features == [f"x{j}" for j in range(m.inputs.size)] and list(m.inputs.names) != features:
            # The export names the inputs x0, x1, ... when its items carry no feature names (images):
            # the positions are the bundle's input order (serve/web/review_api.py).
            renamed = Path(tmp) / "reviewed.csv"
            names = dict(zip(features, m.inputs.names))
            with open(path, newline="", encoding="utf-8") as src, open(renamed, "w", newline="", encoding="utf-8") as dst:
                reader, writer = csv.reader(src), csv.writer(dst, lineterminator="\n")
                writer.writerow([names.get(c, c) for c in next(reader)])
                writer.writerows(reader)
            cases = cases_from_file(b, str(renamed), "label", ignore=meta)
        else:
            cases = cases_from_file(b, str(path), "label", ignore=meta)
    with open(path, newline="", encoding="utf-8") as f:
        rows = list(csv.DictReader(f))
    checksums = np.array([rows[i]["model_checksum"] for i in range(len(rows))])
    mine = checksums == b.checksum
    if not mine.any():
        found = sorted(set(checksums.tolist()))[:3]
        raise DatasetError(f"no row of {path} was reviewed for this bundle (checksum {b.checksum[:12]}); the "
                           f"export holds models {[c[:12] for c in found]}. Recertify the bundle that served them",
                           field="model_checksum")
    kind = np.array([rows[i]["kind"] for i in range(len(rows))])[mine]
    inclusion = _inclusion(rows, mine, path)
    x, y = cases.x[mine], cases.y[mine]
    engine = Engine(b, graph=graph, seed=engine_seed).load()
    summary = summarise("classification", draws_in_chunks(engine, x), m.interval_level, m.target)
    served = ServedRule.from_manifest(m)
    score, outside = served.ranking(summary, x)
    ranked = np.where(outside, np.inf, score)
    correct = summary.prediction == y
    ranked, correct = _as_served(rows, mine, kind, ranked, correct, m.labels)
    delta = round(1.0 - confidence, 12)
    try:
        rec = recertify(kind, ranked, correct, served_threshold=m.decision.threshold, audit_fraction=inclusion,
                        target_accuracy=target_accuracy, delta=delta, max_abstain=max_abstain)
    except RecertifyError as exc:
        raise DatasetError(f"{path}: {exc}", field="data") from exc
    threshold = min(rec.choice.threshold, m.decision.threshold)
    data_info = {"source": str(path), "rows": len(rows), "n": int(mine.sum()), "kind": "review export",
                 "audit_items": rec.n_audit, "abstain_items": rec.n_abstain, "sha256": fingerprint(x, y),
                 "columns": cases.columns, "training_rows_dropped": 0, "split": None, "test": None}
    record = calibration_record(rec.choice, score=served.rule.score, data=data_info)
    record.update(threshold=threshold, method=f"{rec.choice.method}, recertified from audit items",
                  recertification={"served_threshold": m.decision.threshold, "abstain_rate_weighted":
                                   rec.abstain_rate, "audit_fraction": rec.audit_fraction,
                                   "method": "demur.serve.offline.recertify: accuracy from audit items only "
                                             "(a uniform sample of accepted cases), abstention rate with "
                                             "Horvitz-Thompson inclusion weights"})
    record["achieved"]["abstain_rate"] = rec.abstain_rate
    notes = [f"note: {rec.n_audit} audit items certify; {rec.n_abstain} decided abstentions enter only the "
             "abstention-rate estimate, weighted by their inclusion (they are the model's own choice, not a "
             "random sample)"]
    record["notes"] = notes
    raw = copy.deepcopy(m.raw)
    dec = dict(raw.get("decision") or {})
    dec.update(threshold=threshold, calibration=record,
               basis=f"recertified by demur calibrate from {rec.n_audit} audited cases of the review export")
    raw["decision"] = dec
    checksum = write_manifest(b.path, raw)
    load_bundle(b.path)
    figures = {"status": "recertified", "calibration": record, "notes": notes}
    return CalibrationOutcome(record=record, checksum=checksum, report=None, figures=figures, notes=tuple(notes))


def _inclusion(rows: list[dict[str, str]], mine: np.ndarray, path: str | Path) -> float:
    """The audit fraction the audit items were drawn with (one value; abstentions are 1)."""
    values = []
    for i in np.flatnonzero(mine):
        text = (rows[i].get("inclusion") or "").strip()
        if rows[i]["kind"] == "audit":
            try:
                values.append(float(text))
            except ValueError:
                raise DatasetError(f"{path} line {i + 2}: audit item without its inclusion (the audit fraction "
                                   "it was drawn with); export it again from this release", field="inclusion") from None
    fractions = sorted(set(values))
    if len(fractions) > 1:
        raise DatasetError(f"{path}: audit items were drawn with several audit fractions {fractions}; recertify on "
                           "the items of one setting", field="inclusion")
    if not fractions:
        return 1.0
    if not 0.0 < fractions[0] <= 1.0:
        raise DatasetError(f"{path}: inclusion must be in (0, 1]; got {fractions[0]}", field="inclusion")
    return fractions[0]
