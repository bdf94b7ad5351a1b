"""``demur evaluate``: is the abstention flag worth having, measured on labelled held-out data.

The bundle runs through the serving path (``Engine`` -> ``summarise`` -> ``decide`` with the
support check), on clean held-out cases and on built-in shifts of them
(``demur.serve.offline.evaluation.shifted_inputs``). ``baseline=True`` trains, on the same
training split, a deterministic twin of the bundle's network (``plain_model``: the recorded
architecture with plain layers, trained with the recorded settings: Adam, lr, batch size,
epochs; a bundle that records none gets demur's MLP and the training defaults, and the
output says which) and a 5-member ensemble of them (Lakshminarayanan et al. 2017, random
initialisations), and puts their tables beside the bundle's. A baseline's "served rule" is
the same support check plus a 1 - max-probability threshold that refers as many clean cases
as the bundle's rule does.

The unseen-class table, two ways. ``unseen=X`` (``--unseen FILE``) takes rows of a class the
user's model was trained without: it measures the user's own model, any architecture.
``holdout_class`` retrains the bundle's network (a bundle exported from a ``demur train``
checkpoint, which records its architecture and settings; anything else is refused) without
that class, exports it to a temporary bundle (support check included; its threshold calibrated
as the bundle's was, on the seen classes' cal split) and measures how every row of that class
is flagged: none of them was trained on (digits: 180 nines, not only the test split's 36).

Example::

    demur evaluate build/demo/bundle --data digits --out build/demo/evaluation --baseline
    demur evaluate BUNDLE --data digits --holdout-class 9 --out build/holdout9
    demur evaluate BUNDLE --data held.csv --target label --unseen class_we_never_trained.csv --out DIR
    figures = evaluate("build/demo/bundle", x_test, y_test, x_train=x, y_train=y, baseline=True)
"""

from __future__ import annotations

import dataclasses
import tempfile
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from demur.serve.adapters.engine import Engine
from demur.serve.core.bundle import Bundle, load_bundle
from demur.serve.core.decision import ServedRule, rule_from
from demur.serve.core.summary import regression_components, summarise
from demur.serve.core.support import support_from_manifest
from demur.serve.errors import ConfigError
from demur.serve.offline.regression import (
    coverage_table,
    far_shifts,
    referral_by_epistemic,
    regression_scores,
    regression_shift_row,
    write_regression_evaluation,
)
from demur.serve.offline.evaluation import (
    auroc_difference,
    holdout_row,
    referral_table,
    scores_of,
    shift_row,
    shifted_inputs,
    write_evaluation,
)

from demur.serve.offline.chunked import chunks

from demur.export.cases import (
    builtin_splits,
    case_array,
    cases_from_arrays,
    cases_from_file,
    fitted_rows,
    label_column,
)
from demur.export.datasets import BUILTIN, read_features
from demur.export.errors import DatasetError

__all__ = ["ENSEMBLE_MEMBERS", "HOLDOUT_ROWS", "UNSEEN_ROWS", "evaluate", "evaluate_file"]

ENSEMBLE_MEMBERS = 5
"""Members of the ensemble baseline."""

_SCORES = "_unseen_scores"


def _served(bundle: Bundle, x: np.ndarray, y: np.ndarray, shifts: dict[str, np.ndarray],
            engine_seed: int = 0) -> dict[str, Any]:
    """The bundle's tables through the serving path."""
    m = bundle.manifest
    engine = Engine(bundle, graph="auto", seed=engine_seed).load()
    served = ServedRule.from_manifest(m)  # the one rule the server decides with
    rule, support = served.rule, served.support

    def run(xs: np.ndarray) -> tuple[dict[str, np.ndarray], np.ndarray, np.ndarray]:
        probs, mi, joint, accept = [], [], [], []
        for xb in chunks(xs.reshape(-1, *m.inputs.shape)):
            s = summarise(m.task, engine.run(xb), m.interval_level, m.target)
            d = served.decide(s, xb)
            probs.append(s.mean_probs)
            mi.append(s.mutual_information)
            joint.append(s.joint_rank)
            accept.append(~d.abstain)
        p = np.concatenate(probs)
        scores = scores_of(p, np.concatenate(mi))
        if all(j is not None for j in joint):  # the bundle records a score reference (serve/core/summary.py)
            scores["joint_rank"] = np.concatenate(joint)
        return scores, np.concatenate(accept), p

    clean, accept, probs = run(x)
    shifted = {name: run(xs)[:2] for name, xs in shifts.items()}
    return {"referral": referral_table(probs, y, clean), "clean_accepted": float(accept.mean()),
            "shift": {name: shift_row(clean, *row) for name, row in shifted.items()},
            "rule": {"score": rule.score, "threshold": rule.threshold, "source": rule.source,
                     "support": support is not None},
            **_kept_scores(clean, {name: row[0] for name, row in shifted.items()})}


def _kept_scores(clean: dict[str, np.ndarray], shifted: dict[str, dict[str, np.ndarray]]) -> dict[str, Any]:
    """Per-case scores of the unseen class and the clean cases, kept under ``_SCORES`` (which
    ``_unseen_rows`` removes before anything is written) to compare two models on the same cases."""
    return {_SCORES: (shifted["unseen_class"], clean)} if "unseen_class" in shifted else {}


def _train_plain(x: np.ndarray, y: np.ndarray, inputs: dict[str, Any], outputs: int, seed: int,
                 recipe: dict[str, Any] | None = None) -> Any:
    """A deterministic twin of the demo network (``demur.export.layers.plain_model``: the same
    layers and widths, plain weights), trained as ``recipe`` says (``_recipe``: the bundle's
    recorded architecture and settings, else the training defaults): Adam, lr, batch size, epochs."""
    import torch
    from torch import nn

    from demur.export.layers import plain_model
    from demur.export.training import standardise_inputs

    r = recipe or _recipe(None)
    torch.manual_seed(seed)
    xt = torch.from_numpy(standardise_inputs(inputs, x))
    yt = torch.as_tensor(y, dtype=torch.long)
    model = plain_model(r["arch"], list(inputs["shape"]), outputs, hidden=r["settings"]["hidden"],
                        channels=r["settings"]["channels"])
    opt = torch.optim.Adam(model.parameters(), lr=float(r["settings"]["lr"]))
    shuffle = torch.Generator().manual_seed(seed)
    for _ in range(int(r["settings"]["epochs"])):
        for idx in torch.randperm(len(xt), generator=shuffle).split(int(r["settings"]["batch_size"])):
            loss = nn.functional.cross_entropy(model(xt[idx]), yt[idx])
            opt.zero_grad(set_to_none=True)
            loss.backward()
            opt.step()
    model.eval()

    def probs(xs: np.ndarray) -> np.ndarray:
        with torch.no_grad():
            return torch.softmax(model(torch.from_numpy(standardise_inputs(inputs, xs))).double(), -1).numpy()

    return probs


def _recipe(bundle: Bundle | None) -> dict[str, Any]:
    """How the bundle's network was trained, from what ``demur export`` of a ``demur train``
    checkpoint records (``extensions.training.arch`` / ``.settings``); ``recorded`` is False
    (and the training defaults, MLP, are used) when the bundle records none: a model of the
    user's own, or an export from before the record existed."""
    from demur.export.training import DEFAULTS, UNRECORDED

    t = bundle.manifest.training if bundle is not None else None
    settings, arch = (t.settings, t.arch) if t is not None else (None, None)
    recorded = settings is not None and arch is not None and arch.get("kind") in ("mlp", "conv")
    chosen = {k: settings[k] for k in DEFAULTS if recorded and settings is not None and k in settings}
    seed = settings.get("seed") if recorded and settings is not None else None
    # a setting added after the bundle was trained: it was trained the way demur did then
    before = UNRECORDED if recorded else {}
    return {"recorded": recorded, "arch": arch["kind"] if recorded and arch is not None else "mlp",
            "settings": {**DEFAULTS, **before, **chosen}, "seed": int(seed) if isinstance(seed, int) else None}


def _baseline(members: list[Any], bundle: Bundle, x: np.ndarray, y: np.ndarray,
              shifts: dict[str, np.ndarray], refer: float) -> dict[str, Any]:
    """A deterministic network (one member) or an ensemble: mean of the members' probabilities."""
    m = bundle.manifest
    support = support_from_manifest(m)

    def run(xs: np.ndarray) -> tuple[dict[str, np.ndarray], np.ndarray]:
        p = np.mean([f(xs) for f in members], axis=0)
        return scores_of(p), p

    clean, probs = run(x)
    threshold = float(np.quantile(clean["one_minus_max_prob"], 1.0 - refer)) if refer > 0 else np.inf

    def accepted(xs: np.ndarray, sc: dict[str, np.ndarray]) -> np.ndarray:
        ok = sc["one_minus_max_prob"] <= threshold
        if support is not None:
            ok &= ~support.check(xs.reshape(len(xs), -1)).outside
        return ok

    shifted = {name: run(xs)[0] for name, xs in shifts.items()}
    return {"referral": referral_table(probs, y, clean), "clean_accepted": float(accepted(x, clean).mean()),
            "shift": {name: shift_row(clean, shifted[name], accepted(xs, shifted[name]))
                      for name, xs in shifts.items()},
            "rule": {"score": "one_minus_max_prob", "threshold": threshold,
                     "basis": "refers as many clean cases as the bundle's rule", "support": support is not None},
            **_kept_scores(clean, shifted)}


def _unseen_rows(models: dict[str, dict[str, Any]], *, label: str, n_unseen: int, n_seen: int,
                 rows: str, score: str) -> dict[str, dict[str, Any]]:
    """The held-out-class row of each model, from its ``unseen_class`` shift (removed from the
    shift table). With a deterministic baseline, the bundle's row also compares its rule's ``score``
    with the baseline's max-probability on the same cases (``auroc_difference``, DeLong et al.
    1988's paired test): is the posterior's lead, or lag, more than chance?"""
    out, kept = {}, {}
    for name, body in models.items():
        out[name] = holdout_row(body["shift"].pop("unseen_class"), label=label, n_unseen=n_unseen,
                                n_seen=n_seen, rows=rows)
        r = body["rule"]
        out[name]["rule"] = (f"{r['score']} > {r['threshold']:.4g} ({r.get('source') or r.get('basis')})"
                             + (", and the support check" if r.get("support") else ""))
        kept[name] = body.pop(_SCORES)
    if "deterministic" in kept:
        (u, c), (bu, bc) = kept["bundle"], kept["deterministic"]
        if score in u:
            out["bundle"]["against_deterministic"] = {
                "score": score, "baseline_score": "one_minus_max_prob",
                **auroc_difference(u[score], c[score], bu["one_minus_max_prob"], bc["one_minus_max_prob"])}
    return out


UNSEEN_ROWS = ("the unseen rows given (a class the model was trained without) against every labelled held-out "
               "row evaluated")

HOLDOUT_ROWS = ("every row of the class in all four splits (train, val, cal, test): the model was trained "
                "without any of them; the seen classes' test rows are the other side")


def _retrainable(bundle: Bundle, label: str) -> tuple[str, dict[str, Any]]:
    """(posterior family, recipe) when ``--holdout-class label`` can retrain this bundle's
    network; else ``ConfigError`` naming ``holdout_class`` and the way that measures the user's
    own model (rows of the class, ``unseen=``). Checked before anything runs."""
    from demur.export.layers import POSTERIORS

    m = bundle.manifest
    own = ("For a model of your own, train it without the class, export it, and pass that class's rows as "
           "evaluate(..., unseen=X) (demur evaluate ... --unseen FILE)")
    if label not in m.labels:
        raise ConfigError(f"--holdout-class must be one of the bundle's labels {list(m.labels)}; got {label!r}. "
                          "If your model was trained without that class already, pass that class's rows as "
                          "evaluate(..., unseen=X) (demur evaluate ... --unseen FILE)", field="holdout_class")
    family = str(m.posterior.get("family", "radial"))
    if family == "ensemble" and m.posterior.get("member_family") not in POSTERIORS:
        raise ConfigError("--holdout-class retrains the model without the class, and demur trains only "
                          f"ensembles of variational members ({', '.join(POSTERIORS)}); this bundle's "
                          f"members are {m.posterior.get('member_family', 'plain networks')}. {own}",
                          field="holdout_class")
    recipe = _recipe(bundle)
    if not recipe["recorded"] or (family != "ensemble" and family not in POSTERIORS):
        raise ConfigError("--holdout-class retrains the bundle's network without the class, so it needs a bundle "
                          "exported from a `demur train` checkpoint, whose manifest records the architecture and "
                          "settings (extensions.training); this bundle records none. A bundle from `demur train` "
                          f"exported by an older demur: export it again. {own}", field="holdout_class")
    return family, recipe


def _holdout(bundle: Bundle, label: str, data: Any, seed: int, baseline: bool,
             retrain: tuple[str, dict[str, Any]]) -> dict[str, dict[str, Any]]:
    """Retrain the bundle's network the way it was trained, without ``label``; the AUROC of each
    score for every row of that class (none was trained on) against the seen classes' test rows.

    Only a bundle that records how it was trained (``_recipe``) is retrained: for any other
    model demur would be measuring a network that is not the user's, so it refuses and names
    the way that measures the user's own model (``evaluate(..., unseen=...)``)."""
    from demur.export.exporter import Inputs, export_model, training_rows
    from demur.export.temperature import mixture_statistics
    from demur.export.training import train, train_ensemble

    m = bundle.manifest
    family, recipe = retrain  # _retrainable's answer, checked before anything ran
    k = m.labels.index(label)
    splits = ("train", "val", "cal", "test")
    keep = {f"{a}_{s}": getattr(data, f"{a}_{s}")[getattr(data, f"y_{s}") != k]
            for s in splits[:3] for a in ("x", "y")}
    seen = dataclasses.replace(data, **keep)
    unseen_x = np.concatenate([getattr(data, f"x_{s}")[getattr(data, f"y_{s}") == k] for s in splits])
    seen_x, y_seen = data.x_test[data.y_test != k], data.y_test[data.y_test != k]
    if not len(unseen_x) or not len(seen_x):
        raise ConfigError(f"--holdout-class {label!r}: the data has {len(unseen_x)} rows of it and {len(seen_x)} "
                          "test rows of other classes; both are needed", field="holdout_class")
    options = recipe["settings"]  # epochs included: train's own keyword
    train_seed = seed if recipe["seed"] is None else recipe["seed"]
    if family == "ensemble":
        results = train_ensemble(seen, int(m.posterior["members"]), posterior=m.posterior["member_family"],
                                 seed=train_seed, arch=recipe["arch"], **options)
        result, model = results[0], [r.model for r in results]
        # what the ensemble checkpoint records: the mixture's temperature and score reference
        target = {**result.meta["target"], **mixture_statistics(
            model, result.meta["inputs"], seen.x_val, seen.y_val, seen.x_train,
            fit=bool(options.get("fit_temperature", False)))}
    else:
        result = train(seen, arch=recipe["arch"], posterior=family, seed=train_seed, progress=False, **options)
        model, target = result.model, result.meta["target"]
    shifts = {"unseen_class": unseen_x}
    out: dict[str, Any] = {}
    with tempfile.TemporaryDirectory(prefix="demur-holdout-") as tmp:
        held = export_model(model, Path(tmp) / "bundle", task="classification", labels=list(m.labels),
                            inputs=Inputs(spec=result.meta["inputs"], training=training_rows(seen.x_train)),
                            reference=seen.x_val, draws=m.graphs[next(iter(m.graphs))].draws, seed=seed,
                            name="holdout", target=target)
        held, rule_note = _recalibrated_like(bundle, held, seen.x_cal, seen.y_cal)
        out["bundle"] = _served(held, seen_x, y_seen, shifts)
        if baseline:
            nets = [_train_plain(seen.x_train, seen.y_train, result.meta["inputs"], len(m.labels), seed + i, recipe)
                    for i in range(ENSEMBLE_MEMBERS)]
            refer = 1.0 - out["bundle"]["clean_accepted"]
            for name, members in (("deterministic", nets[:1]), ("ensemble", nets)):
                out[name] = _baseline(members, held, seen_x, y_seen, shifts, refer)
    rows = _unseen_rows(out, label=label, n_unseen=len(unseen_x), n_seen=len(seen_x), rows=HOLDOUT_ROWS,
                        score=rule_from(m).score)
    rows["bundle"]["rule"] = rule_note
    return rows


def _recalibrated_like(original: Bundle, held: Bundle, x_cal: np.ndarray, y_cal: np.ndarray) -> tuple[Bundle, str]:
    """The retrained network's rule set as the original's was: the same score and goal
    (accuracy, confidence, max abstain; or abstain rate), calibrated on the seen classes' cal
    split, so the unseen class's "accepted" share is the served rule's. An uncalibrated original,
    or a goal the retrained network cannot meet, leaves the exporter's default, and says so."""
    from demur.export.calibration import calibrate
    from demur.serve.errors import CalibrationInfeasible

    record = original.manifest.decision.calibration or {}
    goal, score = record.get("target") or {}, record.get("score")
    if "accuracy" in goal:
        options = {"target_accuracy": float(goal["accuracy"]), "max_abstain": float(goal["max_abstain"]),
                   "confidence": float(record.get("confidence", 0.9))}
    elif "abstain_rate" in goal:
        options = {"target_abstain": float(goal["abstain_rate"])}
    else:
        return held, "the exporter's default threshold (the bundle is uncalibrated)"
    try:
        calibrate(held, x_cal, y_cal, score=score, **options)
    except CalibrationInfeasible as exc:
        return held, f"the exporter's default threshold (calibrating as the bundle was failed: {exc})"
    held = load_bundle(held.path)
    d = held.manifest.decision
    goal_text = ", ".join(f"{k} {v:g}" for k, v in options.items())
    return held, (f"{d.score} > {d.threshold:.4g}, calibrated as the bundle was ({goal_text}) on the seen "
                  "classes' cal split")


def _not_fitted(bundle: Bundle, rows: np.ndarray, what: str) -> list[str]:
    """Refuse rows the bundle's training-row fingerprint recognises (a model is right more often on
    rows it fitted, so the tables would flatter it); a note when the bundle keeps no fingerprint."""
    overlap = fitted_rows(bundle, rows, what, field=what)
    if overlap is None:
        return [f"warning: the bundle records no training-row fingerprint, so {what} could not be checked for "
                "rows the model was trained on"]
    if overlap.verdict == "leak":
        first = ", ".join(str(v) for v in np.flatnonzero(overlap.seen)[:8])
        raise DatasetError(f"{what}: {overlap.describe()}: clearly more than natural duplication explains, so rows "
                           f"of the training data are in it (rows {first}{' ...' if overlap.count > 8 else ''}); "
                           "evaluate on rows held out from training", field=what)
    if overlap.verdict == "natural":
        return [f"warning: {what}: {overlap.describe()}; no more than natural duplication of discrete features "
                "explains, so they are kept"]
    return []


def _image_shape(spec: Any) -> tuple[int, ...] | None:
    """(C, H, W) of image inputs (a flat image input is taken as one square channel), else None."""
    if spec.kind != "image":
        return None
    if len(spec.shape) > 1:
        return tuple(spec.shape)
    side = int(round(spec.size ** 0.5))
    return (1, side, side) if side * side == spec.size else None


def evaluate(
    bundle: str | Path | Bundle,
    x: np.ndarray,
    y: np.ndarray,
    *,
    x_train: np.ndarray | None = None,
    y_train: np.ndarray | None = None,
    baseline: bool = False,
    out: str | Path | None = None,
    seed: int = 0,
    title: str = "",
    holdout: tuple[str, Any] | None = None,
    unseen: np.ndarray | None = None,
    unseen_label: str = "",
) -> dict[str, Any]:
    """The evaluation tables for ``bundle`` on labelled held-out ``x`` float[N, F], ``y`` int[N]
    (class indices); ``baseline`` needs ``x_train``/``y_train``. Writes the page when ``out``.

    The held-out-class table, two ways:

    - ``unseen``: float[U, F] rows of a class the bundle's model was never trained on (you
      trained your own model without it); each score's AUROC for them against ``x``. This
      measures your model, whatever its architecture. Baselines (``x_train`` without the class)
      get the same rows.
    - ``holdout``: (label, the full ``Dataset``): demur retrains the bundle's network without
      that class (only for a bundle exported from a ``demur train`` checkpoint) and uses every
      row of the class as the unseen ones."""
    b = bundle if isinstance(bundle, Bundle) else load_bundle(bundle)
    if b.manifest.task == "regression":
        _regression_options(baseline, holdout is not None, unseen is not None)
        cases = cases_from_arrays(b, x, y, "x", "x", field_y="y")
        return _evaluate_regression(b, cases.x, cases.y, out=out, seed=seed, title=title)
    retrain = _refused_early(b, holdout[0] if holdout is not None else None, unseen is not None, out)
    cases = cases_from_arrays(b, x, y, "x", "x", field_y="y")
    train = None
    if baseline:
        if x_train is None or y_train is None:
            raise ConfigError("baseline needs the training split (x_train, y_train)", field="baseline")
        fit = cases_from_arrays(b, x_train, y_train, "x_train", "x_train", field_y="y_train")
        train = (fit.x, fit.y)
    u = case_array(b, unseen, "unseen") if unseen is not None else None
    return _tables(b, cases.x, cases.y, train, u, baseline=baseline, out=out, seed=seed, title=title,
                   holdout=holdout, retrain=retrain, unseen_label=unseen_label)


def evaluate_file(bundle: str | Path, data: str, *, out: str | Path, target: str | None = None,
                  ignore: Sequence[str] = (), seed: int | None = None, baseline: bool = False,
                  train: str | Path | None = None, holdout_class: str | None = None,
                  unseen: str | Path | None = None, unseen_label: str | None = None) -> dict[str, Any]:
    """``demur evaluate``: ``data`` is a labelled CSV (every row is evaluated, as calibrate uses
    every row; ``target`` its label column) or a bundled set (its test split, cut with the seed
    training used); ``train``: with a CSV and ``baseline``, the labelled rows the baselines learn
    from; ``unseen``: a CSV of rows of a class the model was trained without. Rows are read and
    checked once (``demur.export.cases``, as calibrate reads them); returns ``evaluate``'s figures."""
    b = load_bundle(bundle)
    if b.manifest.task == "regression":
        _regression_options(baseline, holdout_class is not None, unseen is not None)
        if str(data) in BUILTIN:
            ds, split_seed = builtin_splits(b, str(data), seed)
            x, y = ds.x_test, ds.y_test
        else:
            cases = cases_from_file(b, str(data), label_column(b, target), list(ignore))
            x, y, split_seed = cases.x, cases.y, int(seed or 0)
        return _evaluate_regression(b, x, y, out=out, seed=split_seed, title="")
    retrain = _refused_early(b, holdout_class, unseen is not None, out)
    ignore = list(ignore)
    if str(data) in BUILTIN:
        ds, split_seed = builtin_splits(b, str(data), seed)
        target = target or ds.target
        x, y, fit = ds.x_test, ds.y_test, (ds.x_train, ds.y_train)
    else:  # the user's own held-out file: every row is evaluated, as calibrate uses every row
        target = label_column(b, target)
        if holdout_class is not None:
            raise ConfigError("--holdout-class retrains on the bundled set's training split, which a held-out CSV "
                              "does not give; use --data digits, or for a class your model never saw --unseen FILE",
                              field="holdout_class")
        if baseline and train is None:
            raise ConfigError("--baseline trains plain networks, so with a CSV it needs your training rows: "
                              "--train FILE (labelled, columns by name)", field="baseline")
        cases = cases_from_file(b, str(data), target, ignore)
        x, y, ds, split_seed = cases.x, cases.y, None, int(seed or 0)
        fitted = cases_from_file(b, str(train), target, ignore) if baseline else None
        fit = (fitted.x, fitted.y) if fitted is not None else None
    u = None
    if unseen is not None:
        if not Path(unseen).is_file():
            raise DatasetError(f"--unseen must be an existing CSV file; got {str(unseen)!r}", field="unseen")
        u = read_features(unseen, list(b.manifest.inputs.names), ignore=[*([target] if target else []), *ignore])
    return _tables(b, x, y, fit if baseline else None, u, baseline=baseline, out=out, seed=split_seed, title="",
                   holdout=(holdout_class, ds) if holdout_class is not None else None, retrain=retrain,
                   unseen_label=unseen_label or (Path(unseen).name if unseen is not None else ""))


def _refused_early(b: Bundle, holdout_class: str | None, has_unseen: bool,
                   out: str | Path | None) -> tuple[str, dict[str, Any]] | None:
    """Everything refused before a row is read: a regression bundle, both ways of an unseen
    class, an ``out`` that is a file, and a ``holdout_class`` demur cannot retrain (its
    ``_retrainable`` answer is returned, so it is worked out once)."""
    if b.manifest.task != "classification":
        raise ConfigError("demur evaluate measures classifiers; this bundle is a regression model", field="bundle")
    if holdout_class is not None and has_unseen:
        raise ConfigError("give either holdout (demur retrains without the class) or unseen (rows of a class "
                          "your model never saw), not both", field="unseen")
    if out is not None and Path(out).exists() and not Path(out).is_dir():
        raise ConfigError(f"out {str(out)!r} exists and is not a folder; choose another --out", field="out")
    return _retrainable(b, str(holdout_class)) if holdout_class is not None else None


def _tables(b: Bundle, x: np.ndarray, y: np.ndarray, train: tuple[np.ndarray, np.ndarray] | None,
            u: np.ndarray | None, *, baseline: bool, out: str | Path | None, seed: int, title: str,
            holdout: tuple[str, Any] | None, retrain: tuple[str, dict[str, Any]] | None,
            unseen_label: str) -> dict[str, Any]:
    """``evaluate``'s tables on rows already checked (x float64[N, F], y class indices)."""
    m = b.manifest
    notes = _not_fitted(b, x, "x") + (_not_fitted(b, u, "unseen") if u is not None else [])
    if u is not None:
        both = len({r.tobytes() for r in x} & {r.tobytes() for r in u})
        if both:
            notes.append(f"warning: {both} of the {len(u)} unseen rows are also in x: the unseen class should be "
                         "one the model never saw, and x the classes it knows")
    spec = m.inputs
    shifts = shifted_inputs(x, low=np.asarray(spec.low), high=np.asarray(spec.high), center=np.asarray(spec.center),
                            image_shape=_image_shape(spec), seed=seed)
    if u is not None:
        shifts["unseen_class"] = u
    models: dict[str, Any] = {"bundle": _served(b, x, y, shifts)}
    if train is not None:
        inputs = {"center": list(spec.center), "scale": list(spec.scale), "shape": list(spec.shape)}
        recipe = _recipe(b)
        nets = [_train_plain(train[0], train[1], inputs, len(m.labels), seed + i, recipe)
                for i in range(ENSEMBLE_MEMBERS)]
        refer = 1.0 - models["bundle"]["clean_accepted"]
        network = (f"the bundle's {recipe['arch']} network with plain layers, its recorded training settings"
                   if recipe["recorded"] else "demur's MLP with the training defaults (the bundle records no "
                   "architecture: a model of your own)")
        models["deterministic"] = {**_baseline(nets[:1], b, x, y, shifts, refer), "network": network}
        models["ensemble"] = {**_baseline(nets, b, x, y, shifts, refer), "network": network}
    if u is not None:
        for name, row in _unseen_rows(models, label=unseen_label or "unseen", n_unseen=len(u), n_seen=len(x),
                                      rows=UNSEEN_ROWS, score=rule_from(m).score).items():
            models[name]["holdout"] = row
    if holdout is not None and retrain is not None:
        for name, row in _holdout(b, holdout[0], holdout[1], seed, baseline, retrain).items():
            models[name]["holdout"] = row
    figures = {"title": title or f"{m.model_name} v{m.model_version}", "model": m.model_name,
               "checksum": b.checksum, "models": models, "notes": notes}
    if out is not None:
        write_evaluation(out, figures)
    return figures


def _regression_options(baseline: bool, holdout: bool, unseen: bool) -> None:
    """Refuse, by name, what ``demur evaluate`` offers classifiers only."""
    if baseline or holdout or unseen:
        raise ConfigError("for a regression bundle demur evaluate gives the scores, coverage, PIT, referral and "
                          "shift tables; baseline, holdout class and unseen class are for classifiers",
                          field="baseline" if baseline else "holdout_class" if holdout else "unseen")


def _evaluate_regression(b: Bundle, x: np.ndarray, y: np.ndarray, *, out: str | Path | None, seed: int,
                         title: str) -> dict[str, Any]:
    """A regression bundle's tables (serve/offline/regression.py) through the serving path: the
    draws' Gaussian mixture scored against ``y``, the served rule (``ServedRule``) on clean and
    shifted inputs."""
    m = b.manifest
    notes = _not_fitted(b, x, "x")
    if out is not None and Path(out).exists() and not Path(out).is_dir():
        raise ConfigError(f"out {str(out)!r} exists and is not a folder; choose another --out", field="out")
    engine = Engine(b, graph="auto", seed=0).load()
    served = ServedRule.from_manifest(m)

    def run(xs: np.ndarray) -> tuple[np.ndarray, Any, np.ndarray, np.ndarray]:
        """(draws, summary, abstain, outside), decided a chunk at a time (bounded k-NN memory)."""
        xs = xs.reshape(-1, *m.inputs.shape)
        d, verdicts = [], []
        for xb in chunks(xs):
            db = engine.run(xb)
            d.append(db)
            verdicts.append(served.decide(summarise(m.task, db, m.interval_level, m.target), xb))
        d = np.concatenate(d, axis=1)
        out = [v.outside if v.outside is not None else np.zeros(len(v.abstain), bool) for v in verdicts]
        return (d, summarise(m.task, d, m.interval_level, m.target), np.concatenate([v.abstain for v in verdicts]),
                np.concatenate(out))

    d, s, abstain, outside = run(x)
    mu, sd = regression_components(d, float(m.target.get("center", 0.0)), float(m.target.get("scale", 1.0)))
    spec = m.inputs
    low, high = np.asarray(spec.low), np.asarray(spec.high)
    shifts = {**shifted_inputs(x, low=low, high=high, center=np.asarray(spec.center), image_shape=None, seed=seed),
              **far_shifts(x, low=low, high=high)}
    clean_width = float(np.mean(s.interval_width))
    rows = {"clean": regression_shift_row(clean_width, s.interval_width, s.epistemic_std, ~abstain, outside)}
    for name, xs in shifts.items():
        _, ss, ab, far = run(xs)
        rows[name] = regression_shift_row(clean_width, ss.interval_width, ss.epistemic_std, ~ab, far)
    body = {"scores": regression_scores(mu, sd, y),
            "coverage": coverage_table(mu, sd, y, (s.lower, s.upper, s.level, s.interval_method)),
            "referral": referral_by_epistemic(y, s.mean, s.epistemic_var, s.lower, s.upper),
            "shift": rows, "clean_accepted": float(np.mean(~abstain)),
            "rule": {"score": served.rule.score, "threshold": served.rule.threshold, "source": served.rule.source,
                     "support": served.support is not None}}
    figures = {"title": title or f"{m.model_name} v{m.model_version}", "model": m.model_name, "task": "regression",
               "checksum": b.checksum, "models": {"bundle": body}, "notes": notes}
    if out is not None:
        write_regression_evaluation(out, figures)
    return figures
