"""The bundle: demur's portable model artifact, and the only contract between
``export/`` (which writes it) and ``serve/`` (which reads it).

A bundle is a directory::

    BUNDLE/
      manifest.json        what the model is and how to use it (schema below)
      manifest.sha256      hex SHA-256 of manifest.json's bytes: the bundle's seal
      <graph>.onnx         one or more ONNX graphs named in the manifest

The seal is the bundle's identity: responses name it as the model checksum.
Each graph's SHA-256 is recorded in the manifest, so the seal covers the whole
directory. Loading checks, in order: the seal, the JSON, the format name and
version, the schema, then every graph file's digest. Nothing is returned until
everything has passed, so a bundle is never loaded half-way.

Compatibility policy: ``format_version`` is an integer. A reader refuses a
version newer than ``FORMAT_VERSION``; it accepts older ones. Unknown
top-level keys and unknown keys inside ``extensions`` are kept verbatim and
written back when the manifest is rewritten (by calibration), so later
features can add sections without breaking older readers.

Graph I/O contract (every graph kind):
  input  ``x``:     float32[B, *input.shape], already standardised
  output ``draws``: float32[S, B, K] -- classification: logits, K = len(labels);
                    regression: K = 2, (mean, log-variance) in standardised
                    target units (see ``Manifest.target``).
"""

from __future__ import annotations

import copy
import datetime as _dt
import hashlib
import json
import math
import os
import re
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

from demur.serve.errors import BundleError, BundleNotFound, ChecksumMismatch, ManifestInvalid, UnsupportedFormat

__all__ = [
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "F32_LIMIT",
    "FRESH_KINDS",
    "GRAPH_KINDS",
    "SCORES",
    "SCORE_TASKS",
    "SCORE_UNITS",
    "Bundle",
    "DecisionSection",
    "FingerprintSection",
    "GraphEntry",
    "InputSpec",
    "Manifest",
    "SupportSection",
    "TrainingData",
    "TrainingSection",
    "load_bundle",
    "sha256_file",
    "write_bundle",
    "write_manifest",
]

FORMAT_NAME = "demur-bundle"
FORMAT_VERSION = 1
MANIFEST = "manifest.json"
SEAL = "manifest.sha256"

GRAPH_KINDS = ("stacked", "sampler", "means", "flip")
"""stacked: S pre-drawn weight sets in one graph (output noise where draws enter a dense layer,
export/local.py); sampler: fresh weights per call from noise the engine feeds; means: the
deterministic graph of the posterior means (S = 1); flip: Flipout sign flips on a fresh base per
call, its noise fed by the engine (export/flip.py); in the fresh kinds a dense layer draws its
outputs, not its weights (local reparameterisation, export/local.py)."""

F32_LIMIT = (2.0 - 2.0 ** -23) * 2.0 ** 127 + 2.0 ** 103
"""Every feature value a graph takes must be below this in magnitude: it then rounds to a finite
float32. The bound is float32's largest value, (2 - 2**-23) * 2**127, plus half its last step
(2**103), so
``3.4028235e38``, the way float32's largest value prints, is accepted whether it comes as JSON
text, a float64 ``.npy`` or a file cell."""

FRESH_KINDS = ("sampler", "flip")
"""The graph kinds that draw fresh weights on every call (their random nodes are reseeded at load)."""

SCORE_TASKS: dict[str, tuple[str, ...]] = {
    "mutual_information": ("classification", "regression"),
    "predictive_entropy": ("classification", "regression"),
    "one_minus_max_prob": ("classification",),
    "interval_width": ("regression",),
    "epistemic_std": ("regression",),
    "joint_rank": ("classification",),
}
"""Decision scores a bundle may name, and the tasks each is defined for (their meaning:
serve/core/decision.py; larger always means "less sure")."""

SCORES = tuple(SCORE_TASKS)
"""Decision scores a bundle may name."""

SCORE_UNITS: dict[str, str] = {
    "mutual_information": "nats",
    "predictive_entropy": "nats",
    "one_minus_max_prob": "",
    "interval_width": "target units",
    "epistemic_std": "target units",
    "joint_rank": "",
}
"""The unit of each score, for reports and metric help."""


Task = Literal["classification", "regression"]


@dataclass(frozen=True)
class InputSpec:
    """What one case looks like.

    ``shape`` excludes the batch axis ([64] for flat digits, [1, 8, 8] for the
    conv net). ``names`` has prod(shape) entries, in C order. ``center`` and
    ``scale`` standardise raw inputs: x_std = (x - center) / scale, per
    feature. ``low``/``high`` are the training range of each raw feature,
    shown to reviewers beside each value.
    """

    names: tuple[str, ...]
    shape: tuple[int, ...]
    center: tuple[float, ...]
    scale: tuple[float, ...]
    low: tuple[float, ...]
    high: tuple[float, ...]
    dtype: str = "float32"
    kind: Literal["tabular", "image"] = "tabular"

    @property
    def size(self) -> int:
        n = 1
        for d in self.shape:
            n *= d
        return n


@dataclass(frozen=True)
class GraphEntry:
    """One ONNX file: its kind, file name (inside the bundle), digest and draw count."""

    kind: str
    file: str
    sha256: str
    draws: int
    seed: int | None = None


@dataclass(frozen=True)
class DecisionSection:
    """The manifest's ``decision`` section: the abstention rule as stored (abstain when
    ``score`` > ``threshold``); ``decision.rule_from`` turns it into the ``DecisionRule`` in force.

    ``calibration`` is the record written by ``demur calibrate`` (method,
    target, delta, n, achieved figures, bound, data fingerprint, date), or
    ``None`` for an uncalibrated bundle.
    """

    score: str
    threshold: float
    calibration: dict[str, Any] | None = None

    @property
    def expected_abstain_rate(self) -> float | None:
        """The abstention rate the calibration record states (``achieved.abstain_rate``, in
        [0, 1]), or None for an uncalibrated bundle or a record without one."""
        achieved = (self.calibration or {}).get("achieved")
        rate = achieved.get("abstain_rate") if isinstance(achieved, dict) else None
        ok = isinstance(rate, (int, float)) and not isinstance(rate, bool) and 0.0 <= float(rate) <= 1.0
        return float(rate) if ok else None

    @property
    def certificate(self) -> tuple[float, float] | None:
        """(target accuracy of accepted cases, confidence) the calibration certified, or None
        (uncalibrated, or calibrated for an abstention rate, which certifies no accuracy)."""
        cal = self.calibration or {}
        target = (cal.get("target") or {}).get("accuracy") if isinstance(cal.get("target"), dict) else None
        delta = cal.get("delta")
        if cal.get("bound") is None or not all(isinstance(v, (int, float)) and not isinstance(v, bool)
                                               for v in (target, delta)):
            return None
        if not (0.0 < float(target) < 1.0 and 0.0 < float(delta) < 1.0):
            return None
        return float(target), 1.0 - float(delta)


@dataclass(frozen=True)
class TrainingData:
    """How the training rows were loaded (``extensions.training.data``): ``source`` ("digits",
    "diabetes" or a CSV path), its label column ``target`` and the split ``seed``."""

    source: str
    target: str | None
    seed: int


@dataclass(frozen=True)
class TrainingSection:
    """``extensions.training``, written when a ``demur train`` checkpoint is exported: the
    checkpoint's ``metrics``, its ``data`` record, the training ``settings`` and the ``arch``
    (kind, widths, posterior), so ``demur evaluate --holdout-class`` can retrain the same
    network the same way. ``settings`` / ``arch`` are None when not recorded."""

    data: TrainingData | None
    settings: dict[str, Any] | None
    arch: dict[str, Any] | None
    metrics: dict[str, Any]


@dataclass(frozen=True)
class SupportSection:
    """The ``support`` section: the support check's record (serve/core/support.py builds the
    check from ``record``, and refuses a malformed one); ``threshold`` on the k-NN distance,
    standardised units (None when the record has no number there)."""

    threshold: float | None
    record: dict[str, Any] = field(repr=False)


@dataclass(frozen=True)
class FingerprintSection:
    """``extensions.training_rows``: the training rows' fingerprint (hashes only,
    serve/core/fingerprint.py reads ``record``), for calibrate's and evaluate's leakage check;
    ``rows``: how many training rows were hashed."""

    method: str
    rows: int
    record: dict[str, Any] = field(repr=False)


@dataclass(frozen=True)
class Manifest:
    """The parsed manifest. ``raw`` keeps the JSON exactly as read, including
    keys this version does not know, so a rewrite loses nothing."""

    model_name: str
    model_version: str
    created: str
    task: Task
    labels: tuple[str, ...]
    inputs: InputSpec
    posterior: dict[str, Any]
    graphs: dict[str, GraphEntry]
    decision: DecisionSection
    interval_level: float
    drift_reference: dict[str, Any]
    target: dict[str, float]
    raw: dict[str, Any] = field(repr=False, compare=False, default_factory=dict)
    training: TrainingSection | None = field(default=None, repr=False)
    support: SupportSection | None = field(default=None, repr=False)
    fingerprint: FingerprintSection | None = field(default=None, repr=False)

    @property
    def outputs(self) -> int:
        """K, the last axis of every graph's ``draws`` output."""
        return len(self.labels) if self.task == "classification" else 2


@dataclass(frozen=True)
class Bundle:
    """A verified bundle on disk. ``checksum`` is the seal (SHA-256 of manifest.json)."""

    path: Path
    manifest: Manifest
    checksum: str

    def __repr__(self) -> str:  # the manifest holds the drift reference: kilobytes for one print
        m = self.manifest
        return (f"Bundle({str(self.path)!r}, model={m.model_name!r} v{m.model_version}, task={m.task}, "
                f"graphs={sorted(m.graphs)}, checksum={self.checksum[:12]})")

    def graph_path(self, kind: str) -> Path:
        if kind not in self.manifest.graphs:
            have = ", ".join(sorted(self.manifest.graphs)) or "none"
            raise ManifestInvalid(
                f"bundle {self.path} has no '{kind}' graph; it has: {have}", field="graphs"
            )
        return self.path / self.manifest.graphs[kind].file


def sha256_file(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _check_served_target(target: Any, score: str) -> None:
    """A classifier's optional ``target.temperature`` (> 0) and ``target.score_reference`` (which
    ``joint_rank`` needs), checked at load so a bad value never reaches a request
    (serve/core/summary.py says what they mean)."""
    target = target if isinstance(target, dict) else {}
    t = target.get("temperature", 1.0)
    if isinstance(t, bool) or not isinstance(t, (int, float)) or not (math.isfinite(t) and t > 0):
        raise ManifestInvalid(f"target.temperature must be a finite number > 0; got {t!r}", field="target.temperature")
    if score == "joint_rank" and not isinstance(target.get("score_reference"), dict):
        raise ManifestInvalid("decision.score 'joint_rank' needs target.score_reference (written by demur train); "
                              "this bundle has none: choose another score", field="target.score_reference")


def _need(obj: dict[str, Any], key: str, kind: type | tuple[type, ...], where: str) -> Any:
    if not isinstance(obj, dict) or key not in obj:
        raise ManifestInvalid(f"manifest is missing '{where}{key}'", field=f"{where}{key}")
    value = obj[key]
    if not isinstance(value, kind) or (isinstance(value, bool) and bool not in _as_tuple(kind)):
        want = " or ".join(t.__name__ for t in _as_tuple(kind))
        raise ManifestInvalid(
            f"manifest '{where}{key}' must be {want}; got {type(value).__name__}", field=f"{where}{key}"
        )
    return value


_HEADER_SAFE = re.compile(r"[\x21-\x7e](?:[\x20-\x7e]{0,198}[\x21-\x7e])?")


def _header_safe(value: str, field: str) -> str:
    """Model name and version go into every response's ``Demur-Model-Version`` header: printable
    ASCII only (RFC 9110, section 5.5 field values), 1-200 characters, no CR/LF."""
    if not _HEADER_SAFE.fullmatch(value):
        raise ManifestInvalid(f"manifest '{field}' must be 1-200 printable ASCII characters (it is sent in a "
                              f"header); got {value[:40]!r}", field=field)
    return value


def _as_tuple(kind: type | tuple[type, ...]) -> tuple[type, ...]:
    return kind if isinstance(kind, tuple) else (kind,)


def _parse(raw: dict[str, Any]) -> Manifest:
    fmt = _need(raw, "format", str, "")
    if fmt != FORMAT_NAME:
        raise UnsupportedFormat(f"format is '{fmt}'; demur reads '{FORMAT_NAME}'", field="format")
    version = _need(raw, "format_version", int, "")
    if version > FORMAT_VERSION or version < 1:
        raise UnsupportedFormat(
            f"format_version {version} is not supported (this demur reads 1..{FORMAT_VERSION}); "
            "upgrade demur or re-export the bundle",
            field="format_version",
        )
    model = _need(raw, "model", dict, "")
    task = _need(raw, "task", str, "")
    if task not in ("classification", "regression"):
        raise ManifestInvalid(f"task must be 'classification' or 'regression'; got '{task}'", field="task")
    labels = tuple(str(x) for x in _need(raw, "labels", list, ""))
    if task == "classification" and len(labels) < 2:
        raise ManifestInvalid(f"a classifier needs at least 2 labels; got {len(labels)}", field="labels")

    spec = _need(raw, "inputs", dict, "")
    shape = tuple(int(d) for d in _need(spec, "shape", list, "inputs."))
    names = tuple(str(x) for x in _need(spec, "names", list, "inputs."))
    size = 1
    for d in shape:
        size *= d
    vectors = {}
    for key in ("names", "center", "scale", "low", "high"):
        vec = _need(spec, key, list, "inputs.")
        if len(vec) != size:
            raise ManifestInvalid(
                f"inputs.{key} must have {size} entries (prod of shape {list(shape)}); got {len(vec)}",
                field=f"inputs.{key}",
            )
        vectors[key] = vec
    if any(float(s) <= 0 for s in vectors["scale"]):
        raise ManifestInvalid("inputs.scale must be positive everywhere", field="inputs.scale")
    inputs = InputSpec(
        names=names,
        shape=shape,
        center=tuple(float(v) for v in vectors["center"]),
        scale=tuple(float(v) for v in vectors["scale"]),
        low=tuple(float(v) for v in vectors["low"]),
        high=tuple(float(v) for v in vectors["high"]),
        dtype=str(spec.get("dtype", "float32")),
        kind=spec.get("kind", "image" if len(shape) > 1 else "tabular"),
    )

    graphs_raw = _need(raw, "graphs", dict, "")
    if not graphs_raw:
        raise ManifestInvalid("manifest lists no graphs", field="graphs")
    graphs = {}
    for kind, entry in graphs_raw.items():
        where = f"graphs.{kind}."
        file = _need(entry, "file", str, where)
        if os.path.isabs(file) or ".." in Path(file).parts or Path(file).name != file:
            raise ManifestInvalid(f"{where}file must be a plain file name inside the bundle; got '{file}'",
                                  field=f"{where}file")
        graphs[kind] = GraphEntry(
            kind=kind,
            file=file,
            sha256=_need(entry, "sha256", str, where),
            draws=int(_need(entry, "draws", int, where)),
            seed=entry.get("seed"),
        )

    dec = _need(raw, "decision", dict, "")
    score = _need(dec, "score", str, "decision.")
    if score not in SCORES:
        raise ManifestInvalid(f"decision.score must be one of {', '.join(SCORES)}; got '{score}'",
                              field="decision.score")
    decision = DecisionSection(
        score=score,
        threshold=float(_need(dec, "threshold", (int, float), "decision.")),
        calibration=dec.get("calibration"),
    )
    extensions = raw.get("extensions") or {}
    if not isinstance(extensions, dict):
        raise ManifestInvalid(f"manifest 'extensions' must be an object; got {type(extensions).__name__}",
                              field="extensions")
    level = float(raw.get("interval_level", 0.9))
    if not 0.0 < level < 1.0:
        raise ManifestInvalid(f"interval_level must be in (0, 1); got {level}", field="interval_level")
    _check_served_target(raw.get("target", {}), score)
    return Manifest(
        model_name=_header_safe(_need(model, "name", str, "model."), "model.name"),
        model_version=_header_safe(_need(model, "version", str, "model."), "model.version"),
        created=str(model.get("created", "")),
        task=task,  # type: ignore[arg-type]
        labels=labels,
        inputs=inputs,
        posterior=dict(raw.get("posterior", {})),
        graphs=graphs,
        decision=decision,
        interval_level=level,
        drift_reference=dict(raw.get("drift_reference", {})),
        target=dict(raw.get("target", {"center": 0.0, "scale": 1.0})),
        raw=raw,
        training=_training(extensions.get("training")),
        support=_support(raw.get("support")),
        fingerprint=_fingerprint(extensions.get("training_rows")),
    )


def _training(t: Any) -> TrainingSection | None:
    if t is None:
        return None
    if not isinstance(t, dict):
        raise ManifestInvalid(f"manifest 'extensions.training' must be an object; got {type(t).__name__}",
                              field="extensions.training")
    d = t.get("data")
    data = None
    if isinstance(d, dict) and d:
        target = d.get("target")
        data = TrainingData(source=str(d.get("source", "")), target=None if target is None else str(target),
                            seed=int(d.get("seed", 0)))
    settings, arch, metrics = t.get("settings"), t.get("arch"), t.get("metrics")
    return TrainingSection(data=data, settings=dict(settings) if isinstance(settings, dict) else None,
                           arch=dict(arch) if isinstance(arch, dict) else None,
                           metrics=dict(metrics) if isinstance(metrics, dict) else {})


def _support(record: Any) -> SupportSection | None:
    if not record:
        return None
    if not isinstance(record, dict):
        raise ManifestInvalid(f"manifest 'support' must be an object; got {type(record).__name__}", field="support")
    threshold = record.get("threshold")  # checked, with the rest of the record, where the check is built
    number = isinstance(threshold, (int, float)) and not isinstance(threshold, bool)
    return SupportSection(threshold=float(threshold) if number else None, record=record)


def _fingerprint(record: Any) -> FingerprintSection | None:
    if record is None:
        return None
    if not isinstance(record, dict):
        raise ManifestInvalid(f"manifest 'extensions.training_rows' must be an object; got "
                              f"{type(record).__name__}", field="extensions.training_rows")
    return FingerprintSection(method=str(record.get("method", "")), rows=int(record.get("rows", 0) or 0),
                              record=record)


def load_bundle(path: str | os.PathLike[str], *, verify: bool = True) -> Bundle:
    """Read and verify a bundle directory; raise a ``BundleError`` subclass naming what is wrong.

    Example::

        bundle = load_bundle("build/digits-radial")
        bundle.manifest.labels   # ('0', '1', ..., '9')
    """
    root = Path(path)
    manifest_path = root / MANIFEST
    if not root.is_dir():
        raise BundleNotFound(f"no bundle directory at {root}", field="bundle")
    if not manifest_path.is_file():
        raise BundleNotFound(f"{root} has no {MANIFEST}; is this a demur bundle?", field=MANIFEST)
    _inside(root, MANIFEST, MANIFEST)
    data = manifest_path.read_bytes()
    checksum = hashlib.sha256(data).hexdigest()
    seal_path = root / SEAL
    if verify:
        if not seal_path.is_file():
            raise BundleNotFound(f"{root} has no {SEAL}; the bundle is incomplete", field=SEAL)
        _inside(root, SEAL, SEAL)
        recorded = seal_path.read_text(encoding="ascii", errors="replace").strip()
        if recorded != checksum:
            raise ChecksumMismatch(
                f"{MANIFEST} has SHA-256 {checksum[:12]}…, but {SEAL} records {recorded[:12]}…; "
                "the manifest was changed or damaged: re-export or re-calibrate the bundle",
                field=MANIFEST,
            )
    try:
        raw = json.loads(data)
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ManifestInvalid(f"{MANIFEST} is not valid JSON: {exc}", field=MANIFEST) from exc
    if not isinstance(raw, dict):
        raise ManifestInvalid(f"{MANIFEST} must hold a JSON object", field=MANIFEST)
    manifest = _parse(raw)
    for entry in manifest.graphs.values():
        gpath = root / entry.file
        if gpath.is_symlink() or gpath.exists():
            _inside(root, entry.file, f"graphs.{entry.kind}.file")
        if verify and not gpath.is_file():
            raise BundleNotFound(f"graph file {entry.file} named in the manifest is missing",
                                 field=f"graphs.{entry.kind}.file")
    if verify:
        for entry in manifest.graphs.values():
            gpath = root / entry.file
            digest = sha256_file(gpath)
            if digest != entry.sha256:
                raise ChecksumMismatch(
                    f"graph file {entry.file} has SHA-256 {digest[:12]}…, the manifest records "
                    f"{entry.sha256[:12]}…; the file was changed or damaged",
                    field=f"graphs.{entry.kind}.sha256",
                )
    return Bundle(path=root, manifest=manifest, checksum=checksum)


def _inside(root: Path, name: str, field: str) -> None:
    """Refuse a bundle file that is a symbolic link or resolves outside the bundle directory:
    the seal covers the bytes the manifest names, and a link would let them change (or be
    read from anywhere on the host) without the bundle changing. The directory itself may
    be a link (``bundles/current -> v7``)."""
    path = root / name
    if path.is_symlink():
        raise BundleError(f"{name} in bundle {root} is a symbolic link; bundle files must be regular files "
                          "inside the bundle directory (copy the file in instead)", field=field)
    base = root.resolve()
    if not path.resolve().is_relative_to(base):
        raise BundleError(f"{name} resolves outside bundle {root}; bundle files must live inside it", field=field)


def _atomic_write(path: Path, data: bytes) -> None:
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.")
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def write_manifest(root: str | os.PathLike[str], raw: dict[str, Any]) -> str:
    """Write manifest.json then its seal, each atomically; return the new checksum.

    The raw dict is validated first (same parser as loading), so a bad
    manifest is never written. Graph digests are recomputed from the files.
    """
    root = Path(root)
    raw = copy.deepcopy(raw)
    for entry in raw.get("graphs", {}).values():
        gpath = root / entry["file"]
        if gpath.is_file():
            entry["sha256"] = sha256_file(gpath)
    _parse(raw)
    data = (json.dumps(raw, indent=2, sort_keys=False) + "\n").encode("utf-8")
    checksum = hashlib.sha256(data).hexdigest()
    _atomic_write(root / MANIFEST, data)
    _atomic_write(root / SEAL, (checksum + "\n").encode("ascii"))
    return checksum


def write_bundle(
    root: str | os.PathLike[str],
    *,
    model_name: str,
    model_version: str,
    task: Task,
    labels: list[str],
    inputs: dict[str, Any],
    posterior: dict[str, Any],
    graphs: dict[str, dict[str, Any]],
    decision: dict[str, Any],
    interval_level: float = 0.9,
    drift_reference: dict[str, Any] | None = None,
    target: dict[str, float] | None = None,
    extensions: dict[str, Any] | None = None,
    support: dict[str, Any] | None = None,
) -> Bundle:
    """Write manifest + seal for graph files already placed in ``root``; return the loaded bundle.

    ``graphs`` maps kind -> {"file", "draws", optional "seed"}; digests are filled in here.
    ``support``: the support-check record (``demur.serve.core.support.support_record``).
    """
    root = Path(root)
    raw: dict[str, Any] = {
        "format": FORMAT_NAME,
        "format_version": FORMAT_VERSION,
        "model": {
            "name": model_name,
            "version": model_version,
            "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        },
        "task": task,
        "labels": [str(x) for x in labels],
        "inputs": inputs,
        "posterior": posterior,
        "graphs": {k: {**v, "sha256": ""} for k, v in graphs.items()},
        "decision": decision,
        "interval_level": interval_level,
        "target": target or {"center": 0.0, "scale": 1.0},
        "drift_reference": drift_reference or {},
        "extensions": extensions or {},
    }
    if support:
        raw["support"] = support
    write_manifest(root, raw)
    return load_bundle(root)
