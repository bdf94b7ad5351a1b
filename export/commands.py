"""The torch side's ``demur`` subcommands: every flag in one place.

``pyproject.toml``'s ``[project.entry-points."demur.commands"]`` names the ``register_*``
functions here, so ``serve/cli.py`` finds them without importing ``demur.export`` by name
(the runtime image simply lacks them). Each command's work is a plain function in its own
module, callable from Python with the same behaviour; what is here only turns flags into
that call and its result into the lines printed:

=========  ====================================================  ================================
command    the work                                              module
=========  ====================================================  ================================
train      ``train`` / ``train_ensemble``                        export/training.py
export     ``export_bundle`` / ``export_factory``                export/exporter.py
calibrate  ``calibrate_file``                                    export/calibration.py
evaluate   ``evaluate_file``                                     export/evaluation.py
bench      ``run_bench``, ``save_result``, ``format_table``      export/bench/engine.py
=========  ====================================================  ================================
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from demur.serve.core.bundle import SCORE_TASKS
from demur.serve.offline.calibration import DEFAULT_MAX_ABSTAIN

from demur.export.errors import ExportError

__all__ = ["register_bench", "register_calibrate", "register_evaluate", "register_export", "register_train"]

_Subparsers = argparse._SubParsersAction


# -- demur train ----------------------------------------------------------------------
def register_train(subparsers: _Subparsers) -> None:
    """Add ``demur train`` to the ``demur`` command."""
    from demur.export.layers import ARCHITECTURES, POSTERIORS, SIGMA_PARAMS
    from demur.export.training import DEFAULTS, LR_SCHEDULES

    p = subparsers.add_parser(
        "train",
        help="train a variational network (digits demo, diabetes, or a CSV) and write a checkpoint",
        description="Train a variational network by ELBO and write DIR/checkpoint.pt and DIR/training.json.",
    )
    p.add_argument("--data", default="digits",
                   help="'digits' (postcode digits demo), 'diabetes', or a CSV path (default: digits)")
    p.add_argument("--target", help="the label column of a CSV")
    p.add_argument("--task", choices=("classification", "regression"), help="force the task of a CSV target")
    p.add_argument("--posterior", choices=POSTERIORS, default="radial")
    p.add_argument("--arch", choices=ARCHITECTURES, default="mlp")
    p.add_argument("--out", required=True, type=Path, help="output directory")
    p.add_argument("--epochs", type=int, default=DEFAULTS["epochs"])
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--prior-scale", type=float, default=DEFAULTS["prior_scale"])
    p.add_argument("--lr", type=float, default=DEFAULTS["lr"], help="Adam step size of the means")
    p.add_argument("--rho-lr", type=float, default=DEFAULTS["rho_lr"],
                   help=f"Adam step size of the sigma parameters (default {DEFAULTS['rho_lr']})")
    p.add_argument("--sigma-param", choices=SIGMA_PARAMS, default=DEFAULTS["sigma_param"],
                   help="sigma = softplus(rho) or exp(rho) ('log': steps relative to sigma, so the ELBO sets the "
                        f"spread; default {DEFAULTS['sigma_param']})")
    p.add_argument("--input-sigma-param", choices=SIGMA_PARAMS, default=DEFAULTS["input_sigma_param"],
                   help="sigma parameterisation of the first variational layer only (default: as --sigma-param)")
    p.add_argument("--input-rho-lr", type=float, default=DEFAULTS["input_rho_lr"],
                   help="Adam step size of the first variational layer's sigma parameters (default: as --rho-lr)")
    p.add_argument("--silent-inputs", choices=("learn", "prior", "energy"), default=DEFAULTS["silent_inputs"],
                   help="the first layer's weights on inputs that are 0 in every training row: trained like the "
                        "rest, set to their exact posterior, the prior ('prior'), or every input's weights moved toward the "
                        "prior by how little signal it carries in training ('energy'; default "
                        f"{DEFAULTS['silent_inputs']})")
    p.add_argument("--fit-temperature", action=argparse.BooleanOptionalAction, default=DEFAULTS["fit_temperature"],
                   help="fit a temperature for the predictive mean on the validation split and serve it "
                        f"(default {DEFAULTS['fit_temperature']})")
    p.add_argument("--init-spread", type=float, default=DEFAULTS["init_spread"],
                   help=f"initial posterior sd of each weight (default {DEFAULTS['init_spread']})")
    p.add_argument("--lr-schedule", choices=LR_SCHEDULES, default=DEFAULTS["lr_schedule"],
                   help="every step size kept ('constant') or decayed to 0 along a half cosine ('cosine'; "
                        f"default {DEFAULTS['lr_schedule']})")
    p.add_argument("--batch-size", type=int, default=DEFAULTS["batch_size"])
    p.add_argument("--kl-weight", type=float, default=DEFAULTS["kl_weight"],
                   help=f"temper the KL term (1 = plain ELBO; default {DEFAULTS['kl_weight']})")
    p.add_argument("--kl-warmup", type=float, default=DEFAULTS["kl_warmup"],
                   help="fraction of steps over which the KL weight ramps up from 0")
    p.add_argument("--hidden", type=_int_list, default=DEFAULTS["hidden"], help="MLP widths, e.g. 256,256")
    p.add_argument("--channels", type=_int_list, default=DEFAULTS["channels"], help="conv channels, e.g. 16,32")
    p.add_argument("--threads", type=int, default=DEFAULTS["threads"])
    p.add_argument("--members", type=int, default=1,
                   help="train this many networks (seeds SEED*M .. SEED*M+M-1) into one ensemble checkpoint; "
                        "exported, each member gives S // M draws of its own posterior (default 1)")
    p.add_argument("--prior-from", type=Path, metavar="CHECKPOINT",
                   help="continual update: start from this checkpoint's posterior and use it as the prior, training "
                        "on --data (the new rows) only; architecture, standardisation and labels come from the "
                        "checkpoint, an ensemble is updated member by member (README, 'Updating a model')")
    p.add_argument("--progress", action=argparse.BooleanOptionalAction, default=None,
                   help="show a progress bar (default: when stderr is a terminal)")
    p.set_defaults(func=_train)


def _int_list(text: str) -> tuple[int, ...]:
    try:
        values = tuple(int(v) for v in text.split(",") if v.strip())
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected comma-separated integers such as 256,256; got {text!r}") from None
    if not values or min(values) < 1:
        raise argparse.ArgumentTypeError(f"expected positive integers; got {text!r}")
    return values


def _train(args: argparse.Namespace) -> int:
    from demur.export.checkpoints import load_checkpoint
    from demur.export.datasets import load_dataset
    from demur.export.errors import LayerConfigError
    from demur.export.training import summary_line, train, train_ensemble

    ds = load_dataset(args.data, args.target, seed=args.seed, task=args.task)
    options = dict(arch=args.arch, posterior=args.posterior, epochs=args.epochs, seed=args.seed, out=args.out,
                   lr=args.lr, rho_lr=args.rho_lr, init_spread=args.init_spread, sigma_param=args.sigma_param,
                   input_sigma_param=args.input_sigma_param, input_rho_lr=args.input_rho_lr,
                   silent_inputs=args.silent_inputs,
                   fit_temperature=args.fit_temperature, lr_schedule=args.lr_schedule,
                   batch_size=args.batch_size, prior_scale=args.prior_scale, kl_weight=args.kl_weight,
                   kl_warmup=args.kl_warmup, hidden=args.hidden, channels=args.channels, threads=args.threads)
    members = args.members
    if args.prior_from is not None:
        old, _ = load_checkpoint(args.prior_from)
        members = len(old) if isinstance(old, list) else 1
        if args.members not in (1, members):
            raise LayerConfigError(f"--members {args.members} does not match the {members} network(s) of "
                                   f"--prior-from {args.prior_from}; leave --members out", field="members")
    if members == 1:
        print(summary_line(train(ds, progress=args.progress, prior_from=args.prior_from, **options)))
        return 0
    results = train_ensemble(ds, members, prior_from=args.prior_from, **options)
    for r in results:
        print("  member " + summary_line(r))
    t = json.loads((Path(args.out) / "training.json").read_text())["metrics"]["test"]
    print(f"ensemble of {members} ({results[0].meta['arch']['posterior']}), test split: "
          + ", ".join(f"{k} {v:.4g}" for k, v in t.items()) + f" -> {Path(args.out) / 'checkpoint.pt'}")
    return 0


# -- demur export ---------------------------------------------------------------------
def register_export(subparsers: _Subparsers) -> None:
    """Add ``demur export`` to the ``demur`` command."""
    from demur.export.exporter import DEFAULT_DRAWS, SUPPORT_CHOICES

    p = subparsers.add_parser(
        "export",
        help="turn a training checkpoint, or your own torch module, into a bundle (ONNX graphs + manifest)",
        description="Export DIR/checkpoint.pt (from 'demur train'), or your own module: --factory "
                    "pkg.module:function builds it, --weights loads its state_dict (torch.load with "
                    "weights_only=True), --data gives the training rows (CSV, --target names the label column).",
    )
    p.add_argument("checkpoint", type=Path, metavar="DIR", nargs="?", help="output directory of 'demur train'")
    p.add_argument("--out", required=True, type=Path, help="bundle directory to write")
    p.add_argument("--draws", type=int, default=DEFAULT_DRAWS, help=f"weight draws S (default {DEFAULT_DRAWS})")
    graph = p.add_mutually_exclusive_group()
    graph.add_argument("--sampler", action="store_true",
                       help="write the sampler graph (fresh draws per request) instead of stacked draws")
    graph.add_argument("--flip", action="store_true",
                       help="write the flip graph (fresh sign-flipped draws per request at close to stacked cost)")
    p.add_argument("--seed", type=int, default=None, help="seed of the stacked draws / recorded sampler seed")
    p.add_argument("--name", default=None, help="model name (default: the checkpoint's, or the factory's)")
    p.add_argument("--version", default=None, help="model version (default: 1)")
    p.add_argument("--support", choices=SUPPORT_CHOICES, default="rows",
                   help="what the support check stores: rows (default; with the stored centre and scale they give "
                        "back raw training rows), centroids (k-means, each the mean of >= 5 rows), none (no check)")
    own = p.add_argument_group("your own module")
    own.add_argument("--factory", metavar="MODULE:FUNCTION",
                     help="importable function returning the untrained torch module (a list: a deep ensemble)")
    own.add_argument("--weights", type=Path, help="state_dict saved with torch.save (a list of them for an ensemble)")
    own.add_argument("--data", type=Path, help="training rows (CSV with a header) for the input spec; its "
                                               "columns, in file order, are the model's inputs")
    own.add_argument("--target", help="label column of --data / --reference (excluded from the inputs)")
    own.add_argument("--reference", type=Path, help="held-out rows (CSV, the same columns in any order) for "
                                                    "the parity check and the default threshold (default: --data)")
    own.add_argument("--labels", help="comma-separated class names in output order (default: 0..K-1)")
    own.add_argument("--shape", help="comma-separated input shape per case, e.g. 1,8,8 (default: [F])")
    own.add_argument("--task", choices=("classification", "regression"), default="classification")
    own.add_argument("--target-stats", metavar="CENTER,SCALE|data|raw",
                     help="regression (required): how the model's target was standardised, y_std = (y - CENTER) / "
                          "SCALE; 'data': the mean and standard deviation (numpy, ddof 0) of the --target column "
                          "of --data; 'raw': the model predicts the target itself (0,1)")
    p.set_defaults(func=_export)


def _export(args: argparse.Namespace) -> int:
    from demur.export.exporter import export_bundle, export_factory

    kind = "flip" if args.flip else "sampler" if args.sampler else "stacked"
    if args.factory:
        if args.weights is None or args.data is None:
            raise ExportError("--factory needs --weights (the trained state_dict) and --data (the training rows)",
                              field="weights" if args.weights is None else "data")
        bundle = export_factory(
            args.factory, args.weights, args.data, args.out, target=args.target, reference=args.reference,
            shape=[int(v) for v in args.shape.split(",")] if args.shape else None,
            labels=[v.strip() for v in args.labels.split(",")] if args.labels else None, task=args.task,
            kind=kind, draws=args.draws, seed=args.seed, name=args.name, version=args.version,
            target_stats=args.target_stats, support=args.support)
    elif args.checkpoint is not None:
        bundle = export_bundle(args.checkpoint, args.out, kind=kind, draws=args.draws, seed=args.seed,
                               name=args.name, version=args.version, support=args.support)
    else:
        raise ExportError("give a checkpoint DIR from 'demur train', or --factory MODULE:FUNCTION with --weights "
                          "and --data for your own module", field="checkpoint")
    m = bundle.manifest
    sizes = ", ".join(f"{k}.onnx {bundle.graph_path(k).stat().st_size / 1e6:.2f} MB" for k in m.graphs)
    print(f"wrote {bundle.path}: {m.model_name} v{m.model_version} ({m.posterior['family']}), {kind} graph with "
          f"{m.graphs[kind].draws} draws ({sizes}); default threshold {m.decision.score} > "
          f"{m.decision.threshold:.4f} (uncalibrated); checksum {bundle.checksum[:12]}")
    how = m.raw["graphs"][kind].get("computation")
    if how:  # where the draws enter, or why the whole network runs once per draw
        print(f"  {kind} graph: {how}")
    return 0


# -- demur calibrate ------------------------------------------------------------------
def register_calibrate(subparsers: _Subparsers) -> None:
    """Add ``demur calibrate`` (see export/calibration.py's docstring)."""
    from demur.export import calibration

    p = subparsers.add_parser(
        "calibrate",
        help="choose the abstention threshold on your labelled held-out data, with a guarantee",
        description=calibration.__doc__.split("\n\n")[1] if calibration.__doc__ else None,
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
                   help="leave out rows clearly copied from the training data (with a warning) instead of refusing "
                        "the file; natural duplicates of discrete features are kept either way")
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
    p.set_defaults(func=_calibrate)


def _calibrate(args: argparse.Namespace) -> int:
    from demur.serve.offline.report import decision_lines

    from demur.export.calibration import calibrate_file

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


# -- demur evaluate -------------------------------------------------------------------
def register_evaluate(subparsers: _Subparsers) -> None:
    """Add ``demur evaluate`` to the ``demur`` command."""
    from demur.export.evaluation import ENSEMBLE_MEMBERS

    p = subparsers.add_parser(
        "evaluate", help="measure whether the abstention flag is worth having, on labelled held-out data",
        description="Referral, shift and held-out-class tables for a bundle (JSON, PNG plots, index.html).")
    p.add_argument("bundle", metavar="BUNDLE")
    p.add_argument("--data", required=True,
                   help="a labelled CSV (every row is evaluated; columns by name) or 'digits' / 'diabetes' (its "
                        "test split)")
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
    p.set_defaults(func=_evaluate)


def _evaluate(args: argparse.Namespace) -> int:
    from demur.export.evaluation import evaluate_file

    figures = evaluate_file(args.bundle, args.data, out=args.out, target=args.target, ignore=args.ignore or (),
                            seed=args.seed, baseline=args.baseline, train=args.train,
                            holdout_class=args.holdout_class, unseen=args.unseen, unseen_label=args.unseen_label)
    for note in figures["notes"]:
        print(note)
    if figures.get("task") == "regression":  # its own tables (serve/offline/regression.py)
        from demur.serve.offline.regression import regression_lines

        print("\n".join(regression_lines(figures)) + f"\nwrote {args.out / 'index.html'}")
        return 0
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


# -- demur bench ----------------------------------------------------------------------
def register_bench(subparsers: _Subparsers) -> None:
    """Add ``demur bench`` to the ``demur`` command."""
    p = subparsers.add_parser("bench", help="measure demur against the obvious alternatives (prints ratios)",
                              description="Engine-level and HTTP benchmark on this machine; writes a JSON file "
                                          "and prints a table. --quick finishes in about a minute.")
    p.add_argument("--quick", action="store_true", help="fewer repeats, S = 32 only, short HTTP runs")
    p.add_argument("--checkpoint", type=Path, default=None, help="a trained MLP checkpoint directory "
                   "(default: the untrained 64-256-256-10 radial MLP)")
    p.add_argument("--out", type=Path, default=Path("build/bench/bench.json"),
                   help="JSON result (default build/bench/bench.json; never tracked)")
    p.add_argument("--table", type=Path, default=None, help="also write the printed table to this file")
    p.add_argument("--no-http", action="store_true", help="skip the HTTP section")
    p.add_argument("--workdir", type=Path, default=None, help="keep bundles and server logs here")
    p.set_defaults(func=_bench)


def _bench(args: argparse.Namespace) -> int:
    from demur.export.bench.engine import format_table, run_bench, save_result

    result = run_bench(quick=args.quick, checkpoint=args.checkpoint, http=not args.no_http, workdir=args.workdir,
                       log=lambda m: print(m, file=sys.stderr, flush=True))
    save_result(result, args.out)
    table = format_table(result)
    print(table)
    if args.table:
        args.table.parent.mkdir(parents=True, exist_ok=True)
        args.table.write_text(table + "\n")
    return 0
