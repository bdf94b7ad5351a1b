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

import argparse
import dataclasses
import tempfile
from pathlib import Path
from typing import Any

import numpy as np

from demur.serve.adapters.engine import Engine
from demur.serve.core.bundle import Bundle, load_bundle
from demur.serve.core.decision import decide, rule_from
from demur.serve.core.summary import summarise
from demur.serve.core.support import support_from_manifest
from demur.serve.errors import ConfigError
from demur.serve.offline.evaluation import (
    auroc_difference,
    holdout_row,
    referral_table,
    scores_of,
    shift_row,
    shifted_inputs,
    write_evaluation,
)

from demur.export.datasets import BUILTIN, column_order, load_dataset, read_features
from demur.export.errors import DatasetError
from demur.export.calibration import case_array, fitted_rows, labelled_arrays, labelled_file

__all__ = ["ENSEMBLE_MEMBERS", "HOLDOUT_ROWS", "UNSEEN_ROWS", "evaluate", "register"]

ENSEMBLE_MEMBERS = 5
"""Members of the ensemble baseline."""

_ROWS = 256

_SCORES = "_unseen_scores"


def _served(bundle: Bundle, x: np.ndarray, y: np.ndarray, shifts: dict[str, np.ndarray],
            engine_seed: int = 0) -> dict[str, Any]:
    """The bundle's tables through the serving path."""
    m = bundle.manifest
    engine = Engine(bundle, graph="auto", seed=engine_seed).load()
    rule = rule_from(m)
    support = support_from_manifest(m)

    def run(xs: np.ndarray) -> tuple[dict[str, np.ndarray], np.ndarray, np.ndarray]:
        probs, mi, joint, accept = [], [], [], []
        for i in range(0, len(xs), _ROWS):
            xb = xs[i:i + _ROWS].reshape(-1, *m.inputs.shape)
            s = summarise(m.task, engine.run(xb), m.interval_level, m.target)
            d = decide(s, rule, support=support, x_raw=xb)
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
    from demur.export.training import DEFAULTS

    t = (bundle.manifest.raw.get("extensions", {}) or {}).get("training", {}) if bundle is not None else {}
    t = t if isinstance(t, dict) else {}
    settings, arch = t.get("settings"), t.get("arch")
    recorded = isinstance(settings, dict) and isinstance(arch, dict) and arch.get("kind") in ("mlp", "conv")
    chosen = {k: settings[k] for k in DEFAULTS if recorded and k in settings}
    return {"recorded": recorded, "arch": arch["kind"] if recorded else "mlp",
            "settings": {**DEFAULTS, **chosen},
            "seed": int(settings["seed"]) if recorded and isinstance(settings.get("seed"), int) else None}


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


def _holdout(bundle: Bundle, label: str, data: Any, seed: int, baseline: bool) -> dict[str, dict[str, Any]]:
    """Retrain the bundle's network the way it was trained, without ``label``; the AUROC of each
    score for every row of that class (none was trained on) against the seen classes' test rows.

    Only a bundle that records how it was trained (``_recipe``) is retrained: for any other
    model demur would be measuring a network that is not the user's, so it refuses and names
    the way that measures the user's own model (``evaluate(..., unseen=...)``)."""
    from demur.export.exporter import Inputs, export_model, training_rows
    from demur.export.temperature import mixture_statistics
    from demur.export.training import train, train_ensemble

    m = bundle.manifest
    family, recipe = _retrainable(bundle, label)
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

    record = original.manifest.raw.get("decision", {}).get("calibration") or {}
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
    d = held.manifest.raw["decision"]
    goal_text = ", ".join(f"{k} {v:g}" for k, v in options.items())
    return held, (f"{d['score']} > {d['threshold']:.4g}, calibrated as the bundle was ({goal_text}) on the seen "
                  "classes' cal split")


def _not_fitted(bundle: Bundle, rows: np.ndarray, what: str) -> list[str]:
    """Refuse rows the bundle's training-row fingerprint recognises (a model is right more often on
    rows it fitted, so the tables would flatter it); a note when the bundle keeps no fingerprint."""
    overlap = fitted_rows(bundle, rows, what, field=what)
    if overlap is None:
        return [f"warning: the bundle records no training-row fingerprint, so {what} could not be checked for "
                "rows the model was trained on"]
    if overlap.count:
        first = ", ".join(str(v) for v in np.flatnonzero(overlap.seen)[:8])
        raise DatasetError(f"{overlap.count} of the {len(rows)} rows of {what} were used to train this model (rows "
                           f"{first}{' ...' if overlap.count > 8 else ''}); evaluate on rows held out from training",
                           field=what)
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
    m = b.manifest
    if m.task != "classification":
        raise ConfigError("demur evaluate measures classifiers; this bundle is a regression model", field="bundle")
    if holdout is not None and unseen is not None:
        raise ConfigError("give either holdout (demur retrains without the class) or unseen (rows of a class "
                          "your model never saw), not both", field="unseen")
    if holdout is not None:
        _retrainable(b, str(holdout[0]))
    x, y = labelled_arrays(b, x, y, "x", "y")
    train = None
    if baseline:
        if x_train is None or y_train is None:
            raise ConfigError("baseline needs the training split (x_train, y_train)", field="baseline")
        train = labelled_arrays(b, x_train, y_train, "x_train", "y_train")
    u = case_array(b, unseen, "unseen") if unseen is not None else None
    notes = _not_fitted(b, x, "x") + (_not_fitted(b, u, "unseen") if u is not None else [])
    if u is not None:
        both = len({r.tobytes() for r in x} & {r.tobytes() for r in u})
        if both:
            notes.append(f"warning: {both} of the {len(u)} unseen rows are also in x: the unseen class should be "
                         "one the model never saw, and x the classes it knows")
    if out is not None and Path(out).exists() and not Path(out).is_dir():
        raise ConfigError(f"out {str(out)!r} exists and is not a folder; choose another --out", field="out")
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
    if holdout is not None:
        for name, row in _holdout(b, holdout[0], holdout[1], seed, baseline).items():
            models[name]["holdout"] = row
    figures = {"title": title or f"{m.model_name} v{m.model_version}", "model": m.model_name,
               "checksum": b.checksum, "models": models, "notes": notes}
    if out is not None:
        write_evaluation(out, figures)
    return figures


# -- command line ------------------------------------------------------------------
def register(subparsers: argparse._SubParsersAction) -> None:
    """Add ``demur evaluate`` to the ``demur`` command."""
    p = subparsers.add_parser(
        "evaluate", help="measure whether the abstention flag is worth having, on labelled held-out data",
        description="Referral, shift and held-out-class tables for a bundle (JSON, PNG plots, index.html).")
    p.add_argument("bundle", metavar="BUNDLE")
    p.add_argument("--data", required=True,
                   help="a labelled CSV (every row is evaluated; columns by name) or 'digits' (its test split)")
    p.add_argument("--target", metavar="COLUMN", help="label column of a CSV (default: the one training used)")
    p.add_argument("--ignore", action="append", metavar="COLUMN",
                   help="a column of --data or --unseen to skip, e.g. an id (repeatable)")
    p.add_argument("--seed", type=int, help="split seed (default: the one training used)")
    p.add_argument("--out", required=True, type=Path, help="folder for evaluation.json, plots, index.html")
    p.add_argument("--baseline", action="store_true",
                   help=f"also train a deterministic network and a {ENSEMBLE_MEMBERS}-member ensemble")
    p.add_argument("--train", metavar="FILE", type=Path,
                   help="with a CSV --data and --baseline: the labelled training rows the baselines learn from")
    p.add_argument("--holdout-class", metavar="LABEL",
                   help="retrain the bundle's network without this class (a bundle from `demur train`) and measure "
                        "how every row of it is flagged")
    p.add_argument("--unseen", metavar="FILE", type=Path,
                   help="CSV of rows of a class your model was trained without (columns by name; the --target "
                        "column and --ignore columns are skipped): how they are flagged, for any model")
    p.add_argument("--unseen-label", metavar="NAME", help="what to call that class on the page (default: the file's name)")
    p.set_defaults(func=_main)


def _main(args: argparse.Namespace) -> int:
    b = load_bundle(args.bundle)
    m = b.manifest
    if args.holdout_class is not None:
        _retrainable(b, args.holdout_class)
    if args.out.exists() and not args.out.is_dir():
        raise ConfigError(f"--out {str(args.out)!r} exists and is not a folder; choose another", field="out")
    trained = (m.raw.get("extensions", {}).get("training", {}) or {}).get("data", {}) or {}
    target = args.target or trained.get("target")
    ignore = list(args.ignore or [])
    if str(args.data) in BUILTIN:
        same = str(trained.get("source", args.data)) == str(args.data)
        seed = int(args.seed if args.seed is not None else (trained.get("seed", 0) if same else 0))
        ds = load_dataset(args.data, None, seed=seed, task=m.task)
        column_order(list(ds.feature_names), list(m.inputs.names), where=f"'{args.data}'")
        if m.task == "classification" and tuple(ds.labels) != tuple(m.labels):
            raise DatasetError(f"data '{args.data}' has labels {list(ds.labels)}; bundle {b.path} has "
                               f"{list(m.labels)}", field="data")
        x, y, x_train, y_train = ds.x_test, ds.y_test, ds.x_train, ds.y_train
    else:  # the user's own held-out file: every row is evaluated, as calibrate uses every row
        if target is None:
            raise ConfigError("a CSV needs --target COLUMN (the label column); the bundle records none",
                              field="target")
        if args.holdout_class is not None:
            raise ConfigError("--holdout-class retrains on the bundled set's training split, which a held-out CSV "
                              "does not give; use --data digits, or for a class your model never saw --unseen FILE",
                              field="holdout_class")
        if args.baseline and args.train is None:
            raise ConfigError("--baseline trains plain networks, so with a CSV it needs your training rows: "
                              "--train FILE (labelled, columns by name)", field="baseline")
        x, y = labelled_file(b, args.data, target, ignore)
        x_train, y_train = labelled_file(b, str(args.train), target, ignore) if args.baseline else (None, None)
        ds = None
        seed = int(args.seed or 0)
    unseen = None
    if args.unseen is not None:
        if not args.unseen.is_file():
            raise DatasetError(f"--unseen must be an existing CSV file; got {str(args.unseen)!r}", field="unseen")
        unseen = read_features(args.unseen, list(m.inputs.names), ignore=[*([target] if target else []), *ignore])
    figures = evaluate(b, x, y, x_train=x_train, y_train=y_train, baseline=args.baseline, out=args.out, seed=seed,
                       holdout=(args.holdout_class, ds) if args.holdout_class is not None else None,
                       unseen=unseen, unseen_label=args.unseen_label or (args.unseen.name if args.unseen else ""))
    for note in figures["notes"]:
        print(note)
    for name, body in figures["models"].items():
        ref = body["referral"]
        acc10 = ref["rankings"].get("mutual_information", ref["rankings"]["one_minus_max_prob"])
        far = {s: row["accepted"] for s, row in body["shift"].items()}
        print(f"{name}: accuracy {ref['accuracy']:.4f}, at 10% referred {acc10['accuracy_at_referral']['0.10']:.4f}; "
              f"clean accepted {body['clean_accepted']:.3f}; shifted accepted "
              + ", ".join(f"{s} {v:.3f}" for s, v in far.items())
              + (f"; unseen class ({body['holdout']['n']} rows) AUROC "
                 + ", ".join(f"{k} {v:.3f} (se {body['holdout']['auroc_se'][k]:.3f})"
                             for k, v in body["holdout"]["auroc"].items()) if body.get("holdout") else ""))
        versus = (body.get("holdout") or {}).get("against_deterministic")
        if versus:
            print(f"  unseen class, {versus['score']} against the deterministic network's max-probability on the "
                  f"same cases: AUROC difference {versus['difference']:+.4f} (se {versus['standard_error']:.4f}, "
                  f"p = {versus['p_value']:.3f}, DeLong et al. 1988)")
    print(f"wrote {args.out / 'index.html'}")
    return 0
