"""``demur evaluate``: is the abstention flag worth having, measured on labelled held-out data.

The bundle runs through the serving path (``Engine`` -> ``summarise`` -> ``decide`` with the
support check), on clean held-out cases and on built-in shifts of them
(``demur.serve.offline.evaluation.shifted_inputs``). ``baseline=True`` trains, on the same
training split, a deterministic network of the same architecture (plain ``nn.Linear`` layers,
the training defaults of ``demur.export.training``: Adam, lr, batch size, epochs) and a
5-member ensemble of them (Lakshminarayanan et al. 2017, random initialisations), and puts
their tables beside the bundle's. A baseline's "served rule" is the same support check plus
a 1 - max-probability threshold that refers as many clean cases as the bundle's rule does.
``holdout_class`` trains a fresh variational network (the bundle's posterior, the training
defaults; an ensemble bundle: as many members, ``train_ensemble``) without that class, exports
it to a temporary bundle (support check included, the exporter's uncalibrated default
threshold) and measures how its test cases are flagged.

Example::

    demur evaluate build/demo/bundle --data digits --out build/demo/evaluation --baseline
    demur evaluate BUNDLE --data digits --holdout-class 9 --out build/holdout9
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
    referral_table,
    scores_of,
    shift_row,
    shifted_inputs,
    write_evaluation,
)

from demur.export.datasets import BUILTIN, column_order, load_dataset
from demur.export.errors import DatasetError
from demur.export.holdout import labelled_file

__all__ = ["ENSEMBLE_MEMBERS", "evaluate", "register"]

ENSEMBLE_MEMBERS = 5
"""Members of the ensemble baseline."""

_ROWS = 256


def _served(bundle: Bundle, x: np.ndarray, y: np.ndarray, shifts: dict[str, np.ndarray],
            engine_seed: int = 0) -> dict[str, Any]:
    """The bundle's tables through the serving path."""
    m = bundle.manifest
    engine = Engine(bundle, graph="auto", seed=engine_seed).load()
    rule = rule_from(m)
    support = support_from_manifest(m)

    def run(xs: np.ndarray) -> tuple[dict[str, np.ndarray], np.ndarray, np.ndarray]:
        probs, mi, accept = [], [], []
        for i in range(0, len(xs), _ROWS):
            xb = xs[i:i + _ROWS].reshape(-1, *m.inputs.shape)
            s = summarise(m.task, engine.run(xb), m.interval_level, m.target)
            d = decide(s, rule, support=support, x_raw=xb)
            probs.append(s.mean_probs)
            mi.append(s.mutual_information)
            accept.append(~d.abstain)
        p = np.concatenate(probs)
        return scores_of(p, np.concatenate(mi)), np.concatenate(accept), p

    clean, accept, probs = run(x)
    return {"referral": referral_table(probs, y, clean), "clean_accepted": float(accept.mean()),
            "shift": {name: shift_row(clean, *run(xs)[:2]) for name, xs in shifts.items()},
            "rule": {"score": rule.score, "threshold": rule.threshold, "source": rule.source,
                     "support": support is not None}}


def _train_plain(x: np.ndarray, y: np.ndarray, inputs: dict[str, Any], outputs: int, seed: int) -> Any:
    """A deterministic MLP of the demo architecture, trained with the training defaults."""
    import torch
    from torch import nn

    from demur.export.training import DEFAULTS, standardise_inputs

    torch.manual_seed(seed)
    flat = dict(inputs, shape=[int(np.prod(inputs["shape"]))])
    xt = torch.from_numpy(standardise_inputs(flat, x))
    yt = torch.as_tensor(y, dtype=torch.long)
    widths = [xt.shape[1], *DEFAULTS["hidden"]]
    layers: list[nn.Module] = []
    for a, b in zip(widths[:-1], widths[1:]):
        layers += [nn.Linear(a, b), nn.ReLU()]
    model = nn.Sequential(*layers, nn.Linear(widths[-1], outputs))
    opt = torch.optim.Adam(model.parameters(), lr=DEFAULTS["lr"])
    shuffle = torch.Generator().manual_seed(seed)
    for _ in range(DEFAULTS["epochs"]):
        for idx in torch.randperm(len(xt), generator=shuffle).split(DEFAULTS["batch_size"]):
            loss = nn.functional.cross_entropy(model(xt[idx]), yt[idx])
            opt.zero_grad(set_to_none=True)
            loss.backward()
            opt.step()
    model.eval()

    def probs(xs: np.ndarray) -> np.ndarray:
        with torch.no_grad():
            return torch.softmax(model(torch.from_numpy(standardise_inputs(flat, xs))).double(), -1).numpy()

    return probs


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

    return {"referral": referral_table(probs, y, clean), "clean_accepted": float(accepted(x, clean).mean()),
            "shift": {name: shift_row(clean, sc, accepted(xs, sc)) for name, xs in shifts.items()
                      for sc in [run(xs)[0]]},
            "rule": {"score": "one_minus_max_prob", "threshold": threshold,
                     "basis": "refers as many clean cases as the bundle's rule", "support": support is not None}}


def _holdout(bundle: Bundle, label: str, data: Any, seed: int, baseline: bool) -> dict[str, Any]:
    """Train without ``label``; AUROC of each score for its test cases against the seen classes'."""
    from demur.export.exporter import Inputs, training_rows, export_model
    from demur.export.layers import POSTERIORS
    from demur.export.training import train, train_ensemble

    m = bundle.manifest
    if label not in m.labels:
        raise ConfigError(f"--holdout-class must be one of the labels {list(m.labels)}; got {label!r}",
                          field="holdout_class")
    k = m.labels.index(label)
    keep = {f"{a}_{s}": getattr(data, f"{a}_{s}")[getattr(data, f"y_{s}") != k]
            for s in ("train", "val", "cal") for a in ("x", "y")}
    seen = dataclasses.replace(data, **keep)
    family = str(m.posterior.get("family", "radial"))
    if family == "ensemble":  # retrain every member the same way (demur.export.training.train_ensemble)
        if m.posterior.get("member_family") not in POSTERIORS:
            raise ConfigError("--holdout-class retrains the model without the class, and demur trains only "
                              f"ensembles of variational members ({', '.join(POSTERIORS)}); this bundle's "
                              f"members are {m.posterior.get('member_family', 'plain networks')}",
                              field="holdout_class")
        results = train_ensemble(seen, int(m.posterior["members"]), posterior=m.posterior["member_family"],
                                 seed=seed)
        result, model = results[0], [r.model for r in results]
    else:
        result = train(seen, arch="mlp", posterior=family, seed=seed, progress=False)
        model = result.model
    unseen_x, seen_x = data.x_test[data.y_test == k], data.x_test[data.y_test != k]
    out: dict[str, Any] = {}
    with tempfile.TemporaryDirectory(prefix="demur-holdout-") as tmp:
        held = export_model(model, Path(tmp) / "bundle", task="classification", labels=list(m.labels),
                            inputs=Inputs(spec=result.meta["inputs"], training=training_rows(seen.x_train)),
                            reference=seen.x_val, draws=m.graphs[next(iter(m.graphs))].draws, seed=seed,
                            name="holdout")
        y_seen = data.y_test[data.y_test != k]
        out["bundle"] = _served(held, seen_x, y_seen, {"unseen_class": unseen_x})
        if baseline:
            nets = [_train_plain(seen.x_train, seen.y_train, result.meta["inputs"], len(m.labels), seed + i)
                    for i in range(ENSEMBLE_MEMBERS)]
            refer = 1.0 - out["bundle"]["clean_accepted"]
            for name, members in (("deterministic", nets[:1]), ("ensemble", nets)):
                out[name] = _baseline(members, held, seen_x, y_seen, {"unseen_class": unseen_x}, refer)
    return {name: {"label": label, "n": int(len(unseen_x)), "auroc": b["shift"]["unseen_class"]["auroc"],
                   "accepted": b["shift"]["unseen_class"]["accepted"]} for name, b in out.items()}


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
) -> dict[str, Any]:
    """The evaluation tables for ``bundle`` on labelled held-out ``x`` float[N, F], ``y`` int[N]
    (class indices); ``baseline`` needs ``x_train``/``y_train``. Writes the page when ``out``.
    ``holdout``: (label, the full ``Dataset``) for the held-out-class mode."""
    b = bundle if isinstance(bundle, Bundle) else load_bundle(bundle)
    m = b.manifest
    if m.task != "classification":
        raise ConfigError("demur evaluate measures classifiers; this bundle is a regression model", field="bundle")
    x = np.asarray(x, dtype=np.float64).reshape(len(x), -1)
    y = np.asarray(y).astype(np.int64)
    if x.shape[1] != m.inputs.size:
        raise ConfigError(f"x has {x.shape[1]} features; the bundle expects {m.inputs.size}", field="x")
    spec = m.inputs
    shifts = shifted_inputs(x, low=np.asarray(spec.low), high=np.asarray(spec.high), center=np.asarray(spec.center),
                            image_shape=_image_shape(spec), seed=seed)
    models: dict[str, Any] = {"bundle": _served(b, x, y, shifts)}
    if baseline:
        if x_train is None or y_train is None:
            raise ConfigError("baseline needs the training split (x_train, y_train)", field="baseline")
        inputs = {"center": list(spec.center), "scale": list(spec.scale), "shape": list(spec.shape)}
        nets = [_train_plain(np.asarray(x_train), np.asarray(y_train), inputs, len(m.labels), seed + i)
                for i in range(ENSEMBLE_MEMBERS)]
        refer = 1.0 - models["bundle"]["clean_accepted"]
        models["deterministic"] = _baseline(nets[:1], b, x, y, shifts, refer)
        models["ensemble"] = _baseline(nets, b, x, y, shifts, refer)
    if holdout is not None:
        for name, row in _holdout(b, holdout[0], holdout[1], seed, baseline).items():
            models[name]["holdout"] = row
    figures = {"title": title or f"{m.model_name} v{m.model_version}", "model": m.model_name,
               "checksum": b.checksum, "models": models}
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
    p.add_argument("--data", required=True, help="'digits' or a CSV file; its test split is evaluated")
    p.add_argument("--target", metavar="COLUMN", help="label column of a CSV")
    p.add_argument("--seed", type=int, help="split seed (default: the one training used)")
    p.add_argument("--out", required=True, type=Path, help="folder for evaluation.json, plots, index.html")
    p.add_argument("--baseline", action="store_true",
                   help=f"also train a deterministic network and a {ENSEMBLE_MEMBERS}-member ensemble")
    p.add_argument("--holdout-class", metavar="LABEL", help="train without this class and measure how it is flagged")
    p.set_defaults(func=_main)


def _main(args: argparse.Namespace) -> int:
    b = load_bundle(args.bundle)
    m = b.manifest
    trained = (m.raw.get("extensions", {}).get("training", {}) or {}).get("data", {}) or {}
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
        target = args.target or trained.get("target")
        if target is None:
            raise ConfigError("a CSV needs --target COLUMN (the label column); the bundle records none",
                              field="target")
        if args.baseline or args.holdout_class is not None:
            raise ConfigError("--baseline and --holdout-class retrain on a training split, which a held-out CSV "
                              "does not give; use --data digits, or from Python evaluate(bundle, x, y, "
                              "x_train=..., y_train=..., baseline=True)",
                              field="baseline" if args.baseline else "holdout_class")
        x, y = labelled_file(b, args.data, target)
        x_train = y_train = ds = None
        seed = int(args.seed or 0)
    figures = evaluate(b, x, y, x_train=x_train, y_train=y_train, baseline=args.baseline, out=args.out, seed=seed,
                       holdout=(args.holdout_class, ds) if args.holdout_class is not None else None)
    for name, body in figures["models"].items():
        ref = body["referral"]
        acc10 = ref["rankings"].get("mutual_information", ref["rankings"]["one_minus_max_prob"])
        far = {s: row["accepted"] for s, row in body["shift"].items()}
        print(f"{name}: accuracy {ref['accuracy']:.4f}, at 10% referred {acc10['accuracy_at_referral']['0.10']:.4f}; "
              f"clean accepted {body['clean_accepted']:.3f}; shifted accepted "
              + ", ".join(f"{s} {v:.3f}" for s, v in far.items())
              + (f"; unseen class AUROC {body['holdout']['auroc']}" if body.get("holdout") else ""))
    print(f"wrote {args.out / 'index.html'}")
    return 0
