"""Any torch module -> bundle (``export_model``), checkpoint -> bundle, and ``demur export``.

``export_model`` is the public way in (README, "Your own model")::

    from demur.export import export_model, input_spec
    spec = input_spec(X_train, names=feature_names)          # standardisation, range, drift reference
    bundle = export_model(model, "build/parcels", inputs=spec, labels=["0", ..., "9"],
                          kind="sampler", reference=X_held_out)

``model`` is any ``torch.nn.Module`` whose variational layers are demur's
(``VariationalLinear``/``VariationalConv2d``) and whose other layers torch can
export to ONNX; or a module with ``nn.Dropout`` and no variational layers (MC
dropout); or a list of modules (a deep ensemble: one draw per plain member,
S // M posterior draws per variational member, export/draws.py). How
the draws run is export/draws.py; how they become ONNX is export/graphs.py.

Never a silent mis-export. Before a bundle is sealed: the model must accept
``[B, *inputs.shape]``; its output width must equal the number of labels
(classification) or 2 (regression: mean, log-variance); and every graph,
run in onnxruntime on the standardised reference inputs, must equal the
torch module run once per draw with the same draws (same fed noise, same
stored weights or masks; the means graph against the posterior means) to
within ``PARITY_TOLERANCE`` relative, else ``GraphBuildError`` names the
largest difference.

Two manifest sections are computed through the exact serving path
(``Engine`` -> ``summarise`` -> ``score_values``) on the reference inputs:

* ``decision.threshold``: an UNCALIBRATED default, the 90th percentile of the
  reference mutual information (a rule of thumb, not a guarantee);
  ``demur calibrate`` replaces it; until then ``decision.calibration`` is
  ``null`` and ``decision.basis`` says how the default was chosen.
* ``drift_reference.score``: the same reference scores.

A bundle is never half-written: everything goes into a temporary directory
next to ``out`` that is renamed into place only once the finished bundle has
loaded and verified. An existing bundle at ``out`` is replaced; any other
non-empty directory there is refused.
"""

from __future__ import annotations

import importlib
import os
import secrets
import shutil
import sys
import tempfile
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from demur.serve.core.bundle import FRESH_KINDS, GRAPH_KINDS, MANIFEST, Bundle, load_bundle, write_bundle
from demur.serve.core.noise import SEED_MODULUS
from demur.serve.core.decision import score_values
from demur.serve.core.drift import feature_reference, score_reference
from demur.serve.core.fingerprint import training_fingerprint
from demur.serve.adapters.engine import Engine
from demur.serve.core.summary import summarise
from demur.serve.core.support import standardisation, support_record
from demur.serve.offline.chunked import chunks

from demur.export.datasets import read_features, read_labelled, read_training_columns
from demur.export.errors import ExportError, GraphBuildError

__all__ = [
    "DEFAULT_DRAWS",
    "DEFAULT_SCORE",
    "EXPORT_KINDS",
    "INTERVAL_LEVEL",
    "PARITY_TOLERANCE",
    "SUPPORT_CHOICES",
    "SUPPORT_SAMPLE",
    "TrainingRows",
    "training_data_statement",
    "training_rows",
    "THRESHOLD_QUANTILE",
    "Inputs",
    "export_bundle",
    "export_factory",
    "export_model",
    "input_spec",
    "target_standardisation",
]

EXPORT_KINDS = tuple(kind for kind in GRAPH_KINDS if kind != "means")
"""Sampling graphs ``export_model`` can write (the means graph always comes along)."""

DEFAULT_DRAWS = 32
"""S, weight draws per request (stacked sets, or fresh draws per sampler/flip call)."""

DEFAULT_SCORE = "mutual_information"
"""The decision score written into new bundles (BALD mutual information, nats)."""

THRESHOLD_QUANTILE = 0.9
"""Quantile of reference scores used as the uncalibrated default threshold (rule of thumb)."""

INTERVAL_LEVEL = 0.9
"""Central probability of served intervals."""

PARITY_TOLERANCE = 1e-4
"""Largest allowed |onnx - torch| / max(|torch|, 1) over every draw, case and output."""

SUPPORT_CHOICES = ("rows", "centroids", "none")  # what the support check stores (serve/core/support.py)

SUPPORT_SAMPLE = 20_000
"""Training rows kept for the support check (it stores its own smaller sample in the manifest)."""

PARITY_ROWS = 256
"""Reference rows the parity check runs (the first ones)."""


@dataclass(frozen=True)
class TrainingRows:
    """What the bundle keeps of the training rows: their fingerprint (hashes only, for
    calibrate's leakage check, serve/core/fingerprint.py) and a sample of at most
    ``SUPPORT_SAMPLE`` raw rows the support check measures distances to (serve/core/support.py)."""

    fingerprint: dict[str, Any]
    sample: np.ndarray = field(repr=False)


def training_rows(x_train: Any, seed: int = 0) -> TrainingRows:
    """What a bundle keeps of raw training rows ``x_train`` float[N, F] (for ``Inputs.training``)."""
    x = np.asarray(x_train, dtype=np.float64)
    x = x.reshape(len(x), -1)
    keep = x if len(x) <= SUPPORT_SAMPLE else x[np.random.default_rng(seed).choice(len(x), SUPPORT_SAMPLE,
                                                                                   replace=False)]
    return TrainingRows(fingerprint=training_fingerprint(x), sample=keep)


@dataclass(frozen=True)
class Inputs:
    """What ``input_spec`` returns: the manifest's ``inputs`` section, the training rows'
    per-feature drift reference (``demur.serve.core.drift.feature_reference``) and what the
    bundle keeps of the training rows (``TrainingRows``; None: no support or leakage check)."""

    spec: dict[str, Any]
    drift_features: dict[str, Any] | None = field(default=None, repr=False)
    training: TrainingRows | None = field(default=None, repr=False)

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(int(d) for d in self.spec["shape"])

    def standardise(self, x: Any) -> np.ndarray:
        """Raw rows float[N, F] -> float32[N, *shape], (x - center) / scale: what the graphs see,
        so train on this."""
        x = np.asarray(x, dtype=np.float64).reshape(len(x), -1)
        z = (x - np.asarray(self.spec["center"])) / np.asarray(self.spec["scale"])
        return z.astype(np.float32).reshape(len(x), *self.shape)


def input_spec(x_train: Any, names: Sequence[str] | None = None, shape: Sequence[int] | None = None, *,
               kind: str | None = None) -> Inputs:
    """The input spec of a model trained on ``x_train`` float[N, F] (or [N, *shape]).

    Standardisation: center = the training mean, scale = the training std with a floor
    (``demur.serve.core.support.standardisation``: a near-constant feature cannot turn a
    small change into a huge z-score); the served graphs see (x - center) / scale, so train
    on ``Inputs.standardise(x)``. The training rows' fingerprint and a sample of them go
    with the spec, for the support check and calibrate's leakage check.
    low/high: the training range of each feature (shown to reviewers); the
    drift reference: ``feature_reference(x_train)``. ``names`` default
    ``x0..x{F-1}``; ``shape`` defaults to [F] (give [C, H, W] for a conv net);
    ``kind`` "image" or "tabular" (default: image when ``shape`` has > 1 axis).
    """
    x = np.asarray(x_train, dtype=np.float64)
    if x.ndim < 2 or x.shape[0] < 2:
        raise ExportError(f"x_train must be [N, F] with N >= 2 rows; got shape {list(x.shape)}", field="x_train")
    x = x.reshape(len(x), -1)
    if not np.isfinite(x).all():
        raise ExportError("x_train has NaN or infinite values; clean the training rows first", field="x_train")
    n_features = x.shape[1]
    dims = [n_features] if shape is None else [int(d) for d in shape]
    if int(np.prod(dims)) != n_features or min(dims) < 1:
        raise ExportError(f"shape {dims} must hold {n_features} features (the columns of x_train)", field="shape")
    labels = [f"x{i}" for i in range(n_features)] if names is None else [str(v) for v in names]
    if len(labels) != n_features:
        raise ExportError(f"names must have {n_features} entries (the columns of x_train); got {len(labels)}",
                          field="names")
    kind = kind or ("image" if len(dims) > 1 else "tabular")
    center, scale = standardisation(x, shared_units=kind == "image")
    spec = {
        "names": labels,
        "shape": dims,
        "dtype": "float32",
        "center": [float(v) for v in center],
        "scale": [float(v) for v in scale],
        "low": [float(v) for v in x.min(axis=0)],
        "high": [float(v) for v in x.max(axis=0)],
        "kind": kind,
    }
    return Inputs(spec=spec, drift_features=feature_reference(x), training=training_rows(x))


def export_model(
    model: Any,
    out: str | Path,
    *,
    inputs: Inputs | Mapping[str, Any],
    labels: Sequence[str] | None = None,
    task: str = "classification",
    kind: str = "stacked",
    draws: int = DEFAULT_DRAWS,
    reference: Any = None,
    name: str | None = None,
    version: str = "1",
    seed: int | None = None,
    target: Mapping[str, float] | None = None,
    extensions: Mapping[str, Any] | None = None,
    support: str = "rows",
) -> Bundle:
    """Write a verified bundle for ``model`` at ``out``; see the module docstring for what is checked.

    ``inputs``: ``input_spec(...)`` (or a manifest ``inputs`` dict). ``labels``:
    class names, default "0".."K-1" (classification); the target's name
    (regression, default "y"). ``task``: "classification" (logits [B, K]) or
    "regression" (mean and log-variance [B, 2] in standardised target units,
    ``target`` = {"center", "scale"} of the target). ``kind``: the sampling
    graph, one of ``EXPORT_KINDS`` (a deep ensemble is always "stacked").
    ``draws``: S (an ensemble: one per plain member; variational members
    ``draws // M`` each, the manifest's ``posterior.draws_per_member``). ``reference``: held-out raw
    inputs float[N, F] for the parity check, the default threshold and the
    score reference (None: 64 cases uniform over the training range, a
    placeholder until ``demur calibrate``). ``seed``: the stacked draws and
    the recorded seed of fresh-draw graphs (None: a random one, recorded).
    ``extensions``: extra manifest sections kept verbatim. ``support``: what the support check stores
    (``SUPPORT_CHOICES``; "none": no check); ``extensions.training_data`` lists what the manifest holds.
    """
    if kind not in EXPORT_KINDS:
        raise ExportError(f"kind must be one of {', '.join(EXPORT_KINDS)}; got '{kind}'", field="kind")
    if not isinstance(draws, int) or isinstance(draws, bool) or draws < 1:
        raise ExportError(f"draws must be a positive integer; got {draws!r}", field="draws")
    if task not in ("classification", "regression"):
        raise ExportError(f"task must be 'classification' or 'regression'; got '{task}'", field="task")
    if isinstance(model, (list, tuple)) and kind != "stacked":
        raise ExportError(f"a deep ensemble (a list of modules) has its draws fixed at export: export it with "
                          f"kind='stacked'; got '{kind}'", field="kind")
    if support not in SUPPORT_CHOICES:
        raise ExportError(f"support must be one of {', '.join(SUPPORT_CHOICES)}; got {support!r}", field="support")
    seed = secrets.randbelow(SEED_MODULUS) if seed is None else int(seed) % SEED_MODULUS
    spec_in = inputs if isinstance(inputs, Inputs) else Inputs(spec=dict(inputs))
    spec = dict(spec_in.spec)
    size = int(np.prod(spec["shape"]))
    ref, placeholder = _reference_rows(reference, spec, size)
    out = Path(out)
    _check_target(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(dir=out.parent, prefix=f".{out.name}.partial-"))
    try:
        graphs, net = _write_checked_graphs(model, tmp, kind, draws, seed, spec, task, ref)
        k_out = _output_width(net)
        labels = _labels(labels, task, k_out)
        fields: dict[str, Any] = {
            "model_name": name or "model",
            "model_version": str(version),
            "task": task,
            "labels": labels,
            "inputs": spec,
            "graphs": graphs,
            "interval_level": INTERVAL_LEVEL,
            "target": dict(target) if target else {"center": 0.0, "scale": 1.0},
            **_manifest_extras(net, model, extensions, spec_in.training),
        }
        # First pass with a placeholder rule, so the serving engine can run the graphs.
        draft = write_bundle(tmp, decision={"score": DEFAULT_SCORE, "threshold": 0.0}, **fields)
        scores = _reference_scores(draft, ref)
        threshold = float(np.quantile(scores, THRESHOLD_QUANTILE))
        where = ("placeholder cases drawn uniformly over the training range (no reference given)" if placeholder
                 else "reference")
        decision = {
            "score": DEFAULT_SCORE,
            "threshold": threshold,
            "calibration": None,
            "basis": f"uncalibrated default: {THRESHOLD_QUANTILE:.0%} quantile of {len(scores)} {where} "
                     f"{DEFAULT_SCORE} values; run 'demur calibrate' for a threshold with a guarantee",
        }
        drift = {
            "features": spec_in.drift_features or feature_reference(ref),
            "score": score_reference(DEFAULT_SCORE, scores),
        }
        # The support check's threshold needs held-out in-distribution rows: without a
        # reference there is none to set it on, and the bundle says it carries no check.
        check = (support_record(spec_in.training.sample, ref, spec, summary=support)
                 if spec_in.training is not None and not placeholder and support != "none" else None)
        fields["extensions"]["training_data"] = training_data_statement(fields, drift, check)
        write_bundle(tmp, decision=decision, drift_reference=drift, support=check, **fields)
        load_bundle(tmp)  # verify the finished directory before it becomes visible
        _swap_into_place(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return load_bundle(out)


def _manifest_extras(net: Any, model: Any, extensions: Mapping[str, Any] | None,
                     training: TrainingRows | None) -> dict[str, Any]:
    """The manifest sections that describe the model rather than the export: ``posterior`` and
    ``extensions`` (with the training rows' fingerprint when known). The one place to add a
    field computed at export."""
    from demur.export.layers import variational_layers

    posterior: dict[str, Any] = {"family": net.family, "params": net.parameter_count()}
    members = list(model) if isinstance(model, (list, tuple)) else [model]
    posterior["arch"] = type(members[0]).__name__
    layers = [lay for m in members for lay in variational_layers(m)] if net.family != "ensemble" else []
    if layers:
        scales = sorted({float(lay.prior_scale) for lay in layers})
        posterior["prior_scale"] = scales[0] if len(scales) == 1 else scales
    if net.family == "ensemble":
        posterior["members"] = len(members)
        posterior["draws_per_member"] = net.per_member
        if net.member_families():  # a mixture of the members' variational posteriors
            posterior["member_family"] = "+".join(net.member_families())
    if net.family == "mc_dropout":
        posterior["dropout"] = [float(d.p) for d in net.dropouts] or None
    ext = dict(extensions or {})
    if training is not None:
        ext["training_rows"] = training.fingerprint  # calibrate's leakage check
    return {"posterior": posterior, "extensions": ext}


def training_data_statement(fields: Mapping[str, Any], drift: Mapping[str, Any],
                            check: Mapping[str, Any] | None) -> list[dict[str, str]]:
    """The manifest's ``extensions.training_data``: what it holds derived from the training inputs."""
    items = [("inputs.center, inputs.scale, inputs.low, inputs.high", "per-feature mean, floored standard "
              "deviation, minimum and maximum of the training inputs")]
    if drift.get("features"):
        items.append(("drift_reference.features", "per-feature quantile bin edges and bin shares of the training inputs"))
    if "training_rows" in fields["extensions"]:
        items.append(("extensions.training_rows", "64-bit hashes of the training rows (calibrate's leakage check): no "
                      "row can be rebuilt from them, but they confirm whether a given row was trained on"))
    items.append(("support.sample", check["stored"]["note"]) if check is not None else ("support", "none: no check"))
    return [{"where": where, "what": what} for where, what in items]


def _reference_rows(reference: Any, spec: Mapping[str, Any], size: int) -> tuple[np.ndarray, bool]:
    """Raw reference rows float64[N, F]; a uniform placeholder over the training range if None."""
    if reference is None:
        rng = np.random.default_rng(0)
        return rng.uniform(spec["low"], spec["high"], size=(64, size)), True
    ref = np.asarray(reference, dtype=np.float64)
    if ref.ndim < 2 or len(ref) < 1:
        raise ExportError(f"reference must be [N, {size}] raw inputs; got shape {list(ref.shape)}",
                          field="reference")
    ref = ref.reshape(len(ref), -1)
    if ref.shape[1] != size:
        raise ExportError(f"reference must have {size} columns (prod of inputs.shape {list(spec['shape'])}); "
                          f"got {ref.shape[1]}", field="reference")
    if not np.isfinite(ref).all():
        raise ExportError("reference has NaN or infinite values", field="reference")
    return ref, False


def _labels(labels: Sequence[str] | None, task: str, k_out: int) -> list[str]:
    if task == "regression":
        if k_out != 2:
            raise GraphBuildError(f"a regression model must output 2 values per case (mean, log-variance); "
                                  f"this one outputs {k_out}", field="model")
        names = ["y"] if labels is None else [str(v) for v in labels]
        if len(names) != 1:
            raise ExportError(f"a regression model takes one label (the target's name); got {len(names)}",
                              field="labels")
        return names
    names = [str(i) for i in range(k_out)] if labels is None else [str(v) for v in labels]
    if len(names) != k_out:
        raise ExportError(f"the model outputs {k_out} logits per case but {len(names)} labels were given; "
                          "the output width must equal the number of labels", field="labels")
    if len(set(names)) != len(names) or k_out < 2:
        raise ExportError(f"labels must be at least 2 distinct names; got {names}", field="labels")
    return names


def _output_width(net: Any) -> int:
    import torch

    with torch.no_grad():
        return int(net(torch.zeros((1, *net.input_shape)), *(torch.ones(s.shape) for s in net.noise)).shape[-1])


def _write_checked_graphs(model: Any, root: Path, kind: str, draws: int, seed: int, spec: Mapping[str, Any],
                          task: str, ref: np.ndarray) -> tuple[dict[str, Any], Any]:
    """Export the sampling graph and the means graph, each checked against torch; return the
    manifest's ``graphs`` section and the sampling ``DrawNetwork``."""
    from demur.export.draws import DrawNetwork
    from demur.export.graphs import export_graph
    from demur.export.shared import SharedComputationNotice

    shape = tuple(int(d) for d in spec["shape"])
    x_std = ((ref[:PARITY_ROWS] - np.asarray(spec["center"])) / np.asarray(spec["scale"]))
    x_std = x_std.astype(np.float32).reshape(-1, *shape)
    section: dict[str, Any] = {}
    main_net = None
    for graph in (kind, "means"):
        net = DrawNetwork(model, graph, draws, seed=seed, input_shape=shape, task=task)
        _check_accepts(net, shape)
        path = root / f"{graph}.onnx"
        export_graph(net, path, name=graph)
        _check_parity(net, path, x_std, seed, graph)
        section[graph] = {"file": path.name, "draws": net.S, **({"seed": seed} if graph != "means" else {}),
                          "computation": net.computation}
        if net.fell_back:  # the graph is right, but the whole network runs S times per case: say so
            warnings.warn(f"the {graph} graph runs the whole network once per draw, not the draw-free part once: "
                          f"{net.computation.split(': ', 1)[-1]}", SharedComputationNotice, stacklevel=3)
        main_net = main_net or net
    return section, main_net


def _check_accepts(net: Any, shape: tuple[int, ...]) -> None:
    import torch

    try:
        with torch.no_grad():
            net(torch.zeros((2, *shape)), *(torch.ones(s.shape) for s in net.noise))
    except GraphBuildError:
        raise
    except Exception as exc:  # whatever the user's forward raises on the declared shape
        raise GraphBuildError(f"the model does not accept inputs of shape [B, {', '.join(map(str, shape))}] "
                              f"(inputs.shape): {type(exc).__name__}: {exc}", field="inputs.shape") from exc


def _check_parity(net: Any, path: Path, x_std: np.ndarray, seed: int, graph: str) -> None:
    """onnxruntime on ``path`` vs ``reference_draws`` (torch, once per draw) with the same draws."""
    import onnxruntime as ort
    import torch

    from demur.export.draws import draw_noise, reference_draws

    noise = draw_noise(net.noise, np.random.default_rng(seed))
    session = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    got = session.run(["draws"], {"x": x_std, **noise})[0]
    want = reference_draws(net, torch.from_numpy(x_std), noise).numpy()
    if got.shape != want.shape:
        raise GraphBuildError(f"the {graph} graph returns {list(got.shape)}; torch gives {list(want.shape)}",
                              field="model")
    rel = np.abs(got.astype(np.float64) - want) / np.maximum(np.abs(want), 1.0)
    worst = np.unravel_index(int(np.argmax(rel)), rel.shape) if rel.size else (0, 0, 0)
    if not np.isfinite(got).all() or (rel.size and rel[worst] > PARITY_TOLERANCE):
        s, b, k = (int(i) for i in worst)
        raise GraphBuildError(
            f"the exported {graph} graph does not compute what the torch module computes: largest relative "
            f"difference {rel[worst]:.3g} (> {PARITY_TOLERANCE:g}) at draw {s}, reference case {b}, output {k} "
            f"(torch {want[s, b, k]:.6g}, ONNX {got[s, b, k]:.6g}); typical causes: a forward that branches on "
            "values, layers that mix the cases of a batch (batch norm in training mode), or state changed "
            "during forward", field="model")


def export_bundle(
    checkpoint_dir: str | Path,
    out: str | Path,
    *,
    kind: str = "stacked",
    draws: int = DEFAULT_DRAWS,
    seed: int | None = None,
    name: str | None = None,
    version: str | None = None,
    support: str = "rows",
) -> Bundle:
    """Turn the ``demur train`` checkpoint in ``checkpoint_dir`` into a bundle (through ``export_model``).

    The validation split is the reference; ``name``/``version`` default to the checkpoint's name and "1".
    """
    from demur.export.datasets import load_dataset
    from demur.export.checkpoints import load_checkpoint

    model, meta = load_checkpoint(checkpoint_dir)
    data = meta.get("data", {})
    dataset = load_dataset(data.get("source", "digits"), data.get("target"), seed=int(data.get("seed", 0)),
                           task=meta["task"])
    return export_model(
        model, out, inputs=Inputs(spec=meta["inputs"], drift_features=meta.get("drift_features"),
                                  training=training_rows(dataset.x_train)),
        labels=list(meta["labels"]), task=meta["task"], target=meta.get("target"), kind=kind, draws=draws,
        seed=seed, reference=dataset.x_val, name=name or str(meta.get("name", Path(checkpoint_dir).name)),
        version=version or "1", support=support,
        # settings + arch let `demur evaluate --holdout-class` retrain the same network the same way
        extensions={"training": {"metrics": meta.get("metrics", {}), "data": data,
                                 "settings": meta.get("training", {}), "arch": meta.get("arch", {})}},
    )


def _check_target(out: Path) -> None:
    if out.exists() and (not out.is_dir() or (any(out.iterdir()) and not (out / MANIFEST).is_file())):
        raise ExportError(f"{out} exists and is not a demur bundle; choose another --out or remove it",
                          field="out")


def _reference_scores(bundle: Bundle, x_raw: np.ndarray) -> np.ndarray:
    """Decision scores of held-out raw inputs, computed as the server would (float64[N])."""
    m = bundle.manifest
    seed = next((m.graphs[k].seed for k in FRESH_KINDS if k in m.graphs), None)
    engine = Engine(bundle, graph="auto", seed=seed).load()
    return np.concatenate([score_values(summarise(m.task, engine.run(xb), m.interval_level, m.target),
                                        DEFAULT_SCORE) for xb in chunks(x_raw)])


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


def export_factory(factory: str, weights: str | Path, data: str | Path, out: str | Path, *,
                   target: str | None = None, reference: str | Path | None = None,
                   shape: Sequence[int] | None = None, labels: Sequence[str] | None = None,
                   task: str = "classification", kind: str = "stacked", draws: int = DEFAULT_DRAWS,
                   seed: int | None = None, name: str | None = None, version: str | None = None,
                   target_stats: str | None = None, support: str = "rows") -> Bundle:
    """``demur export --factory pkg.mod:fn --weights W --data train.csv``: build the module the
    ``factory`` ("MODULE:FUNCTION", imported as ``python -m`` would, from the current folder)
    returns, load its ``weights`` (a state_dict, or a list of them for an ensemble; read with
    ``weights_only=True``), take the input spec from the training rows ``data`` (CSV: every column
    but ``target``, in file order) and export it (``reference``: held-out rows matched by name).
    A regression module needs ``target_stats`` (``target_standardisation``)."""
    import torch

    module_name, _, func_name = factory.partition(":")
    if os.getcwd() not in sys.path and "" not in sys.path:  # as `python -m` does: your package beside you
        sys.path.insert(0, os.getcwd())
    try:
        build = getattr(importlib.import_module(module_name), func_name)
    except (ImportError, AttributeError, ValueError) as exc:
        raise ExportError(f"--factory must name an importable MODULE:FUNCTION; got {factory!r} ({exc}); "
                          "run from the folder holding MODULE, or put it on PYTHONPATH", field="factory") from exc
    model = build()
    try:
        state = torch.load(weights, map_location="cpu", weights_only=True)
    except Exception as exc:  # torch raises UnpicklingError, RuntimeError, EOFError...
        raise ExportError(f"{weights} is not a state_dict torch.load(weights_only=True) can read: {exc}",
                          field="weights") from exc
    members = model if isinstance(model, (list, tuple)) else [model]
    states = state if isinstance(state, (list, tuple)) else [state]
    if len(states) != len(members):
        raise ExportError(f"the factory built {len(members)} module(s) but --weights holds {len(states)} "
                          "state_dict(s)", field="weights")
    for member, sd in zip(members, states):
        try:
            member.load_state_dict(sd)
        except (RuntimeError, KeyError, TypeError) as exc:
            raise ExportError(f"--weights do not fit the module the factory built: {exc}", field="weights") from exc
        member.eval()
    x_train, names = read_training_columns(data, target)
    x_ref = read_features(reference, names, ignore=[target] if target else ()) if reference else x_train
    stats = target_standardisation(target_stats, data, target, names) if task == "regression" else None
    return export_model(model, out, inputs=input_spec(x_train, names, shape), labels=labels, task=task,
                        kind=kind, draws=draws, reference=x_ref, seed=seed, name=name or func_name,
                        version=version or "1", target=stats, support=support)


def target_standardisation(how: str | None, data: str | Path, target: str | None,
                           names: Sequence[str]) -> dict[str, Any]:
    """A regression model's target standardisation, ``demur export --target-stats``: "CENTER,SCALE"
    (trained on (y - CENTER) / SCALE), "data" (the mean and standard deviation, ddof 0, of the
    ``target`` column of ``data``) or "raw" (trained on y itself). Its graphs give mean and
    log-variance in standardised units, served as y = center + scale * y_std, so there is no
    default: a wrong guess would serve every mean and interval on the wrong scale without error."""
    how = (how or "").strip()
    try:
        if how == "raw":
            return {"center": 0.0, "scale": 1.0, "rule": "raw: the model predicts the target itself"}
        if how == "data" and target:
            y = np.asarray(read_labelled(data, names, target).y, dtype=np.float64)
            center, scale, rule = float(np.mean(y)), float(np.std(y)), (
                f"data: mean and standard deviation (ddof 0) of {target!r} over {len(y)} rows of {data}")
        else:
            center, scale = (float(v) for v in how.split(","))
            rule = "given with --target-stats"
    except ValueError:
        center, scale, rule = np.nan, np.nan, ""
    if not (np.isfinite(center) and np.isfinite(scale) and scale > 0):
        raise ExportError(f"a regression model needs --target-stats: CENTER,SCALE (how its target was standardised "
                          "for training: y_std = (y - CENTER) / SCALE, SCALE > 0), 'data' with --target COLUMN (the "
                          "mean and standard deviation of that numeric column of --data) or 'raw' (trained on the "
                          f"target itself); got {how!r}", field="target_stats")
    return {"center": center, "scale": scale, "rule": rule}
