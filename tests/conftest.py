"""Shared fixtures. Bundles built here are reused by every test module.

Bundles are session-wide and READ-ONLY: a test that changes files (flips a
byte, recalibrates, rewrites the manifest) must work on a copy::

    def test_x(demo_bundle, copy_bundle):
        path = copy_bundle(demo_bundle)          # a fresh directory under tmp_path
        bundle = load_bundle(path)

Fast (no training, a second or two each):
    tiny_bundle_factory(task="classification"|"regression", kind="stacked"|"sampler",
                        posterior="radial"|"gaussian", draws=8, arch="mlp"|"conv") -> Bundle
        an UNTRAINED small network (hidden [16]); classification takes the
        digits' input spec (64 features ``px_r{r}c{c}``, raw 0..16, shape [64],
        or [1, 8, 8] with arch="conv"), 10 labels; regression 10 features
        ``f0..f9``, K = 2. Calls with the same arguments return the same bundle.
        ``tiny_bundle_factory.models[bundle.path]`` is the torch model behind it.
    copy_bundle(bundle) -> Path     (function scope) a private copy to change.

Trained (the first use trains, then the checkpoint is kept in pytest's cache
directory, keyed by the settings and the source of export/layers.py,
training.py and datasets.py; DEMUR_TEST_CACHE=/dir moves it, =off disables it):
    demo_dataset            load_dataset("digits")
    demo_checkpoint         Path: radial MLP on the digits, the training defaults
    demo_bundle             stacked draws, S = 32, seed 0
    demo_sampler_bundle     sampler graph, S = 32, seed 0
    diabetes_dataset        load_dataset("diabetes")
    diabetes_checkpoint     Path: radial MLP (hidden [32]) on diabetes, 40 epochs
    diabetes_bundle         stacked draws, S = 32, seed 0
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest

DIGITS_TRAINING: dict[str, Any] = {"arch": "mlp", "posterior": "radial", "seed": 0}
"""The demo model: H1's training defaults (60 epochs, hidden 256-256)."""

DIABETES_TRAINING: dict[str, Any] = {"arch": "mlp", "posterior": "radial", "seed": 0, "epochs": 40,
                                     "hidden": (32,)}
"""Short regression training for the conformal / regression tests."""


def _digits_spec(arch: str) -> dict[str, Any]:
    names = [f"px_r{r}c{c}" for r in range(8) for c in range(8)]
    j = np.arange(64)
    # distinct per-feature statistics, so a transposed or doubled standardisation shows
    return {
        "names": names,
        "shape": [1, 8, 8] if arch == "conv" else [64],
        "dtype": "float32",
        "center": [float(v) for v in 4.0 + 0.5 * (j % 8)],
        "scale": [float(v) for v in 2.0 + 0.5 * (j % 5)],
        "low": [0.0] * 64,
        "high": [16.0] * 64,
        "kind": "image",
    }


def _regression_spec() -> dict[str, Any]:
    j = np.arange(10)
    center = 1.0 * j
    scale = 1.0 + 0.1 * j
    return {
        "names": [f"f{i}" for i in j],
        "shape": [10],
        "dtype": "float32",
        "center": [float(v) for v in center],
        "scale": [float(v) for v in scale],
        "low": [float(v) for v in center - 3 * scale],
        "high": [float(v) for v in center + 3 * scale],
        "kind": "tabular",
    }


def _tiny_reference_x(spec: dict[str, Any], n: int = 64) -> np.ndarray:
    rng = np.random.default_rng(0)
    low, high = np.asarray(spec["low"]), np.asarray(spec["high"])
    return rng.uniform(low, high, size=(n, len(low)))


@pytest.fixture(autouse=True)
def _private_working_directory(tmp_path_factory: pytest.TempPathFactory, monkeypatch: pytest.MonkeyPatch) -> None:
    """Run every test in a fresh working directory, so defaults relative to the
    current directory (``ServeConfig.data_dir`` = ``demur-data``) never write into
    the repository or leak a review queue from one test into the next."""
    monkeypatch.chdir(tmp_path_factory.mktemp("cwd"))


@pytest.fixture(scope="session")
def tiny_bundle_factory(tmp_path_factory: pytest.TempPathFactory) -> Callable[..., Any]:
    """Build (once per argument set) a bundle of an untrained small network; see the module docstring."""
    import torch

    from demur.export import export_model
    from demur.export.layers import build_model

    cache: dict[tuple[Any, ...], Any] = {}
    root = tmp_path_factory.mktemp("tiny-bundles")

    def make(task: str = "classification", kind: str = "stacked", posterior: str = "radial", draws: int = 8,
             arch: str = "mlp") -> Any:
        key = (task, kind, posterior, draws, arch)
        if key in cache:
            return cache[key]
        if task == "classification":
            spec, labels, target = _digits_spec(arch), [str(i) for i in range(10)], None
        else:
            spec, labels, target = _regression_spec(), ["progression"], {"center": 150.0, "scale": 75.0}
        torch.manual_seed(1234)
        model = build_model(arch, spec["shape"], len(labels) if task == "classification" else 2, posterior,
                            hidden=(16,), channels=(4, 8), init_sigma=0.05)
        bundle = export_model(
            model, root / "-".join(map(str, key)), task=task, labels=labels, inputs=spec, target=target,
            reference=_tiny_reference_x(spec), kind=kind, draws=draws, seed=0,
            name=f"tiny-{task}-{arch}-{posterior}", version="0",
        )
        cache[key] = bundle
        models[bundle.path] = model
        return bundle

    models: dict[Path, Any] = {}
    make.models = models  # type: ignore[attr-defined]  # bundle.path -> the torch model it was built from
    return make


@pytest.fixture()
def copy_bundle(tmp_path: Path) -> Callable[[Any], Path]:
    """Copy a (read-only, shared) bundle into this test's tmp_path; returns the new directory."""
    count = [0]

    def copy(bundle: Any) -> Path:
        count[0] += 1
        dest = tmp_path / f"bundle-copy-{count[0]}"
        shutil.copytree(bundle.path, dest)
        return dest

    return copy


# -- trained models ---------------------------------------------------------------
_TRAINING_SOURCES = ("export/layers.py", "export/training.py", "export/checkpoints.py", "export/datasets.py")


def _checkpoint_cache(request: pytest.FixtureRequest) -> Path | None:
    """Where trained checkpoints persist between runs: $DEMUR_TEST_CACHE, else pytest's own
    cache directory (.pytest_cache, never committed); DEMUR_TEST_CACHE=off trains every session."""
    setting = os.environ.get("DEMUR_TEST_CACHE", "")
    if setting.lower() in ("off", "0", "no"):
        return None
    if setting:
        return Path(setting)
    cache = getattr(request.config, "cache", None)  # None under -p no:cacheprovider
    return Path(cache.mkdir("demur-checkpoints")) if cache is not None else None


def _trained_checkpoint(request: pytest.FixtureRequest, source: str, settings: dict[str, Any]) -> Path:
    """Train once, keyed by the settings AND the source of the training code, so any change
    to layers/training/datasets retrains instead of reusing a stale checkpoint."""
    from demur.export.datasets import load_dataset
    from demur.export.training import train

    root = Path(__file__).resolve().parents[1]
    key = hashlib.sha256(json.dumps({"source": source, **settings}, sort_keys=True, default=list).encode())
    for rel in _TRAINING_SOURCES:
        key.update((root / rel).read_bytes())
    name = f"{source}-{key.hexdigest()[:16]}"
    cache = _checkpoint_cache(request)
    if cache is not None:
        target = cache / name
        if (target / "checkpoint.pt").is_file():
            return target
        cache.mkdir(parents=True, exist_ok=True)
        tmp = Path(tempfile.mkdtemp(dir=cache, prefix=f".{name}."))
    else:
        target = request.getfixturevalue("tmp_path_factory").mktemp("checkpoints") / name
        tmp = target
    opts = dict(settings)
    seed = int(opts.pop("seed", 0))
    try:
        train(load_dataset(source, seed=seed), seed=seed, out=tmp, progress=False, **opts)
    except BaseException:
        if tmp != target:
            shutil.rmtree(tmp, ignore_errors=True)
        raise
    if tmp != target:
        try:
            tmp.rename(target)
        except OSError:  # a concurrent run stored it first
            shutil.rmtree(tmp, ignore_errors=True)
    return target


@pytest.fixture(scope="session")
def demo_dataset() -> Any:
    """The parcel-depot digits: scikit-learn's bundled 8x8 digits in four fixed splits."""
    from demur.export.datasets import load_dataset

    return load_dataset("digits")


@pytest.fixture(scope="session")
def demo_checkpoint(request: pytest.FixtureRequest) -> Path:
    """Directory holding checkpoint.pt of the demo radial MLP trained on the digits (read-only)."""
    return _trained_checkpoint(request, "digits", DIGITS_TRAINING)


def _stacked_or_sampler(checkpoint: Path, factory: pytest.TempPathFactory, name: str, kind: str) -> Any:
    """A session bundle of ``checkpoint``: S = 32 draws, seed 0 (the sampler records it)."""
    from demur.export.exporter import export_bundle

    return export_bundle(checkpoint, factory.mktemp(name.split("-")[0]) / name, kind=kind, draws=32, seed=0,
                         version="1")


@pytest.fixture(scope="session")
def demo_bundle(demo_checkpoint: Path, tmp_path_factory: pytest.TempPathFactory) -> Any:
    """The demo model as stacked draws (S = 32, seed 0)."""
    return _stacked_or_sampler(demo_checkpoint, tmp_path_factory, "digits-stacked", "stacked")


@pytest.fixture(scope="session")
def demo_sampler_bundle(demo_checkpoint: Path, tmp_path_factory: pytest.TempPathFactory) -> Any:
    """The demo model as a sampler graph (S = 32 fresh draws per call, recorded seed 0)."""
    return _stacked_or_sampler(demo_checkpoint, tmp_path_factory, "digits-sampler", "sampler")


@pytest.fixture(scope="session")
def diabetes_dataset() -> Any:
    """scikit-learn's bundled diabetes data (regression) in four fixed splits."""
    from demur.export.datasets import load_dataset

    return load_dataset("diabetes")


@pytest.fixture(scope="session")
def diabetes_checkpoint(request: pytest.FixtureRequest) -> Path:
    """Directory holding checkpoint.pt of a short-trained radial regression MLP on diabetes (read-only)."""
    return _trained_checkpoint(request, "diabetes", DIABETES_TRAINING)


@pytest.fixture(scope="session")
def diabetes_bundle(diabetes_checkpoint: Path, tmp_path_factory: pytest.TempPathFactory) -> Any:
    """The diabetes regression model as stacked draws (S = 32, seed 0)."""
    return _stacked_or_sampler(diabetes_checkpoint, tmp_path_factory, "diabetes-stacked", "stacked")


# Property tests have no per-example deadline: the machines are shared and noisy, and speed is
# measured by demur bench, never by a timed test (DEVELOPERS.md).
from hypothesis import Phase as _Phase  # noqa: E402
from hypothesis import settings as _hypothesis_settings  # noqa: E402

# No "explain" phase either: it parses test source with ast while server and replayer threads
# run, which trips CPython 3.11.7's AST recursion-depth bug (python/cpython#106905, fixed in
# 3.11.8) and turns a failing example into a pytest INTERNALERROR.
_hypothesis_settings.register_profile(
    "demur", deadline=None, phases=[p for p in _Phase if p.name != "explain"])
_hypothesis_settings.load_profile("demur")
