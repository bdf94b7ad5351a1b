"""Checkpoint -> bundle, and ``demur export``.

``export_bundle`` rebuilds the trained network from its checkpoint, builds
one sampling graph (``stacked``: S pre-drawn weight sets; ``sampler``:
fresh noise per call; ``flip``: fresh sign-flipped draws, see export/flip.py)
plus the ``means`` graph, and writes the manifest
through ``demur.serve.core.bundle.write_bundle`` (the runtime owns the schema).

Two manifest sections are computed through the exact serving path
(``demur.serve.adapters.engine.Engine`` -> ``demur.serve.core.summary.summarise`` ->
``demur.serve.core.decision.score_values``) on the checkpoint's validation split:

* ``decision.threshold``: an UNCALIBRATED default, the 90th percentile of the
  validation mutual information (so roughly 10% of in-distribution cases
  would abstain; a rule of thumb, not a guarantee). ``demur calibrate``
  replaces it with a threshold that carries a guarantee; until then
  ``decision.calibration`` is ``null`` and ``decision.basis`` says how the
  default was chosen.
* ``drift_reference.score``: the same validation scores, the reference the
  drift monitor compares live scores with (``demur.serve.core.drift.score_reference``).

A bundle is never half-written: everything goes into a temporary directory
next to ``out`` that is renamed into place only once the finished bundle has
loaded and verified. An existing bundle at ``out`` is replaced; any other
non-empty directory there is refused.

Example::

    bundle = export_bundle("runs/digits", "build/digits-stacked", kind="stacked", draws=32)
    bundle.manifest.graphs["stacked"].draws    # 32
"""

from __future__ import annotations

import argparse
import secrets
import shutil
import tempfile
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import onnx

from demur.serve.core.bundle import MANIFEST, Bundle, load_bundle, write_bundle
from demur.serve.core.decision import score_values
from demur.serve.core.drift import feature_reference, score_reference
from demur.serve.core.fingerprint import training_fingerprint
from demur.serve.adapters.engine import Engine
from demur.serve.core.summary import summarise
from demur.serve.core.support import support_record

from demur.export.errors import ExportError, GraphBuildError
from demur.export.graphs import SEED_MODULUS, NetworkPlan, means_graph, plan_from_model, sampler_graph, stacked_graph

__all__ = [
    "DEFAULT_DRAWS",
    "DEFAULT_SCORE",
    "EXPORT_KINDS",
    "INTERVAL_LEVEL",
    "THRESHOLD_QUANTILE",
    "bundle_from_model",
    "export_bundle",
    "register",
]

EXPORT_KINDS = ("stacked", "sampler", "flip")
"""Sampling graphs ``export_bundle`` can write (the means graph always comes along)."""

DEFAULT_DRAWS = 32
"""S, weight draws per request (stacked sets, or fresh draws per sampler call)."""

DEFAULT_SCORE = "mutual_information"
"""The decision score written into new bundles (BALD mutual information, nats)."""

THRESHOLD_QUANTILE = 0.9
"""Quantile of validation scores used as the uncalibrated default threshold (rule of thumb)."""

INTERVAL_LEVEL = 0.9
"""Central probability of served intervals."""


def export_bundle(
    checkpoint_dir: str | Path,
    out: str | Path,
    *,
    kind: str = "stacked",
    draws: int = DEFAULT_DRAWS,
    seed: int | None = None,
    name: str | None = None,
    version: str | None = None,
) -> Bundle:
    """Turn the checkpoint in ``checkpoint_dir`` into a verified bundle at ``out``.

    ``kind``: "stacked" or "sampler"; ``draws``: S; ``seed``: the stacked
    draws / the sampler's recorded seed (``None``: a random one, recorded in
    the manifest). ``name``/``version`` default to the checkpoint's name and "1".
    """
    from demur.export.datasets import load_dataset
    from demur.export.training import load_checkpoint

    model, meta = load_checkpoint(checkpoint_dir)
    data = meta.get("data", {})
    dataset = load_dataset(data.get("source", "digits"), data.get("target"), seed=int(data.get("seed", 0)),
                           task=meta["task"])
    arch = meta.get("arch", {})
    return bundle_from_model(
        model,
        out,
        task=meta["task"],
        labels=list(meta["labels"]),
        inputs=meta["inputs"],
        target=meta.get("target"),
        kind=kind,
        draws=draws,
        seed=seed,
        name=name or str(meta.get("name", Path(checkpoint_dir).name)),
        version=version or "1",
        prior_scale=float(arch.get("prior_scale", 1.0)),
        arch=str(arch.get("kind", "")),
        drift_features=meta.get("drift_features"),
        reference_x=dataset.x_val,
        training_x=dataset.x_train,
        extensions={"training": {"metrics": meta.get("metrics", {}), "data": data},
                    "training_rows": training_fingerprint(dataset.x_train)},  # leakage check in calibrate
    )


def bundle_from_model(
    model: Any,
    out: str | Path,
    *,
    task: str,
    labels: Sequence[str],
    inputs: Mapping[str, Any],
    reference_x: np.ndarray,
    target: Mapping[str, float] | None = None,
    kind: str = "stacked",
    draws: int = DEFAULT_DRAWS,
    seed: int | None = None,
    name: str = "model",
    version: str = "1",
    prior_scale: float = 1.0,
    arch: str = "",
    drift_features: Mapping[str, Any] | None = None,
    extensions: Mapping[str, Any] | None = None,
    training_x: np.ndarray | None = None,
) -> Bundle:
    """Write a bundle for an in-memory variational ``nn.Sequential`` (``export_bundle`` and test fixtures).

    ``inputs`` is the bundle's input spec (names, shape, center, scale, low,
    high); ``reference_x``: raw held-out inputs float[N, F] for the default
    threshold and the score reference; ``drift_features`` defaults to the
    feature reference of ``reference_x``; ``training_x``: the raw training inputs, for the
    support check (``demur.serve.core.support``; its threshold is set on ``reference_x``).
    Without them the bundle carries no support check.
    """
    if kind not in EXPORT_KINDS:
        raise ExportError(f"kind must be one of {', '.join(EXPORT_KINDS)}; got '{kind}'", field="kind")
    if not isinstance(draws, int) or isinstance(draws, bool) or draws < 1:
        raise ExportError(f"draws must be a positive integer; got {draws!r}", field="draws")
    seed = secrets.randbelow(SEED_MODULUS) if seed is None else int(seed) % SEED_MODULUS
    out = Path(out)
    _check_target(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    plan = plan_from_model(model, inputs["shape"])
    reference_x = np.asarray(reference_x, dtype=np.float64).reshape(len(reference_x), -1)
    tmp = Path(tempfile.mkdtemp(dir=out.parent, prefix=f".{out.name}.partial-"))
    try:
        graphs = _write_graphs(model, plan, tmp, kind, draws, seed)
        fields: dict[str, Any] = {
            "model_name": name,
            "model_version": str(version),
            "task": task,
            "labels": [str(v) for v in labels],
            "inputs": dict(inputs),
            "posterior": {"family": plan.posterior, "prior_scale": float(prior_scale),
                          "params": plan.parameter_count, "arch": arch},
            "graphs": graphs,
            "interval_level": INTERVAL_LEVEL,
            "target": dict(target) if target else {"center": 0.0, "scale": 1.0},
            "extensions": dict(extensions or {}),
        }
        # First pass with a placeholder rule, so the serving engine can run the graphs.
        draft = write_bundle(tmp, decision={"score": DEFAULT_SCORE, "threshold": 0.0}, **fields)
        scores = _reference_scores(draft, reference_x)
        threshold = float(np.quantile(scores, THRESHOLD_QUANTILE))
        decision = {
            "score": DEFAULT_SCORE,
            "threshold": threshold,
            "calibration": None,
            "basis": f"uncalibrated default: {THRESHOLD_QUANTILE:.0%} quantile of {len(scores)} validation "
                     f"{DEFAULT_SCORE} values; run 'demur calibrate' for a threshold with a guarantee",
        }
        drift = {
            "features": dict(drift_features) if drift_features else feature_reference(reference_x),
            "score": score_reference(DEFAULT_SCORE, scores),
        }
        support = None if training_x is None else support_record(training_x, reference_x, dict(inputs))
        write_bundle(tmp, decision=decision, drift_reference=drift, support=support, **fields)
        load_bundle(tmp)  # verify the finished directory before it becomes visible
        _swap_into_place(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return load_bundle(out)


def _check_target(out: Path) -> None:
    if out.exists() and (not out.is_dir() or (any(out.iterdir()) and not (out / MANIFEST).is_file())):
        raise ExportError(f"{out} exists and is not a demur bundle; choose another --out or remove it",
                          field="out")


def _write_graphs(model: Any, plan: NetworkPlan, root: Path, kind: str, draws: int, seed: int) -> dict[str, Any]:
    """Write the sampling graph and the means graph; return the manifest's ``graphs`` section."""
    if kind == "stacked":
        import torch

        from demur.export.layers import sample_network

        sets = sample_network(model, draws, torch.Generator().manual_seed(seed))
        graph = stacked_graph(plan, sets)
    elif kind == "flip":
        from demur.export.flip import flip_graph  # fresh sign-flipped draws per call (export/flip.py)

        graph = flip_graph(plan, draws, seed)
    else:
        graph = sampler_graph(plan, draws, seed)
    files = {kind: (graph, draws, seed), "means": (means_graph(plan), 1, None)}
    section: dict[str, Any] = {}
    for k, (proto, s, sd) in files.items():
        path = root / f"{k}.onnx"
        try:
            onnx.save_model(proto, str(path), save_as_external_data=False)
        except ValueError as exc:  # protobuf refuses models over 2 GB
            raise GraphBuildError(f"could not write the {k} graph: {exc}", field="graph") from exc
        section[k] = {"file": path.name, "draws": s, **({"seed": sd} if sd is not None else {})}
    return section


def _reference_scores(bundle: Bundle, x_raw: np.ndarray) -> np.ndarray:
    """Decision scores of held-out raw inputs, computed as the server would (float64[N])."""
    m = bundle.manifest
    seed = next((m.graphs[k].seed for k in ("sampler", "flip") if k in m.graphs), None)
    engine = Engine(bundle, graph="auto", seed=seed).load()
    out = []
    for start in range(0, len(x_raw), 256):
        summary = summarise(m.task, engine.run(x_raw[start:start + 256]), m.interval_level, m.target)
        out.append(score_values(summary, DEFAULT_SCORE))
    return np.concatenate(out)


def _swap_into_place(tmp: Path, out: Path) -> None:
    """Rename ``tmp`` to ``out``; an old bundle there is moved aside first and removed after."""
    old = None
    if out.exists():
        old = Path(tempfile.mkdtemp(dir=out.parent, prefix=f".{out.name}.old-"))
        old.rmdir()
        out.rename(old)
    try:
        tmp.rename(out)
    except BaseException:
        if old is not None:
            old.rename(out)
        raise
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


# -- command line -------------------------------------------------------------
def register(subparsers: argparse._SubParsersAction) -> None:
    """Add ``demur export`` to the ``demur`` command."""
    p = subparsers.add_parser(
        "export",
        help="turn a training checkpoint into a bundle (ONNX graphs + manifest)",
        description="Export DIR/checkpoint.pt as a bundle: stacked weight draws (default) or an "
                    "in-graph sampler, plus the deterministic means graph.",
    )
    p.add_argument("checkpoint", type=Path, metavar="DIR", help="output directory of 'demur train'")
    p.add_argument("--out", required=True, type=Path, help="bundle directory to write")
    p.add_argument("--draws", type=int, default=DEFAULT_DRAWS, help=f"weight draws S (default {DEFAULT_DRAWS})")
    graph = p.add_mutually_exclusive_group()
    graph.add_argument("--sampler", action="store_true",
                       help="write the sampler graph (fresh draws per request) instead of stacked draws")
    graph.add_argument("--flip", action="store_true",
                       help="write the flip graph (fresh sign-flipped draws per request at close to stacked "
                            "cost; linear layers only)")
    p.add_argument("--seed", type=int, default=None, help="seed of the stacked draws / recorded sampler seed")
    p.add_argument("--name", default=None, help="model name (default: the checkpoint's)")
    p.add_argument("--version", default=None, help="model version (default: 1)")
    p.set_defaults(func=_run)


def _run(args: argparse.Namespace) -> int:
    kind = "flip" if args.flip else "sampler" if args.sampler else "stacked"
    bundle = export_bundle(args.checkpoint, args.out, kind=kind, draws=args.draws, seed=args.seed,
                           name=args.name, version=args.version)
    m = bundle.manifest
    sizes = ", ".join(f"{k}.onnx {bundle.graph_path(k).stat().st_size / 1e6:.2f} MB" for k in m.graphs)
    print(f"wrote {bundle.path}: {m.model_name} v{m.model_version}, {kind} graph with "
          f"{m.graphs[kind].draws} draws ({sizes}); default threshold {m.decision.score} > "
          f"{m.decision.threshold:.4f} (uncalibrated); checksum {bundle.checksum[:12]}")
    return 0
