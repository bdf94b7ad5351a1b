"""serve/adapters/engine.py: loading, standardisation at the edge, graph choice, sampler seeding,
the noise fed to graphs that declare it, and the one place onnxruntime errors become
GraphRunError.

References: onnxruntime's own InferenceSession run directly on the graph file
(the bundle contract: input "x" already standardised, output "draws"); the
manifest's standardisation x_std = (x - center) / scale (serve/core/bundle.py);
scipy.stats (binomtest, kstest against norm and uniform) for the noise laws.
"""

from __future__ import annotations

import json
import threading
from pathlib import Path

import numpy as np
import onnxruntime as ort
import pytest

import demur.serve.adapters.engine as engine_mod
from demur.serve.core.bundle import load_bundle, write_manifest
from demur.serve.adapters.engine import Engine, reseed_graph
from demur.serve.errors import ChecksumMismatch, ConfigError, GraphRunError, InvalidInput, NotLoaded


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
    for use in (lambda: engine.run(x), lambda: engine.draws, lambda: engine.kind):
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
    means = Engine(bundle, graph="means").load()
    np.testing.assert_allclose(means.run(x), _direct(bundle, "means", once), atol=1e-5)


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
    assert a._loaded().seed != b._loaded().seed
    assert not np.array_equal(a.run(x), b.run(x))


def test_reseed_rule_matches_the_exporter() -> None:
    """The engine reseeds a graph by the bundle format's one seed rule (``node_seed``), the rule
    older exporters wrote sampler graphs by."""
    import onnx

    from demur.serve.core.noise import node_seed

    from tests.serve._legacy_graphs import legacy_sampler_graph

    exported = legacy_sampler_graph(4, 2, 2, seed=12345)
    data, changed = reseed_graph(legacy_sampler_graph(4, 2, 2, seed=7).SerializeToString(), 12345)

    def seeds(m):
        return [a.f for n in m.graph.node if n.op_type == "RandomNormal" for a in n.attribute if a.name == "seed"]

    assert changed == 4 and seeds(onnx.load_from_string(data)) == seeds(exported)
    assert seeds(exported)[1] == node_seed(12345, 1)


def test_flip_noise_is_fresh_per_call_repeats_under_a_seed_and_differs_between_unseeded_engines(
        tiny_bundle_factory) -> None:
    """The default flip graph draws nothing itself: the engine feeds its noise (export/flip.py)."""
    bundle = tiny_bundle_factory(kind="flip")
    x = _raw_cases(bundle, 3)
    a, b = Engine(bundle, seed=42).load(), Engine(bundle, seed=42).load()
    assert a.kind == "flip" and a._loaded().noise is not None
    seq_a = [a.run(x) for _ in range(3)]
    seq_b = [b.run(x) for _ in range(3)]
    assert seq_a[0].shape == (8, 3, 10)
    assert not np.array_equal(seq_a[0], seq_a[1]) and not np.array_equal(seq_a[0][0], seq_a[0][1])
    for u, v in zip(seq_a, seq_b):
        np.testing.assert_array_equal(u, v)
    np.testing.assert_array_equal(a.load().run(x), seq_a[0])  # reloading restarts the seeded stream
    c, d = Engine(bundle).load(), Engine(bundle).load()
    assert c._loaded().seed != d._loaded().seed
    assert not np.array_equal(c.run(x), d.run(x))


def test_noise_inputs_follow_their_laws(tiny_bundle_factory) -> None:
    """signs: exactly +-1, balanced (scipy.stats.binomtest); normals: scipy.stats.kstest against norm;
    uniforms: in (0, 1] and kstest against uniform; chi-square: kstest against scipy.stats.chi2 with
    the name's degrees of freedom. Over 20 calls of the tiny flip graph."""
    from scipy import stats

    from demur.serve.adapters.engine import _Noise

    engine = Engine(tiny_bundle_factory(kind="flip"), seed=3).load()
    noise = engine._loaded().noise
    assert noise is not None
    # the tiny radial MLP's dense layers draw their outputs (export/local.py): normals and chi-squares;
    # signs are Flipout's law (export/flip.py, conv layers) and uniforms MC dropout's (export/draws.py):
    # added here with shapes of those forms
    assert {name.split(".")[0] for name, _, _ in noise.inputs} == {"normals", "chisquare"}
    chi = [(name, int(name.rsplit(".dof", 1)[1])) for name, law, _ in noise.inputs if law == "chisquare"]
    noise = _Noise([*noise.inputs, ("signs.flip.L9", "signs", (8, 40)), ("uniforms.D0", "uniforms", (8, 1, 16))],
                   seed=3)
    pooled: dict[str, list[np.ndarray]] = {"signs": [], "normals": [], "uniforms": [], "chisquare": []}
    by_name: dict[str, list[np.ndarray]] = {name: [] for name, _ in chi}
    for _ in range(20):
        feed = noise.draw()
        for name, law, shape in noise.inputs:
            assert feed[name].shape == shape and feed[name].dtype == np.float32
            pooled[law].append(feed[name].ravel())
            if name in by_name:
                by_name[name].append(feed[name].ravel())
    for name, dof in chi:
        assert stats.kstest(np.concatenate(by_name[name]), stats.chi2(dof).cdf).pvalue > 1e-3, name
    signs, normals, uniforms = (np.concatenate(pooled[k]) for k in ("signs", "normals", "uniforms"))
    assert set(np.unique(signs)) == {-1.0, 1.0}
    assert stats.binomtest(int((signs > 0).sum()), signs.size, 0.5).pvalue > 1e-3
    assert stats.kstest(normals, stats.norm.cdf).pvalue > 1e-3
    assert uniforms.min() > 0 and uniforms.max() <= 1
    assert stats.kstest(uniforms, stats.uniform.cdf).pvalue > 1e-3


def test_flip_bundles_with_in_graph_noise_still_run(tiny_bundle_factory, copy_bundle) -> None:
    """Bundles exported before the engine fed noise (random nodes in the graph, input x only):
    reseeded at load, fresh per call, repeatable under a seed."""
    import onnx

    from tests.serve._legacy_graphs import legacy_sampler_graph

    source = tiny_bundle_factory(kind="flip")
    path = copy_bundle(source)
    onnx.save_model(legacy_sampler_graph(64, 10, 8, seed=0), str(path / "flip.onnx"))
    write_manifest(path, json.loads((path / "manifest.json").read_text()))  # re-digest and re-seal
    bundle = load_bundle(path)
    x = _raw_cases(bundle, 3)
    a = Engine(bundle, seed=5).load()
    assert a._loaded().noise is None
    first = a.run(x)
    assert first.shape == (8, 3, 10) and not np.array_equal(first, a.run(x))
    np.testing.assert_array_equal(Engine(bundle, seed=5).load().run(x), first)


def test_a_graph_input_the_engine_cannot_fill_is_refused_at_load(tiny_bundle_factory, copy_bundle) -> None:
    """Noise inputs are named by law; any other extra input is UnsupportedFormat naming the input."""
    import onnx
    from onnx import TensorProto, helper

    from demur.serve.errors import UnsupportedFormat

    path = copy_bundle(tiny_bundle_factory())
    model = onnx.load(str(path / "stacked.onnx"))
    model.graph.input.append(helper.make_tensor_value_info("temperature", TensorProto.FLOAT, [1]))
    onnx.save_model(model, str(path / "stacked.onnx"))
    write_manifest(path, json.loads((path / "manifest.json").read_text()))
    engine = Engine(load_bundle(path))
    with pytest.raises(UnsupportedFormat, match="input 'temperature'") as info:
        engine.load()
    assert info.value.field == "graphs.stacked" and not engine.loaded


def _run_concurrently(engine: Engine, x: np.ndarray, threads: int = 4, calls: int = 5) -> list[np.ndarray]:
    """``engine.run(x)`` from ``threads`` threads, ``calls`` times each; every result, in arrival order."""
    results: list[np.ndarray] = []
    lock = threading.Lock()

    def work() -> None:
        for _ in range(calls):
            out = engine.run(x)
            with lock:
                results.append(out)

    workers = [threading.Thread(target=work) for _ in range(threads)]
    for t in workers:
        t.start()
    for t in workers:
        t.join(timeout=60)
    return results


def test_stacked_engine_is_deterministic_and_thread_safe(tiny_bundle_factory) -> None:
    """onnxruntime sessions allow concurrent run(); 4 threads x 5 calls equal the serial result."""
    engine = Engine(tiny_bundle_factory(arch="conv")).load()
    x = _raw_cases(engine.bundle, 4)
    expected = engine.run(x)
    results = _run_concurrently(engine, x)
    assert len(results) == 20
    for r in results:
        np.testing.assert_array_equal(r, expected)


def test_flip_engine_runs_concurrently_with_distinct_draws(tiny_bundle_factory) -> None:
    """One noise generator shared by threads (numpy holds its lock per call): 4 threads x 5 calls,
    every result finite and different from every other."""
    engine = Engine(tiny_bundle_factory(kind="flip"), seed=9).load()
    x = _raw_cases(engine.bundle, 2)
    results = _run_concurrently(engine, x)
    assert len(results) == 20 and all(np.isfinite(r).all() for r in results)
    assert len({r.tobytes() for r in results}) == 20


# -- errors ------------------------------------------------------------------------------
@pytest.mark.parametrize("exc_name", ["Fail", "InvalidArgument", "RuntimeException", "InvalidGraph", "EPFail"])
def test_each_onnxruntime_error_maps_to_graph_run_error(exc_name: str) -> None:
    """The one mapping (demur.serve.adapters.engine._guard): every onnxruntime exception class -> GraphRunError."""
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
        engine._run(engine._loaded().session, np.zeros((2, 63), np.float32), "stacked", None)


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


def test_serve_engine_does_not_import_torch() -> None:
    source = Path(engine_mod.__file__).read_text(encoding="utf-8")
    assert "import torch" not in source and "from export" not in source
