"""export/exporter.py: checkpoint -> bundle.

References:
* torch: ``demur.export.layers.forward_draws`` on the draws ``sample_network`` makes from
  the recorded seed, max abs diff <= 1e-4 (foundation issue tolerance).
* The default threshold recomputed independently: per-draw softmax with
  scipy.special.softmax, mutual information = H[mean p] - mean_s H[p_s] with
  scipy.stats.entropy (Houlsby et al. 2011, "Bayesian Active Learning for
  Classification and Preference Learning", eq. 1), then numpy.quantile at 0.9.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import torch
from scipy import special, stats

import demur.export.exporter as exporter
from demur.export.datasets import load_dataset
from demur.export.errors import ExportError
from demur.export.exporter import export_bundle, export_model
from demur.export.layers import VariationalLinear, forward_draws, sample_network
from demur.export.local import local_noise, stored_generator
from demur.export.checkpoints import load_checkpoint
from demur.export.training import standardise_inputs, train
from demur.serve.core.bundle import load_bundle
from demur.serve.cli import main
from demur.serve.adapters.engine import Engine

from tests.export._local import local_layer


@pytest.fixture(scope="module")
def quick_checkpoints(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """One-epoch checkpoints (weights barely trained; the exporter does not care)."""
    root = tmp_path_factory.mktemp("quick-ckpt")
    out = {}
    for key, source, opts in (
        ("digits-mlp", "digits", {"arch": "mlp", "hidden": (16,)}),
        ("digits-conv", "digits", {"arch": "conv", "channels": (4, 8)}),
        ("diabetes", "diabetes", {"arch": "mlp", "hidden": (8,), "posterior": "gaussian"}),
    ):
        train(load_dataset(source), epochs=1, out=root / key, progress=False, **opts)
        out[key] = root / key
    return out


@pytest.mark.parametrize("key", ["digits-mlp", "digits-conv", "diabetes"])
def test_stacked_bundle_equals_torch_on_the_recorded_draws(quick_checkpoints, tmp_path: Path, key: str) -> None:
    """Engine(bundle).run(raw) == forward_draws(model, standardised raw, sample_network(seed)) within 1e-4."""
    ckpt = quick_checkpoints[key]
    bundle = export_bundle(ckpt, tmp_path / "b", kind="stacked", draws=6, seed=17)
    model, meta = load_checkpoint(ckpt)
    x_raw = load_dataset(meta["data"]["source"]).x_test[:20]
    draws = sample_network(model, 6, torch.Generator().manual_seed(17))
    xs = torch.from_numpy(standardise_inputs(meta["inputs"], x_raw)).float()
    if isinstance(model[1], VariationalLinear):  # an MLP: its first layer is where draws enter, by local noise
        first, rest = model[1], model[2:]
        n, b = local_noise(first, 6, stored_generator(17))
        h = torch.stack([local_layer(model[0](xs), first, n[s], b[s]) for s in range(6)])
        expected = torch.stack([forward_draws(rest, h[s], [{k: v[s:s + 1] for k, v in d.items()} for d in draws[1:]])[0]
                                for s in range(6)]).numpy()
    else:
        expected = forward_draws(model, xs, draws).numpy()
    engine = Engine(bundle).load()
    got = engine.run(x_raw)
    assert got.shape == expected.shape == (6, 20, bundle.manifest.outputs)
    assert np.abs(got - expected).max() <= 1e-4
    assert bundle.manifest.graphs["stacked"].seed == 17


def test_manifest_carries_the_checkpoint(quick_checkpoints, tmp_path: Path) -> None:
    ckpt = quick_checkpoints["digits-conv"]
    bundle = export_bundle(ckpt, tmp_path / "b", kind="sampler", draws=5, seed=3, name="depot-digits", version="7")
    model, meta = load_checkpoint(ckpt)
    m = bundle.manifest
    assert (m.model_name, m.model_version, m.task) == ("depot-digits", "7", "classification")
    assert list(m.labels) == meta["labels"] and list(m.inputs.shape) == meta["inputs"]["shape"] == [1, 8, 8]
    assert list(m.inputs.center) == meta["inputs"]["center"] and list(m.inputs.scale) == meta["inputs"]["scale"]
    assert m.posterior["family"] == "radial" and m.posterior["prior_scale"] == meta["arch"]["prior_scale"]
    n_params = sum(p.numel() for n, p in model.named_parameters() if n.endswith("_mu"))
    assert m.posterior["params"] == n_params
    assert set(m.graphs) == {"sampler", "means"}
    assert (m.graphs["sampler"].draws, m.graphs["sampler"].seed, m.graphs["means"].draws) == (5, 3, 1)
    assert m.decision.score == "mutual_information" and m.decision.calibration is None
    assert "uncalibrated" in m.raw["decision"]["basis"]
    assert m.interval_level == 0.9
    assert m.drift_reference["features"] == meta["drift_features"]


def _mi_reference(logits: np.ndarray) -> np.ndarray:
    """BALD mutual information with scipy (Houlsby et al. 2011, eq. 1), nats."""
    p = special.softmax(logits.astype(np.float64), axis=-1)  # [S, B, K]
    predictive = stats.entropy(p.mean(axis=0), axis=-1)
    expected = stats.entropy(p, axis=-1).mean(axis=0)
    return predictive - expected


def test_default_threshold_is_the_90th_percentile_of_validation_mi(quick_checkpoints, tmp_path: Path) -> None:
    ckpt = quick_checkpoints["digits-mlp"]
    bundle = export_bundle(ckpt, tmp_path / "b", draws=8, seed=1)
    _, meta = load_checkpoint(ckpt)
    x_val = load_dataset("digits", seed=meta["data"]["seed"]).x_val
    mi = _mi_reference(Engine(bundle).load().run(x_val))
    assert bundle.manifest.decision.threshold == pytest.approx(np.quantile(mi, 0.9), abs=1e-9)
    ref = bundle.manifest.drift_reference["score"]
    assert ref["name"] == "mutual_information" and ref["n"] == len(x_val)
    np.testing.assert_allclose(ref["values"], np.sort(mi), atol=1e-9)


def test_sampler_export_records_its_seed_and_replays_with_it(quick_checkpoints, tmp_path: Path) -> None:
    bundle = export_bundle(quick_checkpoints["diabetes"], tmp_path / "b", kind="sampler", draws=4, seed=9)
    x = load_dataset("diabetes").x_test[:3]
    a = Engine(bundle, seed=bundle.manifest.graphs["sampler"].seed).load().run(x)
    b = Engine(bundle, seed=9).load().run(x)
    np.testing.assert_array_equal(a, b)
    assert a.shape == (4, 3, 2)


def test_a_failed_export_leaves_nothing_behind(tiny_bundle_factory, monkeypatch, tmp_path: Path) -> None:
    """Never half-written: the temp directory is removed and an older bundle at ``out`` survives."""
    base = tiny_bundle_factory(task="regression")
    model = tiny_bundle_factory.models[base.path]
    m = base.manifest
    kwargs = dict(task="regression", labels=list(m.labels), inputs=m.raw["inputs"], target=m.target,
                  reference=np.zeros((4, 10)), draws=3, seed=0)
    out = tmp_path / "bundle"
    first = export_model(model, out, **kwargs)

    def fail(*_a, **_k):
        raise RuntimeError("disk full (simulated)")

    monkeypatch.setattr(exporter, "_reference_scores", fail)
    with pytest.raises(RuntimeError, match="simulated"):
        export_model(model, out, **kwargs)
    with pytest.raises(RuntimeError, match="simulated"):
        export_model(model, tmp_path / "never", **kwargs)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bundle"]
    assert load_bundle(out).checksum == first.checksum


def test_an_existing_bundle_is_replaced_and_other_directories_are_refused(tiny_bundle_factory, tmp_path: Path) -> None:
    base = tiny_bundle_factory(task="regression")
    model = tiny_bundle_factory.models[base.path]
    kwargs = dict(task="regression", labels=["progression"], inputs=base.manifest.raw["inputs"],
                  reference=np.zeros((4, 10)), draws=3, seed=0)
    out = tmp_path / "bundle"
    export_model(model, out, **kwargs)
    again = export_model(model, out, kind="sampler", **kwargs)
    assert set(again.manifest.graphs) == {"sampler", "means"}
    assert not (out / "stacked.onnx").exists()
    other = tmp_path / "notes"
    other.mkdir()
    (other / "todo.txt").write_text("keep me")
    with pytest.raises(ExportError, match="is not a demur bundle") as info:
        export_model(model, other, **kwargs)
    assert info.value.field == "out" and (other / "todo.txt").read_text() == "keep me"


@pytest.mark.parametrize(("kwargs", "field"), [({"kind": "bogus"}, "kind"), ({"draws": 0}, "draws")])
def test_bad_export_settings_are_named(quick_checkpoints, tmp_path: Path, kwargs: dict, field: str) -> None:
    with pytest.raises(ExportError) as info:
        export_bundle(quick_checkpoints["diabetes"], tmp_path / "b", **kwargs)
    assert info.value.field == field


def test_cli_exports_both_kinds(quick_checkpoints, tmp_path: Path, capsys) -> None:
    """The interface from the foundation issue: demur export DIR --draws N --out B, and --sampler."""
    ckpt = str(quick_checkpoints["digits-mlp"])
    assert main(["export", ckpt, "--draws", "4", "--out", str(tmp_path / "s"), "--seed", "2",
                 "--name", "depot", "--version", "3"]) == 0
    assert "stacked graph with 4 draws" in capsys.readouterr().out
    stacked = load_bundle(tmp_path / "s")
    assert stacked.manifest.graphs["stacked"].draws == 4 and stacked.manifest.model_name == "depot"
    assert main(["export", ckpt, "--sampler", "--out", str(tmp_path / "f")]) == 0
    sampler = load_bundle(tmp_path / "f")
    assert set(sampler.manifest.graphs) == {"sampler", "means"}
    assert sampler.manifest.graphs["sampler"].draws == exporter.DEFAULT_DRAWS
    assert main(["export", str(tmp_path / "missing"), "--out", str(tmp_path / "x")]) == 1
    assert "no checkpoint" in capsys.readouterr().err


