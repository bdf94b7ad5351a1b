"""``demur bench``'s Bayesian-last-layers rows: a ResNet-18-shaped deterministic backbone with a
variational head, at 3x32x32 and 3x224x224.

Why: the usual way to make a large network uncertainty-aware is a trained deterministic
backbone whose last layer or two are variational. Before shared computation
(export/shared.py) every graph ran the backbone S times per case (26-32x the deterministic
network at S = 32); the target is every graph kind within 1.3x of the deterministic network
at B = 1 and B = 16.

The network, written here (no torchvision): ResNet-18's shape (He et al., CVPR 2016, table 1):
a 7x7/2 convolution with batch norm, ReLU and a 3x3/2 max-pool, four stages of two basic
blocks (64, 128, 256, 512 channels; a 1x1 projection where the shape changes), global average
pooling, then the head: ``VariationalLinear(512, 256)``, GELU, ``VariationalLinear(256, 10)``
(gaussian). Untrained weights with non-trivial batch-norm statistics: the arithmetic, not the
accuracy, sets the speed.

What each row measures, one onnxruntime thread, the bench's timer: latency per call of the
stacked, sampler and flip graphs at S = ``cfg["backbone_draws"]`` and of the deterministic
network (the means graph: the backbone and the head's posterior means, one pass), at B = 1
and 16; each kind's latency over the deterministic network's; graph file bytes over
parameter bytes (``export/bench/conv.py``'s ``network_numbers``). At 3x32x32 also the stacked
graph as it was before (``shared=False``: the whole network once per draw), for the ratio
the change removed. Every graph is checked against torch (``reference_draws``, the network
once per draw) within 1e-4 before it is timed.
"""

from __future__ import annotations

import io
import json
import os
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

from demur.export.bench.conv import network_numbers
from demur.export.draws import DrawNetwork, draw_noise, reference_draws
from demur.export.errors import ExportError
from demur.export.graphs import export_graph
from demur.export.layers import VariationalLinear
from demur.serve.adapters.engine import Engine
from demur.serve.core.bundle import GRAPH_KINDS, Bundle, write_bundle
from demur.serve.core.npy_body import NPY_MEDIA_TYPE
from demur.serve.core.support import support_from_manifest

__all__ = ["BACKBONE_KINDS", "BayesianLastLayers", "backbone_lines", "backbone_ratios", "backbone_section",
           "default_sections", "image_spec", "transport_section"]

BACKBONE_KINDS = GRAPH_KINDS
"""Graph kinds measured (every kind of the bundle format); ``means`` is the deterministic network."""

_TOLERANCE = 1e-4


class _Basic(nn.Module):
    """ResNet's basic block: 3x3 conv, BN, ReLU, 3x3 conv, BN, + the (projected) input, ReLU."""

    def __init__(self, c_in: int, c_out: int, stride: int) -> None:
        super().__init__()
        self.conv1 = nn.Conv2d(c_in, c_out, 3, stride=stride, padding=1, bias=False)
        self.bn1 = nn.BatchNorm2d(c_out)
        self.conv2 = nn.Conv2d(c_out, c_out, 3, padding=1, bias=False)
        self.bn2 = nn.BatchNorm2d(c_out)
        self.project = (nn.Sequential(nn.Conv2d(c_in, c_out, 1, stride=stride, bias=False), nn.BatchNorm2d(c_out))
                        if stride != 1 or c_in != c_out else nn.Identity())

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = F.relu(self.bn1(self.conv1(x)))
        return F.relu(self.bn2(self.conv2(h)) + self.project(x))


class BayesianLastLayers(nn.Module):
    """[3, H, W] -> 10 logits: a ResNet-18-shaped backbone (``width`` 64: ResNet-18's channels;
    the bench's tests use a narrower one) and a two-layer variational head (8w -> 4w -> 10)."""

    def __init__(self, classes: int = 10, width: int = 64) -> None:
        super().__init__()
        self.stem = nn.Sequential(nn.Conv2d(3, width, 7, stride=2, padding=3, bias=False), nn.BatchNorm2d(width),
                                  nn.ReLU(), nn.MaxPool2d(3, stride=2, padding=1))
        stages, c_in = [], width
        for c_out, stride in ((width, 1), (2 * width, 2), (4 * width, 2), (8 * width, 2)):
            stages += [_Basic(c_in, c_out, stride), _Basic(c_out, c_out, 1)]
            c_in = c_out
        self.stages = nn.Sequential(*stages)
        hidden = 4 * width
        self.hidden = VariationalLinear(8 * width, hidden, posterior="gaussian", init_spread=0.05)
        self.head = VariationalLinear(hidden, classes, posterior="gaussian", init_spread=0.05)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = F.adaptive_avg_pool2d(self.stages(self.stem(x)), 1).flatten(1)
        return self.head(F.gelu(self.hidden(h)))


def _model(width: int) -> BayesianLastLayers:
    torch.manual_seed(0)
    model = BayesianLastLayers(width=width)
    with torch.no_grad():
        for m in model.modules():
            if isinstance(m, nn.BatchNorm2d):
                m.running_mean.uniform_(-0.1, 0.1)
                m.running_var.uniform_(0.5, 1.5)
    return model.eval()


def image_spec(shape: tuple[int, ...]) -> dict[str, Any]:
    """A manifest input spec for images of ``shape`` with values in [0, 1] (pixel names p0, p1, ...)."""
    size = int(np.prod(shape))
    return {"names": [f"p{i}" for i in range(size)], "shape": list(shape), "dtype": "float32",
            "center": [0.5] * size, "scale": [0.25] * size, "low": [0.0] * size, "high": [1.0] * size,
            "kind": "image"}


def _checked_graph(net: DrawNetwork, path: Path, x_std: np.ndarray) -> int:
    """Export ``net`` and compare onnxruntime with torch's per-draw reference; return file bytes."""
    import onnxruntime as ort

    size = export_graph(net, path, name=net.kind)
    noise = draw_noise(net.noise, np.random.default_rng(1))
    got = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"]).run(["draws"], {"x": x_std, **noise})[0]
    want = reference_draws(net, torch.from_numpy(x_std), noise).numpy()
    rel = float(np.max(np.abs(got - want) / np.maximum(np.abs(want), 1.0)))
    if got.shape != want.shape or not rel <= _TOLERANCE:
        raise ExportError(f"bench backbone {net.kind} graph differs from torch by {rel:.3g}", field="graph")
    return size


def default_sections(shape: tuple[int, ...], rows: int, seed: int = 0) -> dict[str, Any]:
    """The support record and drift reference ``demur export`` writes by default, from ``rows``
    reference images drawn like the measured cases (uniform on [0, 1]) and ``rows // 4`` held out:
    what a user's default export serves with (serve/core/support.py; past 1,024 features a projected
    distance, serve/core/projection.py)."""
    from demur.serve.core.drift import feature_reference
    from demur.serve.core.support import support_record

    rng = np.random.default_rng(seed)
    x = rng.uniform(0.0, 1.0, (rows + rows // 4, int(np.prod(shape)))).astype(np.float32)
    return {"support": support_record(x[:rows], x[rows:], image_spec(shape), seed=seed),
            "drift_reference": {"features": feature_reference(x[:rows], seed=seed)}}


def _bundle(root: Path, model: nn.Module, shape: tuple[int, ...], S: int, shared: bool,
            kinds: tuple[str, ...], x_std: np.ndarray, checked: dict[str, Any] | None = None
            ) -> tuple[Bundle, dict[str, int], dict[str, str]]:
    root.mkdir(parents=True, exist_ok=True)
    entries, sizes, computation = {}, {}, {}
    for kind in kinds:
        net = DrawNetwork(model, kind, S, seed=0, input_shape=shape, shared=shared)
        sizes[kind] = _checked_graph(net, root / f"{kind}.onnx", x_std)
        entries[kind] = {"file": f"{kind}.onnx", "draws": net.S, "seed": 0, "computation": net.computation}
        computation[kind] = net.computation
    bundle = write_bundle(root, model_name="bench-backbone", model_version="0", task="classification",
                          labels=[str(i) for i in range(10)], inputs=image_spec(shape),
                          posterior={"family": "gaussian", "params": 0}, graphs=entries,
                          decision={"score": "mutual_information", "threshold": 10.0}, **(checked or {}))
    return bundle, sizes, computation


def _bodies(x: np.ndarray) -> dict[str, tuple[bytes, str]]:
    """One case as a client sends it: JSON (4 decimals a value) and a float32 ``.npy`` array."""
    text = json.dumps({"cases": [[round(float(v), 4) for v in x.ravel()]]}, separators=(",", ":")).encode()
    buf = io.BytesIO()
    np.save(buf, x.reshape(1, *x.shape).astype(np.float32))
    return {"json": (text, "application/json"), "npy": (buf.getvalue(), NPY_MEDIA_TYPE)}


def _boundary_cpu_ms(bodies: dict[str, tuple[bytes, str]], spec: Any, budget_s: float) -> dict[str, float]:
    """CPU ms per one-case body to turn its bytes into the validated float32 cases (the request
    boundary: parse + validate), in this process: what the transport costs without the graph."""
    from demur.serve.core.npy_body import parse_npy
    from demur.serve.core.validation import parse_json, validate_predict

    out = {}
    for label, (data, _ctype) in bodies.items():
        parse = parse_npy if label == "npy" else parse_json
        n, t0 = 0, time.process_time()
        while True:
            validate_predict(parse(data), spec, 1024)
            n += 1
            if time.process_time() - t0 >= budget_s and n >= 3:
                break
        out[label] = (time.process_time() - t0) / n * 1e3
    return out


def transport_section(bundle: Bundle, x: np.ndarray, root: Path, seconds: int, http: bool,
                      log: Callable[[str], None]) -> dict[str, Any]:
    """JSON against ``.npy`` for one case ``x`` [*shape]: body bytes, boundary CPU per case in
    process, and (``http``, wrk present) one-case HTTP to ``demur serve`` with each body."""
    from demur.export.bench.http import WRK, body_cost

    bodies = _bodies(x)
    cpu = _boundary_cpu_ms(bodies, bundle.manifest.inputs, 0.3)
    out: dict[str, Any] = {"bytes": {k: len(v[0]) for k, v in bodies.items()}, "boundary_cpu_ms": cpu,
                           "boundary_npy_over_json": cpu["npy"] / cpu["json"],
                           "manifest_bytes": (bundle.path / "manifest.json").stat().st_size}
    check = support_from_manifest(bundle.manifest)
    if check is not None:  # the default export's support check, one case, in process
        one = x.reshape(1, -1)
        n, t0 = 0, time.process_time()
        while n < 3 or time.process_time() - t0 < 0.3:
            check.check(one)
            n += 1
        out["support_cpu_ms"] = (time.process_time() - t0) / n * 1e3
    log(f"  transport {'x'.join(map(str, x.shape))}: boundary CPU per case json {cpu['json']:.3f} ms, npy "
        f"{cpu['npy']:.3f} ms; support check {out.get('support_cpu_ms', float('nan')):.3f} ms; manifest "
        f"{out['manifest_bytes'] / 1e6:.1f} MB")
    if http and os.access(WRK, os.X_OK):
        rows = body_cost(bundle, bodies, root, seconds, log)
        med = {k: {m: float(np.median([r[m] for r in rows if r["body"] == k]))
                   for m in ("requests_per_s", "p99_ms", "server_cpu_ms_per_request")} for k in bodies}
        out.update(http=rows, http_median=med, server_cpu_npy_over_json=(
            med["npy"]["server_cpu_ms_per_request"] / med["json"]["server_cpu_ms_per_request"]))
    return out


def _interleaved(runs: dict[str, Callable[[np.ndarray], Any]], x: np.ndarray,
                 timer: Callable[[Callable[[], Any], int, float], dict[str, float]], repeats: int,
                 budget_s: float) -> dict[str, dict[str, float]]:
    """Per-call seconds of every runner on ``x``, round-robin: each round times each runner once
    (``timer`` with one repeat), so a change in the machine's load falls on all of them alike and
    the ratios to the deterministic network are side by side in time, not only in one run."""
    per_call: dict[str, list[float]] = {label: [] for label in runs}
    for _ in range(max(1, repeats)):
        for label, run in runs.items():
            per_call[label].append(timer(lambda: run(x), 1, budget_s)["median"])
    base = per_call.get("means")
    return {label: {"median": float(np.median(v)), "min": min(v), "max": max(v),
                    # the median of the rounds' ratios: each ratio is taken within one round
                    **({"over_means": float(np.median(np.divide(v, base)))} if base else {})}
            for label, v in per_call.items()}


def backbone_section(cfg: dict[str, Any], root: Path,
                     timer: Callable[[Callable[[], Any], int, float], dict[str, float]],
                     log: Callable[[str], None], http: bool = False) -> list[dict[str, Any]]:
    """Per input size in ``cfg["backbone_sizes"]``: latency of every graph kind and of the
    deterministic network at each B in ``cfg["backbone_batches"]``, ratios, file bytes; and the
    JSON / ``.npy`` transport figures of one case (``transport_section``) on the stacked bundle."""
    S = int(cfg["backbone_draws"])
    model = _model(int(cfg.get("backbone_width", 64)))
    numbers = network_numbers(model)
    rng = np.random.default_rng(0)
    out = []
    for side in cfg["backbone_sizes"]:
        shape = (3, int(side), int(side))
        x_raw = rng.uniform(0.0, 1.0, (max(cfg["backbone_batches"]), *shape)).astype(np.float32)
        x_std = ((x_raw[:2] - 0.5) / 0.25).astype(np.float32)
        # as demur export writes it: support check and drift reference (2,000 reference rows, as many as
        # the default stores; 500 past 3x32x32, where 2,000 would take GBs to generate and the projected
        # check's cost per case no longer grows with them)
        checked = default_sections(shape, 2000 if side <= 32 else 500)
        bundle, sizes, computation = _bundle(root / f"backbone-{side}", model, shape, S, True, BACKBONE_KINDS, x_std,
                                             checked)
        variants = [(kind, bundle) for kind in BACKBONE_KINDS]
        if side <= 32:  # today's path for the before/after ratio; at 224 it takes seconds per call
            before, before_sizes, _ = _bundle(root / f"backbone-{side}-per-draw", model, shape, S, False,
                                              ("stacked",), x_std)
            variants.append(("stacked per draw (before)", before))
            sizes["stacked per draw (before)"] = before_sizes["stacked"]
        rows = []
        runs = {label: Engine(b, graph=label.split()[0], intra_threads=1, inter_threads=1).load().run
                for label, b in variants}
        for B in cfg["backbone_batches"]:
            x = x_raw[:B]
            rounds = int(cfg.get("backbone_repeats", max(7, int(cfg["repeats"]))))
            for label, t in _interleaved(runs, x, timer, rounds, float(cfg["budget_s"])).items():
                ratio = t.pop("over_means", None)
                rows.append({"mode": label, "batch": B, "latency_ms": {k: v * 1e3 for k, v in t.items()},
                             "round_ratio": ratio})
                log(f"  backbone {side:>3} {label:>26} S={S} B={B:<3} {t['median'] * 1e3:9.2f} ms")
        det = {r["batch"]: r["latency_ms"]["median"] for r in rows if r["mode"] == "means"}
        for r in rows:
            ratio = r.pop("round_ratio", None)
            r["over_deterministic"] = ratio if ratio is not None else r["latency_ms"]["median"] / det[r["batch"]]
        transport = transport_section(bundle, x_raw[0], root / f"backbone-{side}", int(cfg["http_s"]), http, log)
        out.append({"input": list(shape), "draws": S, "parameters": numbers, "rows": rows,
                    "computation": computation, "transport": transport,
                    "memory": [{"mode": k, "file_bytes": v, "file_over_param_bytes": v / (4 * numbers)}
                               for k, v in sizes.items()]})
    return out


def backbone_lines(section: list[dict[str, Any]]) -> list[str]:
    """The printed table of ``backbone_section``'s rows."""
    lines = ["", "Bayesian last layers: ResNet-18-shaped backbone + 2 variational linear layers (export/bench/"
                 "backbone.py), 1 onnxruntime thread; latency ms per call and over the deterministic network "
                 "(the means graph)"]
    for part in section:
        shape = "x".join(map(str, part["input"]))
        sizes = ", ".join(f"{m['mode']} {m['file_bytes'] / 1e6:.1f} MB = {m['file_over_param_bytes']:.2f}x"
                          for m in part["memory"])
        lines.append(f"  {shape}, {part['parameters']} params, S={part['draws']}: {sizes}")
        for r in part["rows"]:
            lat = r["latency_ms"]
            lines.append(f"{r['mode']:>27} B={r['batch']:<3} {lat['median']:10.2f} {lat['min']:10.2f}-"
                         f"{lat['max']:<10.2f} {r['over_deterministic']:7.2f}x deterministic")
        t = part.get("transport")
        if t:
            cpu = t["boundary_cpu_ms"]
            lines.append(f"  one case JSON {t['bytes']['json'] / 1e3:.0f} kB vs .npy {t['bytes']['npy'] / 1e3:.0f} kB: "
                         f"boundary CPU (parse + validate) {cpu['json']:.3f} vs {cpu['npy']:.3f} ms per case = "
                         f"{t['boundary_npy_over_json']:.3f}x")
            if "support_cpu_ms" in t:
                lines.append(f"  the default export's support check: {t['support_cpu_ms']:.3f} ms CPU per case; "
                             f"manifest {t['manifest_bytes'] / 1e6:.1f} MB")
            for label, m in t.get("http_median", {}).items():
                lines.append(f"  HTTP one case, {label:>4} body, stacked S={part['draws']}, default demur serve: "
                             f"{m['requests_per_s']:.1f} req/s, p99 {m['p99_ms']:.0f} ms, server CPU "
                             f"{m['server_cpu_ms_per_request']:.2f} ms per case")
            if "server_cpu_npy_over_json" in t:
                lines.append(f"  server CPU per case, .npy / JSON: {t['server_cpu_npy_over_json']:.3f}x")
    return lines


def backbone_ratios(section: list[dict[str, Any]]) -> tuple[dict[str, float], list[tuple[str, str, float, bool]]]:
    """Ratios (name -> value) and targets (name, goal, value, reached) of ``backbone_section``:
    every kind <= 1.3x the deterministic network at each B (issue 22)."""
    ratios: dict[str, float] = {}
    targets = []
    for part in section:
        shape = "x".join(map(str, part["input"]))
        for r in part["rows"]:
            if r["mode"] == "means":
                continue
            key = r["mode"].split()[0] + ("_per_draw" if "before" in r["mode"] else "")
            v = r["over_deterministic"]
            ratios[f"backbone_{shape}_{key}_over_deterministic_S{part['draws']}_B{r['batch']}"] = v
            if "before" not in r["mode"]:
                targets.append((f"BLL {shape} {key} / deterministic, S={part['draws']} B={r['batch']}", "<= 1.3", v,
                                v <= 1.3))
        for m in part["memory"]:
            ratios[f"backbone_{shape}_file_over_params_{m['mode'].split()[0]}"] = m["file_over_param_bytes"]
        t = part.get("transport") or {}
        if "boundary_npy_over_json" in t:
            ratios[f"transport_{shape}_boundary_cpu_npy_over_json"] = t["boundary_npy_over_json"]
        if "server_cpu_npy_over_json" in t:
            v = t["server_cpu_npy_over_json"]
            ratios[f"transport_{shape}_server_cpu_npy_over_json"] = v
            if part["input"][-1] >= 224:
                targets.append((f"binary body server CPU / JSON's, one case {shape}", "<= 0.3", v, v <= 0.3))
    return ratios, targets
