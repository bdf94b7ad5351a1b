"""The engine: a bundle's ONNX graphs opened in onnxruntime on CPU, returning Monte-Carlo draws.

``run(x_raw)`` takes raw inputs ``float[B, *inputs.shape]`` (or ``[B, F]``
flat), standardises them once here with the manifest's ``center``/``scale``
(the graphs expect standardised input and nothing else standardises), runs
the chosen graph and returns ``float32[S, B, K]``: logits per draw, or
(mean, log-variance) per draw for regression.

Graph choice: ``"auto"`` takes the sampler graph if the bundle has one (fresh
weights on every call), else the stacked draws; ``"stacked"``, ``"sampler"``,
``"means"`` and ``"flip"`` pick one by name.

Noise fed by the engine. A graph may declare float32 inputs besides ``x``
whose values the engine draws afresh on every call (the default flip graph,
export/flip.py, draws nothing itself: onnxruntime's generators cost 6-17 ns a
number; numpy fills the bench MLP's 60k noise numbers at S = 32 in about
43 us, mostly signs from raw bits). The input's name says its law, by the
part before the first dot: ``signs`` uniform +-1 (one random bit each),
``normals`` N(0, 1), ``uniforms`` uniform on (0, 1], ``chisquare`` chi-square
with the degrees of freedom the name ends with (``.dof<k>``); the shape is the
graph's, fixed. ``load()`` reads them from the session, so the bundle needs no
extra manifest field, and a graph with an input of another law is refused
(``UnsupportedFormat``). The numbers come from one ``numpy`` PCG64 generator
per load, seeded like the random nodes below; it is thread-safe (numpy holds
its lock per call), so ``run`` still needs no lock of its own.

Seeding the sampler graph. onnxruntime's RandomNormal behaves like this: with
a ``seed`` attribute its stream is reproducible across sessions but moves on
from call to call within one session; without a seed, two sessions in one
process repeat each other, and sessions created before a fork repeat the same
draws in every worker. So ``load()`` rewrites every RandomNormal seed in
memory before opening the session: from ``seed`` when one is configured
(tests, replays), otherwise from ``os.urandom`` at load time. **Call
``load()`` after any fork** (in each worker, e.g. gunicorn's ``post_fork``),
never in a parent whose sessions the children would inherit. The same seed
starts the noise generator, so the default flip graph repeats under a
configured seed and differs between workers without one.

onnxruntime sessions are thread-safe for ``run``; the engine's loaded state is
one immutable object swapped in by ``load()``, so ``run`` needs no lock.

Example::

    engine = Engine(load_bundle("build/digits-radial"), intra_threads=1)
    engine.load()
    draws = engine.run(pixels)          # float32[S, B, 10]
"""

from __future__ import annotations

import hashlib
import os
import threading
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, TypeVar

import numpy as np
import onnxruntime as ort

from demur.serve.core.bundle import FRESH_KINDS, Bundle, Manifest
from demur.serve.core.noise import NOISE_LAWS, SEED_MODULUS, node_seed, noise_dof, noise_law
from demur.serve.config import GRAPH_CHOICES
from demur.serve.errors import ChecksumMismatch, ConfigError, GraphRunError, InvalidInput, NotLoaded, UnsupportedFormat

__all__ = ["Engine", "reseed_graph"]


_RANDOM_OPS = ("RandomNormal", "RandomNormalLike", "RandomUniform", "RandomUniformLike", "Multinomial")
_SIGN_BYTES = np.where(np.unpackbits(np.arange(256, dtype=np.uint8)[:, None], axis=1), -1.0, 1.0).astype(np.float32)
"""float32[256, 8]: row b is the 8 bits of byte b as +-1 (a uniform byte gives 8 uniform signs)."""

_T = TypeVar("_T")


def _ort_errors() -> tuple[type[BaseException], ...]:
    state = ort.capi.onnxruntime_pybind11_state
    found = [v for v in vars(state).values() if isinstance(v, type) and issubclass(v, Exception)]
    return tuple(found) + (RuntimeError,)


_ORT_ERRORS = _ort_errors()


def _guard(what: str, fn: Callable[[], _T]) -> _T:
    """The one place onnxruntime exceptions become ``GraphRunError``."""
    try:
        return fn()
    except _ORT_ERRORS as exc:
        raise GraphRunError(f"onnxruntime failed to {what}: {type(exc).__name__}: {exc}", field="graph") from exc


def reseed_graph(data: bytes, seed: int) -> tuple[bytes, int]:
    """Rewrite the seed of every random node of a serialised ONNX model; return (bytes, nodes changed).

    Node ``i`` (in graph order) gets ``node_seed(seed, i)``, the bundle format's seed rule
    (serve/core/bundle.py) the exporter wrote them by, so distinct nodes keep distinct streams. Needs the ``onnx`` package (only for graphs that sample).
    """
    import onnx  # only sampler graphs need it; stacked bundles run without

    model = onnx.load_from_string(data)
    changed = 0
    for node in model.graph.node:
        if node.op_type not in _RANDOM_OPS:
            continue
        value = node_seed(seed, changed)
        for attr in node.attribute:
            if attr.name == "seed":
                attr.f = value
                break
        else:
            node.attribute.append(onnx.helper.make_attribute("seed", value))
        changed += 1
    return model.SerializeToString(), changed


class _Noise:
    """The noise inputs of one session and the generator that fills them (one per ``load()``)."""

    def __init__(self, inputs: list[tuple[str, str, tuple[int, ...]]], seed: int | None) -> None:
        self.inputs = inputs                                   # (name, law, shape), in graph order
        self.counts = dict.fromkeys(NOISE_LAWS, 0)
        self._parts: list[tuple[str, str, int, int, tuple[int, ...]]] = []  # name, law, start, end, shape
        self._chi: list[tuple[str, int, tuple[int, ...]]] = []              # name, degrees of freedom, shape
        for name, law, shape in inputs:
            if law == "chisquare":
                self._chi.append((name, int(noise_dof(name) or 0), shape))
                continue
            size = int(np.prod(shape))
            self._parts.append((name, law, self.counts[law], self.counts[law] + size, shape))
            self.counts[law] += size
        self.rng = np.random.Generator(np.random.PCG64(seed))  # 64 random bits per raw value; None: OS entropy

    @classmethod
    def of(cls, session: Any, kind: str, seed: int | None) -> _Noise | None:
        """The session's noise inputs (``None`` if it has only ``x``); refuses inputs it cannot fill."""
        found = []
        for arg in session.get_inputs():
            if arg.name == "x":
                continue
            law = noise_law(arg.name)
            shape = tuple(arg.shape)
            if (law not in NOISE_LAWS or arg.type != "tensor(float)" or not all(isinstance(d, int) for d in shape)
                    or (law == "chisquare" and noise_dof(arg.name) is None)):
                raise UnsupportedFormat(
                    f"the {kind} graph has an input '{arg.name}' ({arg.type}, shape {list(shape)}) that this engine "
                    f"cannot fill: noise inputs are float32 of fixed shape named {', '.join(NOISE_LAWS)}; re-export "
                    "the bundle with this version of demur", field=f"graphs.{kind}")
            found.append((arg.name, law, shape))
        return cls(found, seed) if found else None

    def draw(self) -> dict[str, np.ndarray]:
        """Fresh values for every noise input: float32 arrays of the graph's shapes."""
        blocks = {}
        n = self.counts["signs"]
        if n:
            random_bytes = self.rng.bit_generator.random_raw((n + 63) // 64).view(np.uint8)
            blocks["signs"] = _SIGN_BYTES.take(random_bytes, axis=0).reshape(-1)[:n]   # 8 signs per random byte
        if self.counts["normals"]:
            blocks["normals"] = self.rng.standard_normal(self.counts["normals"], dtype=np.float32)
        if self.counts["uniforms"]:
            u = self.rng.random(self.counts["uniforms"], dtype=np.float32)   # [0, 1) in steps of 2**-24
            blocks["uniforms"] = np.subtract(np.float32(1.0), u, out=u)     # (0, 1]: logs stay finite
        out = {name: blocks[law][start:end].reshape(shape) for name, law, start, end, shape in self._parts}
        for name, dof, shape in self._chi:
            out[name] = self.rng.chisquare(dof, shape).astype(np.float32)
        return out


@dataclass(frozen=True)
class _Loaded:
    kind: str
    session: Any
    draws: int
    seed: int | None
    noise: _Noise | None
    center: np.ndarray
    scale: np.ndarray


class Engine:
    """Runs one bundle's graphs. Constructing stores settings; ``load()`` opens the sessions.

    ``graph``: one of ``GRAPH_CHOICES``. ``intra_threads``/``inter_threads``:
    onnxruntime thread pools per session (1 each suits one worker process per
    core). ``seed``: fixes the sampler graph's noise (tests); ``None`` draws a
    fresh seed from ``os.urandom`` at every ``load()``.
    """

    def __init__(
        self,
        bundle: Bundle,
        *,
        graph: str = "auto",
        intra_threads: int = 1,
        inter_threads: int = 1,
        seed: int | None = None,
    ) -> None:
        if graph not in GRAPH_CHOICES:
            raise ConfigError(f"graph must be one of {', '.join(GRAPH_CHOICES)}; got '{graph}'", field="graph")
        for name, value in (("intra_threads", intra_threads), ("inter_threads", inter_threads)):
            if not isinstance(value, int) or isinstance(value, bool) or value < 0:
                raise ConfigError(f"{name} must be an integer >= 0 (0 = onnxruntime's default); got {value!r}",
                                  field=name)
        self.bundle = bundle
        self.graph = graph
        self.intra_threads = intra_threads
        self.inter_threads = inter_threads
        self.seed = seed
        self._state: _Loaded | None = None
        self._lock = threading.Lock()

    # -- loading ----------------------------------------------------------------
    def _choose(self) -> str:
        graphs = self.bundle.manifest.graphs
        if self.graph == "auto":
            for kind in ("sampler", "stacked", "flip", "means"):
                if kind in graphs:
                    return kind
        if self.graph not in graphs:
            have = ", ".join(sorted(graphs))
            raise ConfigError(f"bundle has no '{self.graph}' graph; it has: {have}", field="graph")
        return self.graph

    def _options(self) -> ort.SessionOptions:
        opts = ort.SessionOptions()
        opts.intra_op_num_threads = self.intra_threads
        opts.inter_op_num_threads = self.inter_threads
        opts.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
        opts.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
        opts.log_severity_level = 3  # errors only; warnings would go to stderr per session
        return opts

    def _read(self, kind: str) -> bytes:
        """Graph bytes, re-checked against the manifest digest (the file may have changed since loading)."""
        entry = self.bundle.manifest.graphs[kind]
        path = self.bundle.graph_path(kind)
        try:
            data = path.read_bytes()
        except OSError as exc:
            raise ChecksumMismatch(f"graph file {entry.file} cannot be read: {exc}",
                                   field=f"graphs.{kind}.file") from exc
        digest = hashlib.sha256(data).hexdigest()
        if digest != entry.sha256:
            raise ChecksumMismatch(
                f"graph file {entry.file} has SHA-256 {digest[:12]}…, the manifest records {entry.sha256[:12]}…; "
                "the file changed after the bundle was loaded", field=f"graphs.{kind}.sha256")
        return data

    def _session(self, kind: str, seed: int | None) -> Any:
        data = self._read(kind)
        if seed is not None and kind in FRESH_KINDS:
            data, _ = reseed_graph(data, seed)
        return _guard(f"open the {kind} graph",
                      lambda: ort.InferenceSession(data, sess_options=self._options(),
                                                   providers=["CPUExecutionProvider"]))

    def load(self) -> Engine:
        """Open the sessions (after any fork); returns ``self``. Calling it again reloads and reseeds."""
        with self._lock:
            kind = self._choose()
            seed = self.seed
            if kind in FRESH_KINDS and seed is None:
                seed = int.from_bytes(os.urandom(4), "little") % SEED_MODULUS
            session = self._session(kind, seed)
            noise = _Noise.of(session, kind, seed if kind in FRESH_KINDS else None)
            spec = self.bundle.manifest.inputs
            self._state = _Loaded(
                kind=kind,
                session=session,
                draws=int(self.bundle.manifest.graphs[kind].draws),
                seed=seed if kind in FRESH_KINDS else None,
                noise=noise,
                center=np.asarray(spec.center, dtype=np.float32).reshape(spec.shape),
                scale=np.asarray(spec.scale, dtype=np.float32).reshape(spec.shape),
            )
        return self

    def _loaded(self) -> _Loaded:
        state = self._state
        if state is None:
            raise NotLoaded(f"engine for bundle {self.bundle.path} is not loaded; call load() first", field="engine")
        return state

    # -- running ------------------------------------------------------------------
    def standardise(self, x_raw: Any) -> np.ndarray:
        """Raw inputs float[B, *shape] (or [B, F]) -> float32[B, *shape], (x - center) / scale.

        In float32 (one conversion of the request's numbers; validated requests already are
        float32): the graph takes float32, and the support check reads this same array."""
        state = self._loaded()
        spec = self.bundle.manifest.inputs
        try:
            x = np.asarray(x_raw, dtype=np.float32)
        except (TypeError, ValueError) as exc:
            raise InvalidInput(f"x must be an array of numbers; got {type(x_raw).__name__} ({exc})", field="x") from exc
        if x.ndim < 1 or x.shape[0] < 1:
            raise InvalidInput(f"x must hold at least one case; got shape {list(x.shape)}", field="x")
        if x.shape[1:] != spec.shape:
            if x.ndim == 2 and x.shape[1] == spec.size:
                x = x.reshape(x.shape[0], *spec.shape)
            else:
                raise InvalidInput(f"x must be [B, {', '.join(map(str, spec.shape))}] (or [B, {spec.size}]); "
                                   f"got {list(x.shape)}", field="x")
        with np.errstate(over="ignore"):   # a value that overflows becomes inf: the pipeline refuses its case
            return (x - state.center) / state.scale   # a new C-contiguous float32 array

    def _run(self, session: Any, x_std: np.ndarray, what: str, noise: _Noise | None = None) -> np.ndarray:
        feed = {"x": x_std, **noise.draw()} if noise is not None else {"x": x_std}
        out = _guard(f"run the {what} graph", lambda: session.run(["draws"], feed)[0])
        return np.asarray(out, dtype=np.float32)

    def run(self, x_raw: Any) -> np.ndarray:
        """float[B, *shape] raw inputs -> float32[S, B, K] draws from the chosen graph."""
        return self.run_standardised(self.standardise(x_raw))

    def run_standardised(self, x_std: np.ndarray) -> np.ndarray:
        """``standardise``'s output float32[B, *shape] -> float32[S, B, K] (the pipeline keeps
        ``x_std`` for the support check, so a request is standardised once)."""
        state = self._loaded()
        return self._run(state.session, x_std, state.kind, state.noise)

    # -- description --------------------------------------------------------------
    @property
    def loaded(self) -> bool:
        return self._state is not None

    @property
    def kind(self) -> str:
        """The graph kind in use (after ``load()``)."""
        return self._loaded().kind

    @property
    def draws(self) -> int:
        """S, the number of draws ``run`` returns."""
        return self._loaded().draws

    @property
    def task(self) -> str:
        return self.bundle.manifest.task

    @property
    def manifest(self) -> Manifest:
        return self.bundle.manifest

    @property
    def checksum(self) -> str:
        """The bundle's seal (SHA-256 of manifest.json), reported with every response."""
        return self.bundle.checksum
