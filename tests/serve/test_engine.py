"""serve/engine.py: loading, standardisation at the edge, graph choice, sampler seeding,
and the one place onnxruntime errors become GraphRunError.

References: onnxruntime's own InferenceSession run directly on the graph file
(the bundle contract: input "x" already standardised, output "draws"); the
manifest's standardisation x_std = (x - center) / scale (serve/bundle.py).
"""

from __future__ import annotations

import json
import threading
from pathlib import Path

import numpy as np
import onnxruntime as ort
import pytest

import serve.engine as engine_mod
from serve.bundle import load_bundle, write_manifest
from serve.engine import Engine, reseed_graph
from serve.errors import ChecksumMismatch, ConfigError, GraphRunError, InvalidInput, NotLoaded


def _raw_cases(bundle, n: int = 5, seed: int = 0) -> np.ndarray:
    spec = bundle.manifest.inputs
    rng = np.random.default_rng(seed)
    return rng.uniform(spec.low, spec.high, size=(n, spec.size))


def _direct(bundle, kind: str, x_std: np.ndarray) -> np.ndarray:
    sess = ort.InferenceSession(str(bundle.graph_path(kind)), providers=["CPUExecutionProvider"])
    return sess.run(["draws"], {"x": x_std.astype(np.float32)})[0]


def test_using_the_engine_before_load_raises_not_loaded(tiny_bundle_factory) -> None:
    """Constructors store, loading is explicit (scikit-learn's check_is_fitted pattern)."""
    engine = Engine(tiny_bundle_factory())
    x = _raw_cases(engine.bundle, 1)
    for use in (lambda: engine.run(x), lambda: engine.run_means(x), lambda: engine.draws, lambda: engine.kind):
        with pytest.raises(NotLoaded, match="call load"):
            use()
    assert not engine.loaded
    assert engine.task == "classification" and engine.checksum == engine.bundle.checksum


@pytest.mark.parametrize("arch", ["mlp", "conv"])
def test_standardisation_is_applied_once(tiny_bundle_factory, arch: str) -> None:
    """Reference: onnxruntime on the graph with (x - center) / scale computed here from the manifest."""
    bundle = tiny_bundle_factory(arch=arch)
    spec = bundle.manifest.inputs
    engine = Engine(bundle, graph="stacked").load()
    x = _raw_cases(bundle, 6)
    center, scale = np.asarray(spec.center), np.asarray(spec.scale)
    once = ((x - center) / scale).reshape(6, *spec.shape)
    twice = (((x - center) / scale - center) / scale).reshape(6, *spec.shape)
    got = engine.run(x)
    assert got.shape == (8, 6, 10) and got.dtype == np.float32
    np.testing.assert_allclose(got, _direct(bundle, "stacked", once), atol=1e-5)
    assert np.abs(got - _direct(bundle, "stacked", twice)).max() > 1e-3
    assert np.abs(got - _direct(bundle, "stacked", x.reshape(6, *spec.shape))).max() > 1e-3
    np.testing.assert_allclose(engine.run(x.reshape(6, *spec.shape)), got, atol=0)  # [B, *shape] == [B, F]
    np.testing.assert_allclose(engine.run_means(x), _direct(bundle, "means", once), atol=1e-5)


def test_wrong_input_shape_is_invalid_input_naming_x(tiny_bundle_factory) -> None:
    engine = Engine(tiny_bundle_factory()).load()
    with pytest.raises(InvalidInput, match=r"got \[2, 63\]") as info:
        engine.run(np.zeros((2, 63)))
    assert info.value.field == "x"


def test_auto_picks_sampler_then_stacked(tiny_bundle_factory) -> None:
    assert Engine(tiny_bundle_factory(kind="sampler")).load().kind == "sampler"
    assert Engine(tiny_bundle_factory(kind="stacked")).load().kind == "stacked"
    means = Engine(tiny_bundle_factory(), graph="means").load()
    assert means.kind == "means" and means.draws == 1
    with pytest.raises(ConfigError, match="no 'sampler' graph; it has: means, stacked"):
        Engine(tiny_bundle_factory(kind="stacked"), graph="sampler").load()
    with pytest.raises(ConfigError, match="graph must be one of"):
        Engine(tiny_bundle_factory(), graph="bogus")


def test_session_options_are_explicit(tiny_bundle_factory) -> None:
    """Threads and optimisation level as configured (onnxruntime.SessionOptions)."""
    opts = Engine(tiny_bundle_factory(), intra_threads=2, inter_threads=1)._options()
    assert opts.intra_op_num_threads == 2 and opts.inter_op_num_threads == 1
    assert opts.graph_optimization_level == ort.GraphOptimizationLevel.ORT_ENABLE_ALL
    assert opts.execution_mode == ort.ExecutionMode.ORT_SEQUENTIAL


def test_sampler_gives_new_draws_per_call_and_repeats_under_a_fixed_seed(tiny_bundle_factory) -> None:
    """Fixed seed: the same sequence of draws in fresh engines; each call within one engine differs."""
    bundle = tiny_bundle_factory(kind="sampler")
    x = _raw_cases(bundle, 3)
    a, b = Engine(bundle, seed=42).load(), Engine(bundle, seed=42).load()
    seq_a = [a.run(x) for _ in range(3)]
    seq_b = [b.run(x) for _ in range(3)]
    assert not np.array_equal(seq_a[0], seq_a[1])
    for u, v in zip(seq_a, seq_b):
        np.testing.assert_array_equal(u, v)
    assert not np.array_equal(Engine(bundle, seed=43).load().run(x), seq_a[0])


def test_two_engines_without_a_seed_draw_different_streams(tiny_bundle_factory) -> None:
    """Without a configured seed each load() takes one from os.urandom, so workers do not repeat each other."""
    bundle = tiny_bundle_factory(kind="sampler")
    x = _raw_cases(bundle, 3)
    a, b = Engine(bundle).load(), Engine(bundle).load()
    assert a.seed_in_use != b.seed_in_use
    assert not np.array_equal(a.run(x), b.run(x))


def test_reseed_rule_matches_the_exporter() -> None:
    """serve/ cannot import export/, so the seed rule lives twice; this keeps them in step."""
    from export.graphs import node_seed, plan_from_model, sampler_graph
    from export.layers import build_model

    plan = plan_from_model(build_model("mlp", (4,), 2, "radial", hidden=(3,)), (4,))
    exported = sampler_graph(plan, 2, seed=12345)
    data, changed = reseed_graph(sampler_graph(plan, 2, seed=7).SerializeToString(), 12345)
    import onnx

    def seeds(m):
        return [a.f for n in m.graph.node if n.op_type == "RandomNormal" for a in n.attribute if a.name == "seed"]

    assert changed == 8 and seeds(onnx.load_from_string(data)) == seeds(exported)
    assert seeds(exported)[1] == node_seed(12345, 1)


def test_stacked_engine_is_deterministic_and_thread_safe(tiny_bundle_factory) -> None:
    """onnxruntime sessions allow concurrent run(); 4 threads x 5 calls equal the serial result."""
    engine = Engine(tiny_bundle_factory(arch="conv")).load()
    x = _raw_cases(engine.bundle, 4)
    expected = engine.run(x)
    results: list[np.ndarray] = []
    lock = threading.Lock()

    def work() -> None:
        for _ in range(5):
            out = engine.run(x)
            with lock:
                results.append(out)

    threads = [threading.Thread(target=work) for _ in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=60)
    assert len(results) == 20
    for r in results:
        np.testing.assert_array_equal(r, expected)


# -- errors ------------------------------------------------------------------------------
@pytest.mark.parametrize("exc_name", ["Fail", "InvalidArgument", "RuntimeException", "InvalidGraph", "EPFail"])
def test_each_onnxruntime_error_maps_to_graph_run_error(exc_name: str) -> None:
    """The one mapping (serve.engine._guard): every onnxruntime exception class -> GraphRunError."""
    cls = getattr(ort.capi.onnxruntime_pybind11_state, exc_name)

    def boom():
        raise cls("kaboom")

    with pytest.raises(GraphRunError, match=f"{exc_name}: kaboom") as info:
        engine_mod._guard("run the test graph", boom)
    assert isinstance(info.value.__cause__, cls) and info.value.status == 500


def test_a_real_runtime_failure_becomes_graph_run_error(tiny_bundle_factory) -> None:
    """onnxruntime refuses a wrongly shaped standardised input (InvalidArgument) -> GraphRunError."""
    engine = Engine(tiny_bundle_factory()).load()
    with pytest.raises(GraphRunError, match="InvalidArgument"):
        engine.run_standardised(np.zeros((2, 63), np.float32))


def test_a_graph_onnxruntime_cannot_open_fails_load_and_nothing_is_loaded(tiny_bundle_factory, copy_bundle) -> None:
    """A graph file that passes its checksum but is not ONNX: load() raises GraphRunError, engine stays unloaded."""
    path = copy_bundle(tiny_bundle_factory())
    (path / "stacked.onnx").write_bytes(b"not an onnx graph")
    raw = json.loads((path / "manifest.json").read_text())
    write_manifest(path, raw)  # re-digest and re-seal
    engine = Engine(load_bundle(path))
    with pytest.raises(GraphRunError, match="open the stacked graph"):
        engine.load()
    assert not engine.loaded


def test_a_graph_changed_after_the_bundle_was_loaded_is_refused(tiny_bundle_factory, copy_bundle) -> None:
    """The engine re-digests the bytes it hands to onnxruntime (SHA-256, hashlib)."""
    path = copy_bundle(tiny_bundle_factory())
    bundle = load_bundle(path)
    data = bytearray((path / "stacked.onnx").read_bytes())
    data[len(data) // 2] ^= 0x01
    (path / "stacked.onnx").write_bytes(bytes(data))
    engine = Engine(bundle)
    with pytest.raises(ChecksumMismatch) as info:
        engine.load()
    assert info.value.field == "graphs.stacked.sha256" and not engine.loaded


def test_all_is_exact() -> None:
    assert set(engine_mod.__all__) == {"GRAPH_CHOICES", "Engine", "reseed_graph"}


def test_serve_engine_does_not_import_torch() -> None:
    source = Path(engine_mod.__file__).read_text(encoding="utf-8")
    assert "import torch" not in source and "from export" not in source
