"""The shared contract every exported bundle must pass, run for every export kind
(as scikit-learn's ``check_estimator`` runs one suite over every estimator).

For each bundle: the manifest's required sections; the graph files' SHA-256
(hashlib) against the manifest; each graph's ONNX interface (input ``x``
float32 ``[B, *shape]`` with a free batch axis, output ``draws`` float32
``[S, B, K]``) as onnxruntime reports it and as it runs for B = 1 and B = 5;
and, where the torch model is at hand, ONNX against torch within 1e-4 (max abs
difference; reference ``demur.export.layers.forward_draws`` on the recorded draws,
and the network of the posterior means).

Add a new export kind or layer type to ``CASES`` (see DEVELOPERS.md).
"""

from __future__ import annotations

import hashlib
import math

import numpy as np
import onnxruntime as ort
import pytest
import torch

from demur.serve.core.bundle import FORMAT_NAME, FORMAT_VERSION, GRAPH_KINDS, SCORES
from demur.serve.adapters.engine import Engine

TOL = 1e-4

TINY = [  # (task, kind, posterior, arch)
    ("classification", "stacked", "radial", "mlp"),
    ("classification", "stacked", "gaussian", "conv"),
    ("classification", "sampler", "radial", "conv"),
    ("classification", "sampler", "gaussian", "mlp"),
    ("regression", "stacked", "radial", "mlp"),
    ("regression", "sampler", "radial", "mlp"),
]
TRAINED = ["demo_bundle", "demo_sampler_bundle", "diabetes_bundle"]
CASES = [pytest.param(("tiny", c), id="tiny-" + "-".join(c)) for c in TINY] + [
    pytest.param(("trained", name), id=name, marks=pytest.mark.slow) for name in TRAINED
]


@pytest.fixture(params=CASES)
def exported(request, tiny_bundle_factory):
    """(bundle, torch model or None) for one contract case."""
    origin, what = request.param
    if origin == "tiny":
        task, kind, posterior, arch = what
        bundle = tiny_bundle_factory(task=task, kind=kind, posterior=posterior, arch=arch)
        return bundle, tiny_bundle_factory.models[bundle.path]
    from demur.export.training import load_checkpoint

    bundle = request.getfixturevalue(what)
    checkpoint = request.getfixturevalue("diabetes_checkpoint" if what.startswith("diabetes") else "demo_checkpoint")
    return bundle, load_checkpoint(checkpoint)[0]


def _raw_cases(bundle, n: int) -> np.ndarray:
    spec = bundle.manifest.inputs
    return np.random.default_rng(1).uniform(spec.low, spec.high, size=(n, spec.size))


def test_manifest_sections(exported) -> None:
    bundle, _ = exported
    m, raw = bundle.manifest, bundle.manifest.raw
    assert raw["format"] == FORMAT_NAME and raw["format_version"] == FORMAT_VERSION
    assert m.model_name and m.model_version and m.created
    assert m.task in ("classification", "regression")
    assert len(m.labels) >= 2 if m.task == "classification" else len(m.labels) == 1
    spec = m.inputs
    assert spec.dtype == "float32" and len(spec.names) == spec.size == math.prod(spec.shape)
    assert all(s > 0 for s in spec.scale) and all(lo <= hi for lo, hi in zip(spec.low, spec.high))
    assert m.posterior["family"] in ("radial", "gaussian") and m.posterior["prior_scale"] > 0
    assert isinstance(m.posterior["params"], int) and m.posterior["params"] > 0
    assert set(m.graphs) <= set(GRAPH_KINDS) and "means" in m.graphs and m.graphs["means"].draws == 1
    assert any(k in m.graphs for k in ("stacked", "sampler", "flip"))
    for kind in ("stacked", "sampler", "flip"):
        if kind in m.graphs:
            assert m.graphs[kind].draws >= 1 and isinstance(m.graphs[kind].seed, int)
    assert m.decision.score in SCORES and math.isfinite(m.decision.threshold) and m.decision.threshold >= 0
    assert m.decision.calibration is None or isinstance(m.decision.calibration, dict)
    assert 0 < m.interval_level < 1
    assert {"center", "scale"} <= set(m.target) and m.target["scale"] > 0
    features, score = m.drift_reference["features"], m.drift_reference["score"]
    assert len(features["edges"]) == len(features["fractions"]) == spec.size
    assert score["name"] == m.decision.score and score["n"] >= 1 and score["values"] == sorted(score["values"])


def test_checksums(exported) -> None:
    """Reference: hashlib.sha256 of each file's bytes; the seal is the manifest's digest."""
    bundle, _ = exported
    assert hashlib.sha256((bundle.path / "manifest.json").read_bytes()).hexdigest() == bundle.checksum
    assert (bundle.path / "manifest.sha256").read_text().strip() == bundle.checksum
    for kind, entry in bundle.manifest.graphs.items():
        assert hashlib.sha256(bundle.graph_path(kind).read_bytes()).hexdigest() == entry.sha256


def test_graph_interfaces(exported) -> None:
    """onnxruntime's view of every graph: x float32[B, *shape] (B free), draws float32[S, B, K]."""
    bundle, _ = exported
    m = bundle.manifest
    for kind, entry in m.graphs.items():
        sess = ort.InferenceSession(str(bundle.graph_path(kind)), providers=["CPUExecutionProvider"])
        (x,) = sess.get_inputs()
        assert x.name == "x" and x.type == "tensor(float)"
        assert isinstance(x.shape[0], str) and list(x.shape[1:]) == list(m.inputs.shape)
        out = sess.get_outputs()[0]
        assert out.name == "draws" and out.type == "tensor(float)"
        assert out.shape[0] == entry.draws and out.shape[2] == m.outputs
        for b in (1, 5):
            y = sess.run(["draws"], {"x": np.zeros((b, *m.inputs.shape), np.float32)})[0]
            assert y.shape == (entry.draws, b, m.outputs) and y.dtype == np.float32 and np.isfinite(y).all()


def test_engine_runs_every_graph(exported) -> None:
    bundle, _ = exported
    x = _raw_cases(bundle, 3)
    for kind in bundle.manifest.graphs:
        engine = Engine(bundle, graph=kind, seed=0).load()
        assert engine.run(x).shape == (bundle.manifest.graphs[kind].draws, 3, bundle.manifest.outputs)


def test_onnx_matches_torch(exported) -> None:
    """Means graph vs the torch network of the means; stacked graph vs forward_draws on the
    draws sample_network makes from the recorded seed. Both within 1e-4."""
    from demur.export.layers import forward_draws, sample_network

    bundle, model = exported
    m = bundle.manifest
    x_raw = _raw_cases(bundle, 6)
    engine = Engine(bundle, graph="means").load()
    x_std = torch.from_numpy(engine.standardise(x_raw))
    with torch.no_grad():
        h = x_std
        for module in model:
            h = module.forward_mean(h) if hasattr(module, "forward_mean") else module(h)
    assert np.abs(engine.run(x_raw) - h.numpy()[None]).max() <= TOL
    if "stacked" in m.graphs:
        entry = m.graphs["stacked"]
        draws = sample_network(model, entry.draws, torch.Generator().manual_seed(entry.seed))
        got = Engine(bundle, graph="stacked").load().run(x_raw)
        assert np.abs(got - forward_draws(model, x_std, draws).numpy()).max() <= TOL
