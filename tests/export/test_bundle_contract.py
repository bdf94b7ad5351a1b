"""The shared contract every exported bundle must pass, run for every export kind
(as scikit-learn's ``check_estimator`` runs one suite over every estimator).

For each bundle: the manifest's required sections; the graph files' SHA-256
(hashlib) against the manifest; each graph's ONNX interface (input ``x``
float32 ``[B, *shape]`` with a free batch axis, output ``draws`` float32
``[S, B, K]``) as onnxruntime reports it and as it runs for B = 1 and B = 5;
and, where the torch model is at hand, ONNX against torch within 1e-4 (relative to
max(|torch|, 1)); reference: the torch module run once per draw with that draw's
weights and masks (``demur.export.draws.reference_draws``), fed the same noise.

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
from demur.serve.core.noise import NOISE_LAWS
from demur.serve.adapters.engine import Engine

TOL = 1e-4

TINY = [  # (task, kind, posterior, arch)
    ("classification", "stacked", "radial", "mlp"),
    ("classification", "stacked", "gaussian", "conv"),
    ("classification", "sampler", "radial", "conv"),
    ("classification", "sampler", "gaussian", "mlp"),
    ("regression", "stacked", "radial", "mlp"),
    ("regression", "sampler", "radial", "mlp"),
    ("classification", "flip", "radial", "conv"),
    ("classification", "flip", "gaussian", "mlp"),
]
OWN = ["conv-resnet-stacked", "conv-resnet-flip", "ensemble", "mc-dropout-sampler", "mc-dropout-stacked",
       "conv-backbone-head-sampler", "conv-backbone-dropout-sampler", "conv-shared-backbone-ensemble"]
TRAINED = ["demo_bundle", "demo_sampler_bundle", "diabetes_bundle"]
CASES = [pytest.param(("tiny", c), id="tiny-" + "-".join(c)) for c in TINY] + [
    pytest.param(("own", c), id="own-" + c) for c in OWN] + [
    pytest.param(("trained", name), id=name, marks=pytest.mark.slow) for name in TRAINED
]


@pytest.fixture(scope="module")
def own_bundles(tmp_path_factory):
    """Users' own modules through export_model (tests/export/_own_models.py), built once."""
    from sklearn.datasets import load_digits

    from demur.export import export_model, input_spec

    from tests.export._own_models import (backbone_dropout, backbone_head, depot_conv_net, dropout_mlp, plain_mlp,
                                          shared_backbone_ensemble)

    x = load_digits().data.astype(np.float64)
    cache = {}
    # Bayesian last layers, MC dropout in a head, and an ensemble sharing one frozen backbone: the
    # shared-computation graphs (export/shared.py) under the same contract
    special = {"conv-backbone-head-sampler": backbone_head, "conv-backbone-dropout-sampler": backbone_dropout,
               "conv-shared-backbone-ensemble": lambda: shared_backbone_ensemble(3, variational=True)}

    def make(what: str):
        if what not in cache:
            shape = [1, 8, 8] if what.startswith("conv") else None
            model = (special[what]() if what in special else depot_conv_net() if what.startswith("conv")
                     else [plain_mlp(seed=s) for s in range(3)] if what == "ensemble" else dropout_mlp())
            ensemble = what.endswith("ensemble")
            bundle = export_model(model, tmp_path_factory.mktemp("own") / what, inputs=input_spec(x[:800], shape=shape),
                                  kind=what.rsplit("-", 1)[-1] if not ensemble else "stacked", draws=6,
                                  reference=x[800:900], seed=5, name=what)
            cache[what] = (bundle, model)
        return cache[what]

    return make


@pytest.fixture(params=CASES)
def exported(request, tiny_bundle_factory):
    """(bundle, torch model or None) for one contract case."""
    origin, what = request.param
    if origin == "own":
        return request.getfixturevalue("own_bundles")(what)
    if origin == "tiny":
        task, kind, posterior, arch = what
        bundle = tiny_bundle_factory(task=task, kind=kind, posterior=posterior, arch=arch)
        return bundle, tiny_bundle_factory.models[bundle.path]
    from demur.export.checkpoints import load_checkpoint

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
    assert m.posterior["family"] in ("radial", "gaussian", "ensemble", "mc_dropout")
    if m.posterior["family"] in ("radial", "gaussian"):
        assert m.posterior["prior_scale"] > 0
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
        x, *noise = sess.get_inputs()
        assert x.name == "x" and x.type == "tensor(float)"
        assert all(n.name.split(".")[0] in NOISE_LAWS and n.type == "tensor(float)"
                   and all(isinstance(d, int) for d in n.shape) for n in noise)   # filled by the engine
        assert isinstance(x.shape[0], str) and list(x.shape[1:]) == list(m.inputs.shape)
        out = sess.get_outputs()[0]
        assert out.name == "draws" and out.type == "tensor(float)"
        assert out.shape[0] == entry.draws and out.shape[2] == m.outputs
        for b in (1, 5):
            feed = {n.name: np.full(n.shape, 0.5 if n.name.startswith("uniforms") else 1.0, np.float32)
                    for n in noise}
            y = sess.run(["draws"], {"x": np.zeros((b, *m.inputs.shape), np.float32), **feed})[0]
            assert y.shape == (entry.draws, b, m.outputs) and y.dtype == np.float32 and np.isfinite(y).all()


def test_engine_runs_every_graph(exported) -> None:
    bundle, _ = exported
    x = _raw_cases(bundle, 3)
    for kind in bundle.manifest.graphs:
        engine = Engine(bundle, graph=kind, seed=0).load()
        assert engine.run(x).shape == (bundle.manifest.graphs[kind].draws, 3, bundle.manifest.outputs)


def test_onnx_matches_torch(exported) -> None:
    """Every graph vs the torch module run once per draw on the same draws (the stacked weights
    sample_network makes from the recorded seed, or the same fed noise); within 1e-4."""
    from demur.export.draws import DrawNetwork, draw_noise, reference_draws

    bundle, model = exported
    m = bundle.manifest
    x_raw = _raw_cases(bundle, 6)
    x_std = Engine(bundle, graph="means").load().standardise(x_raw)
    for kind, entry in m.graphs.items():
        net = DrawNetwork(model, kind, entry.draws, seed=entry.seed or 0, input_shape=m.inputs.shape, task=m.task)
        noise = draw_noise(net.noise, np.random.default_rng(3))
        sess = ort.InferenceSession(str(bundle.graph_path(kind)), providers=["CPUExecutionProvider"])
        got = sess.run(["draws"], {"x": x_std, **noise})[0]
        want = reference_draws(net, torch.from_numpy(x_std), noise).numpy()
        assert (np.abs(got - want) / np.maximum(np.abs(want), 1.0)).max() <= TOL
