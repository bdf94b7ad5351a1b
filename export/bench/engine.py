"""``demur bench``: one run that puts demur beside the alternatives a user would write.

Why ratios: this machine has 2 cores shared with other work, so absolute
times drift from run to run; every figure is the median over repeats with the
min-max beside it, and the verdicts use ratios measured in the same run.

What one run measures (``--quick`` shrinks repeats and durations and keeps
only S = 32; the JSON has the same shape):

* engine level, B in {1, 64}, S in {8, 32, 128}, one onnxruntime thread:
  the means graph (deterministic, S = 1), stacked draws, the sampler
  (fresh normals fed per call), the flip graph with a fresh base per call
  (``export/flip.py``); against a torch loop of S sampled forward
  passes (the obvious code) and torch with S pre-sampled weight sets batched;
* the conv nets of export/bench/conv.py (a user's own architecture: conv stem,
  max-pool, residual blocks with batch norm and GELU), exported through
  ``demur.export.export_model`` as stacked and flip at S = 32: latency at each B,
  file bytes over parameter bytes, beside the MLP's;
* the summaries (``demur.serve.core.summary.summarise`` + ``demur.serve.core.decision.decide``) at
  B = 64, S = 32, as a share of the engine time;
* memory per mode: graph file bytes (and their ratio to the parameter count
  x 4 bytes) and the resident set of a fresh process that loaded it;
* HTTP on 127.0.0.1 with Debian's ``wrk`` (export/bench/http.py): the loop
  front's sizings, the maintained ASGI server against it (the one-front rule
  of issue 16), and a minimal Flask app running the torch loop behind gunicorn
  with the same workers and threads.

The model is the 64-256-256-10 radial MLP (untrained unless ``--checkpoint``:
the arithmetic, not the accuracy, sets the speed); request bodies are real
postcode digits from scikit-learn's bundled 8x8 digits. The served decision
threshold is set above every possible mutual information (ln 10), so no case
abstains and the review queue is not written: this measures the prediction
path (the review queue has its own tests).
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import os
import platform
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from demur.serve.core.bundle import Bundle, write_bundle
from demur.serve.core.decision import DecisionRule, decide
from demur.serve.adapters.engine import Engine
from demur.serve.core.summary import summarise

from demur.export.bench.backbone import backbone_lines, backbone_ratios, backbone_section
from demur.export.bench.conv import conv_section
from demur.export.bench.score import bench_section
from demur.export.bench.http import CLIENTS, FRONT_RULE, child_env, http_section
from demur.export.draws import DrawNetwork
from demur.export.errors import ExportError
from demur.export.graphs import export_graph

__all__ = ["BENCH_FORMAT", "TARGETS", "format_table", "run_bench", "save_result"]

BENCH_FORMAT = "demur-bench/2"


@dataclass(frozen=True)
class _Plan:
    """What the bench reports about the model: its posterior family and variational parameter count."""

    posterior: str
    parameter_count: int


def _plan(model: Any, spec: dict[str, Any]) -> _Plan:
    net = DrawNetwork(model, "means", 1, seed=0, input_shape=spec["shape"])
    return _Plan(net.family, net.parameter_count())


TARGETS = {
    "flip_over_stacked_latency": 2.0,       # flip at S=32, B=1 within 2x of stacked
    "flip_memory_over_params": 4.0,         # flip graph file <= 4x the parameter bytes
    "http_requests_per_s": 1500.0,          # one case per request, S=32, 32 clients
    "http_p99_ms": 30.0,
    "http_over_torch_loop_server": 40.0,
    "http_rows_over_engine_rows": 0.70,     # large batches through HTTP vs engine only
    "summary_share_of_engine": 0.15,        # summaries at B=64, S=32
    "asgi_over_loop_one_case": FRONT_RULE,  # adopt the maintained ASGI server at or above this (issue 16)
}


# -- settings -------------------------------------------------------------------
def _settings(quick: bool) -> dict[str, Any]:
    """worker_models: loop-front sizings (workers, threads, onnxruntime threads, batch wait ms);
    front_rounds: alternated loop / ASGI one-case runs; conv_nets: names in bench.conv.CONV_NETS."""
    if quick:
        return {"draws": [32], "batches": [1, 64], "repeats": 3, "budget_s": 0.04, "http_s": 2,
                "worker_models": [(2, 4, 1, 0.0)], "front_rounds": 1, "rss": True,
                "conv_draws": 32, "conv_nets": ["small", "large"], "score_rows": 4000, **_BACKBONE}
    return {"draws": [8, 32, 128], "batches": [1, 64], "repeats": 5, "budget_s": 0.2, "http_s": 6,
            "worker_models": [(2, 4, 1, 0.0), (2, 4, 1, 1.0), (1, 4, 1, 0.0), (1, 4, 2, 0.0), (1, 4, 1, 1.0)],
            "front_rounds": 2, "rss": True, "conv_draws": 32, "conv_nets": ["small", "large"], "score_rows": 20_000,
            **_BACKBONE}


_BACKBONE = {"backbone_draws": 32, "backbone_sizes": [32, 224], "backbone_batches": [1, 16]}  # [] skips


def _stats(values: list[float]) -> dict[str, float]:
    return {"median": statistics.median(values), "min": min(values), "max": max(values)}


def _time(fn: Callable[[], Any], repeats: int, budget_s: float) -> dict[str, float]:
    """Per-call seconds: each repeat runs ``fn`` until ``budget_s`` passes (>= 1 call); median/min/max."""
    fn()  # warm-up (graph optimisation, allocations)
    per_call = []
    for _ in range(repeats):
        n, t0 = 0, time.perf_counter()
        while True:
            fn()
            n += 1
            elapsed = time.perf_counter() - t0
            if elapsed >= budget_s or n >= 5000:
                break
        per_call.append(elapsed / n)
    return _stats(per_call)


# -- the model and its bundles ----------------------------------------------------
def _digits() -> tuple[np.ndarray, dict[str, Any]]:
    """Raw request cases (the bundled digits' last 360 rows) and a digits-like input spec."""
    from sklearn.datasets import load_digits

    x = load_digits().data.astype(np.float64)
    spec = {
        "names": [f"px_r{r}c{c}" for r in range(8) for c in range(8)], "shape": [64], "dtype": "float32",
        "center": [float(v) for v in x.mean(0)], "scale": [float(v) for v in np.maximum(x.std(0), 1.0)],
        "low": [0.0] * 64, "high": [16.0] * 64, "kind": "image",
    }
    return x[-360:], spec


def _load_model(checkpoint: Path | None) -> tuple[Any, dict[str, Any], bool]:
    import torch

    from demur.export.layers import build_model

    if checkpoint is not None:
        from demur.export.checkpoints import load_checkpoint

        model, meta = load_checkpoint(checkpoint)
        if isinstance(model, list):
            raise ExportError(f"demur bench measures one network; {checkpoint} holds an ensemble of {len(model)} "
                              "(train one with 'demur train' without --members)", field="checkpoint")
        return model, meta["inputs"], True
    torch.manual_seed(0)
    _, spec = _digits()
    return build_model("mlp", [64], 10, "radial", hidden=(256, 256), init_sigma=0.05), spec, False


def _write(root: Path, plan: _Plan, spec: dict[str, Any], nets: dict[str, DrawNetwork],
           checked: dict[str, Any] | None = None) -> Bundle:
    """``checked``: the support record and drift reference a default ``demur export`` writes."""
    root.mkdir(parents=True, exist_ok=True)
    entries = {}
    for kind, net in nets.items():
        if not (root / f"{kind}.onnx").exists():
            export_graph(net, root / f"{kind}.onnx", name=kind)
        entries[kind] = {"file": f"{kind}.onnx", "draws": net.S, "seed": 0}
    return write_bundle(
        root, model_name="bench", model_version="0", task="classification", labels=[str(i) for i in range(10)],
        inputs=spec, posterior={"family": plan.posterior, "params": plan.parameter_count},
        graphs=entries, decision={"score": "mutual_information", "threshold": 10.0},  # never abstain (> ln 10)
        **(checked or {}),
    )


def _default_sections(spec: dict[str, Any]) -> dict[str, Any]:
    """The support check and drift reference ``demur export`` writes by default (digits rows 0-999 train, 1000-1436 held out)."""
    from sklearn.datasets import load_digits

    from demur.serve.core.drift import feature_reference
    from demur.serve.core.support import support_record

    x = load_digits().data.astype(np.float64)
    return {"support": support_record(x[:1000], x[1000:-360], spec),
            "drift_reference": {"features": feature_reference(x[:1000])}}


def _bundles(model: Any, plan: _Plan, spec: dict[str, Any], draws: list[int], root: Path
             ) -> dict[int, dict[str, Bundle]]:
    """Per S: one bundle with stacked, sampler, flip and means graphs (export/draws.py, export/graphs.py)
    carrying the support check as ``demur export`` writes it ("main"), and the same graphs without
    it ("unchecked"), for the HTTP section's with/without ratio."""
    out = {}
    checked = _default_sections(spec)
    for S in draws:
        nets = {kind: DrawNetwork(model, kind, S, seed=S, input_shape=spec["shape"])
                for kind in ("stacked", "sampler", "flip", "means")}
        main = _write(root / f"S{S}", plan, spec, nets, checked)
        twin = root / f"S{S}-unchecked"
        twin.mkdir(parents=True, exist_ok=True)
        for kind in nets:
            shutil.copyfile(main.graph_path(kind), twin / f"{kind}.onnx")
        out[S] = {"main": main, "unchecked": _write(twin, plan, spec, nets)}
    return out


# -- engine level -------------------------------------------------------------------
_MODES = ("means", "stacked", "sampler", "flip", "torch_loop", "torch_batched")


def _torch_runners(model: Any, S: int, spec: dict[str, Any]) -> dict[str, Callable[[np.ndarray], Any]]:
    """The two torch alternatives, taking raw inputs like the engine (standardised inside)."""
    import torch

    from demur.export.layers import sample_network, variational_layers

    center = torch.tensor(spec["center"], dtype=torch.float32)
    scale = torch.tensor(spec["scale"], dtype=torch.float32)
    layers = variational_layers(model)
    sets = sample_network(model, S, torch.Generator().manual_seed(S))
    weights = [(d["weight"].transpose(1, 2).contiguous(), d["bias"][:, None, :].contiguous()) for d in sets]

    @torch.no_grad()
    def loop(x: np.ndarray) -> Any:
        xt = (torch.from_numpy(np.asarray(x, np.float32)) - center) / scale
        return torch.stack([model(xt) for _ in range(S)])  # each forward draws fresh weights

    @torch.no_grad()
    def batched(x: np.ndarray) -> Any:
        h = (torch.from_numpy(np.asarray(x, np.float32)) - center) / scale
        for i, (w, b) in enumerate(weights):
            h = torch.baddbmm(b, h.expand(S, *h.shape) if h.dim() == 2 else h, w)
            if i < len(layers) - 1:
                h = torch.relu(h)
        return h

    return {"torch_loop": loop, "torch_batched": batched}


def _engine_section(model: Any, spec: dict[str, Any], bundles: dict[int, dict[str, Bundle]], xs: np.ndarray,
                    cfg: dict[str, Any], log: Callable[[str], None]) -> list[dict[str, Any]]:
    import torch

    torch.set_num_threads(1)
    rows = []
    for S, pair in bundles.items():
        runners: dict[str, Callable[[np.ndarray], Any]] = {}
        for kind in ("means", "stacked", "sampler", "flip"):
            runners[kind] = Engine(pair["main"], graph=kind, intra_threads=1, inter_threads=1).load().run
        runners.update(_torch_runners(model, S, spec))
        for B in cfg["batches"]:
            x = xs[:B]
            for mode in _MODES:
                fn = runners[mode]
                slow = mode in ("sampler", "torch_loop") and S * B >= 2048
                t = _time(lambda: fn(x), max(2, cfg["repeats"] - 2) if slow else cfg["repeats"], cfg["budget_s"])
                rows.append({"mode": mode, "draws": 1 if mode == "means" else S, "batch": B,
                             "latency_ms": {k: v * 1e3 for k, v in t.items()}, "rows_per_s": B / t["median"]})
                log(f"  engine {mode:>14} S={S:<4} B={B:<3} {t['median'] * 1e3:9.3f} ms")
    return rows


def _summary_section(bundles: dict[int, dict[str, Bundle]], xs: np.ndarray, cfg: dict[str, Any]) -> dict[str, Any]:
    S = 32 if 32 in bundles else next(iter(bundles))
    engine = Engine(bundles[S]["main"], graph="stacked", intra_threads=1).load()
    x = xs[:64]
    draws = engine.run(x)
    rule = DecisionRule("mutual_information", 10.0, "bench")
    t_engine = _time(lambda: engine.run(x), cfg["repeats"], cfg["budget_s"])
    t_summary = _time(lambda: decide(summarise("classification", draws, 0.9, {}), rule), cfg["repeats"],
                      cfg["budget_s"])
    return {"draws": S, "batch": 64, "engine_ms": {k: v * 1e3 for k, v in t_engine.items()},
            "summary_ms": {k: v * 1e3 for k, v in t_summary.items()},
            "share_of_engine": t_summary["median"] / t_engine["median"]}


# -- memory ---------------------------------------------------------------------------
_RSS_DEMUR = """
import json, sys
import numpy as np
from demur.serve.core.bundle import load_bundle
from demur.serve.adapters.engine import Engine
def rss():
    for line in open('/proc/self/status'):
        if line.startswith('VmRSS:'):
            return int(line.split()[1]) * 1024
base = rss()
engine = Engine(load_bundle(sys.argv[1]), graph=sys.argv[2], intra_threads=1).load()
engine.run(np.zeros((64, 64)))
print(json.dumps({"base": base, "loaded": rss()}))
"""

_RSS_TORCH = """
import json, sys
import numpy as np, torch
def rss():
    for line in open('/proc/self/status'):
        if line.startswith('VmRSS:'):
            return int(line.split()[1]) * 1024
base = rss()
from demur.export.bench.http import baseline_model
model, spec = baseline_model(sys.argv[1])
with torch.no_grad():
    torch.stack([model(torch.zeros(64, 64)) for _ in range(int(sys.argv[2]))])
print(json.dumps({"base": base, "loaded": rss()}))
"""



def _rss(code: str, *argv: str) -> dict[str, int]:
    out = subprocess.run([sys.executable, "-c", code, *argv], capture_output=True, text=True, timeout=120,
                         env=child_env(one_thread=True))
    if out.returncode != 0:
        return {"base": -1, "loaded": -1}
    return json.loads(out.stdout.strip().splitlines()[-1])


def _memory_section(plan: _Plan, bundles: dict[int, dict[str, Bundle]], model_file: Path,
                    cfg: dict[str, Any]) -> list[dict[str, Any]]:
    param_bytes = 4 * plan.parameter_count
    rows = []
    for S, pair in bundles.items():
        for mode, bundle, kind in (("means", pair["main"], "means"), ("stacked", pair["main"], "stacked"),
                                   ("sampler", pair["main"], "sampler"), ("flip", pair["main"], "flip")):
            size = bundle.graph_path(kind).stat().st_size
            rss = _rss(_RSS_DEMUR, str(bundle.path), kind) if cfg["rss"] and (S == 32 or mode != "means") else None
            rows.append({"mode": mode, "draws": 1 if mode == "means" else S, "file_bytes": size,
                         "file_over_param_bytes": size / param_bytes,
                         "rss_bytes": rss["loaded"] if rss else None,
                         "rss_over_baseline_bytes": rss["loaded"] - rss["base"] if rss else None})
        rss = _rss(_RSS_TORCH, str(model_file), str(S)) if cfg["rss"] else None
        rows.append({"mode": "torch_loop", "draws": S, "file_bytes": model_file.stat().st_size,
                     "file_over_param_bytes": model_file.stat().st_size / param_bytes,
                     "rss_bytes": rss["loaded"] if rss else None,
                     "rss_over_baseline_bytes": rss["loaded"] - rss["base"] if rss else None})
    return rows


# -- the run ---------------------------------------------------------------------------------
def _find(rows: list[dict[str, Any]], **match: Any) -> dict[str, Any] | None:
    return next((r for r in rows if all(r.get(k) == v for k, v in match.items())), None)


def _ratios_and_targets(result: dict[str, Any]) -> None:
    eng, mem, http = result["engine"], result["memory"], result["http"]
    ratios: dict[str, Any] = {}
    lat = {(r["mode"], r["draws"], r["batch"]): r["latency_ms"]["median"] for r in eng}
    for (mode, S, B), v in lat.items():
        if mode in ("torch_loop", "torch_batched"):
            for demur_mode in ("stacked", "flip"):
                if (demur_mode, S, B) in lat:
                    ratios[f"{mode}_over_{demur_mode}_S{S}_B{B}"] = v / lat[(demur_mode, S, B)]
        if mode.startswith("flip") and ("stacked", S, B) in lat:
            ratios[f"{mode}_over_stacked_S{S}_B{B}"] = v / lat[("stacked", S, B)]
        if mode == "sampler" and ("stacked", S, B) in lat:
            ratios[f"sampler_over_stacked_S{S}_B{B}"] = v / lat[("stacked", S, B)]
    ratios["summary_share_of_engine_B64_S32"] = result["summaries"]["share_of_engine"]
    for r in mem:
        ratios[f"memory_file_over_params_{r['mode']}_S{r['draws']}"] = r["file_over_param_bytes"]
    targets = []

    def target(name: str, goal: str, value: float | None, reached: bool | None) -> None:
        targets.append({"name": name, "target": goal, "value": value, "reached": reached})

    v = ratios.get("flip_over_stacked_S32_B1")
    target("MLP flip latency / stacked, S=32 B=1", "<= 2.0", v, None if v is None else v <= 2.0)
    m = _find(mem, mode="flip", draws=32)
    v = m["file_over_param_bytes"] if m else None
    target("MLP flip graph bytes / parameter bytes", "<= 4.0", v, None if v is None else v <= 4.0)
    for net in result["conv"]:
        name, S = net["name"], net["draws"]
        conv_lat = {(r["mode"], r["batch"]): r["latency_ms"]["median"] for r in net["engine"]}
        for B in sorted({b for _, b in conv_lat}):
            if ("flip", B) in conv_lat and ("stacked", B) in conv_lat:
                ratios[f"conv_{name}_flip_over_stacked_S{S}_B{B}"] = conv_lat[("flip", B)] / conv_lat[("stacked", B)]
        for r in net["memory"]:
            ratios[f"memory_file_over_params_conv_{name}_{r['mode']}_S{S}"] = r["file_over_param_bytes"]
        label = f"conv {name} ({net['parameters']} params)"
        v = ratios.get(f"conv_{name}_flip_over_stacked_S{S}_B1")
        target(f"{label} flip latency / stacked, S={S} B=1", "<= 2.0", v, None if v is None else v <= 2.0)
        m = _find(net["memory"], mode="flip")
        v = m["file_over_param_bytes"] if m else None
        target(f"{label} flip bytes / param bytes", "<= 4.0", v, None if v is None else v <= 4.0)
    if "cases" in http:
        one = _find(http["cases"], server="demur", graph="stacked", batch=1)
        flip1 = _find(http["cases"], server="demur", graph="flip", batch=1)
        torch1 = _find(http["cases"], server="torch_loop_flask", batch=1)
        for label, case in (("stacked", one), ("flip", flip1)):
            if case:
                target(f"HTTP {label} req/s, 1 case, S=32, {CLIENTS} clients", ">= 1500", case["requests_per_s"],
                       case["requests_per_s"] >= 1500)
                target(f"HTTP {label} p99 ms", "< 30", case["p99_ms"], case["p99_ms"] < 30)
                ratios[f"http_{label}_server_cpu_ms_per_request"] = case.get("server_cpu_ms_per_request")
                ratios[f"http_{label}_implied_requests_per_s_idle_machine"] = case.get("implied_requests_per_s")
                if torch1 and torch1.get("implied_requests_per_s"):
                    ratios[f"http_{label}_implied_over_torch_loop_implied"] = (
                        case["implied_requests_per_s"] / torch1["implied_requests_per_s"])
                if torch1 and torch1["requests_per_s"] > 0:
                    v = case["requests_per_s"] / torch1["requests_per_s"]
                    ratios[f"http_{label}_over_torch_loop_server"] = v
                    target(f"HTTP {label} req/s / torch-loop server", ">= 40", v, v >= 40)
        same = http.get("engine_same_cores", {}).get("rows_per_s", {})
        for label in ("stacked", "flip"):
            big = _find(http["cases"], server="demur", graph=label, batch=64)
            engine_rows = _find(eng, mode=label, draws=http["draws"], batch=64)
            if big and engine_rows:
                # against one engine thread on one core (the server uses more cores: flattering)
                ratios[f"http_rows_over_one_core_engine_rows_{label}_B64"] = (
                    big["rows_per_s"] / engine_rows["rows_per_s"])
            if big and same.get(label):
                # against the engine in the server's own processes x threads, side by side: fair
                v = big["rows_per_s"] / same[label]
                ratios[f"http_rows_over_engine_rows_same_cores_{label}_B64"] = v
                target(f"HTTP rows/s / engine rows/s (same cores), {label}, B=64", ">= 0.70", v, v >= 0.70)
        torch64 = _find(http["cases"], server="torch_loop_flask", batch=64)
        big = _find(http["cases"], server="demur", graph="stacked", batch=64)
        if big and torch64 and torch64["rows_per_s"] > 0:
            ratios["http_rows_stacked_over_torch_loop_server_B64"] = big["rows_per_s"] / torch64["rows_per_s"]
        ready = [c for c in http["cases"] if c["server"] == "demur"]
        if ready:
            ratios["start_to_ready_s_demur"] = statistics.median(c["ready_s"] for c in ready)
        if torch1:
            ratios["start_to_ready_s_torch_loop_server"] = torch1["ready_s"]
        sup = http.get("support")
        if sup:
            v = sup["on_over_off_requests_per_s"]
            ratios["http_support_on_over_off_one_case_requests_per_s"] = v
            target("HTTP one-case req/s, support check on / off", ">= 0.85", v, v >= 0.85)
            on = sup["on"]
            target("HTTP default export (support on) req/s, 1 case, S=32", ">= 8000", on["requests_per_s"],
                   on["requests_per_s"] >= 8000)
            target("HTTP default export (support on) p99 ms", "< 10", on["p99_ms"], on["p99_ms"] < 10)
        fronts = http["fronts"]
        v = fronts["asgi_over_loop_one_case"]
        ratios["http_asgi_over_loop_one_case_requests_per_s"] = v
        ratios["http_asgi_over_loop_many_case_rows_per_s"] = fronts["asgi_over_loop_many_case_rows"]
        target("HTTP ASGI / loop front one-case req/s (adopt ASGI)", ">= 0.85", v, v >= TARGETS[
            "asgi_over_loop_one_case"])
    v = result["summaries"]["share_of_engine"]
    target("summaries / engine time, B=64 S=32", "< 0.15", v, v < 0.15)
    more, goals = backbone_ratios(result.get("backbone", []))
    ratios.update(more)
    for goal in goals:
        target(*goal)
    result["ratios"] = ratios
    result["targets"] = targets


def run_bench(*, quick: bool = False, checkpoint: Path | None = None, http: bool = True,
              workdir: Path | None = None, log: Callable[[str], None] = print,
              settings: dict[str, Any] | None = None) -> dict[str, Any]:
    """Run every measurement; return the result dict (what bench.json holds).

    ``settings`` overrides entries of the quick/full settings (draws, batches,
    repeats, budget_s, http_s, worker_models, rss): tests use a tiny run.
    """
    import torch

    cfg = {**_settings(quick), **(settings or {})}
    t_start = time.perf_counter()
    own = workdir is None
    root = Path(tempfile.mkdtemp(prefix="demur-bench-")) if own else Path(workdir)
    root.mkdir(parents=True, exist_ok=True)
    try:
        model, spec, trained = _load_model(checkpoint)
        plan = _plan(model, spec)
        xs, _ = _digits()
        from demur.export.layers import VariationalLinear, variational_layers

        layers = variational_layers(model)
        if not all(isinstance(m, VariationalLinear) for m in layers):
            raise ExportError("demur bench needs an MLP checkpoint (the flip graph is for linear layers)",
                              field="checkpoint")
        model_file = root / "torch-model.pt"
        torch.save({"state_dict": model.state_dict(), "posterior": plan.posterior,
                    "hidden": [int(m.out_features) for m in layers[:-1]], "inputs": spec}, model_file)
        log(f"demur bench{' --quick' if quick else ''}: {plan.parameter_count} parameters, "
            f"load average {os.getloadavg()[0]:.2f} on {os.cpu_count()} cpus")
        bundles = _bundles(model, plan, spec, cfg["draws"], root / "bundles")
        result: dict[str, Any] = {
            "format": BENCH_FORMAT, "quick": quick,
            "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
            "machine": {"cpus": os.cpu_count(), "load_average_start": list(os.getloadavg()),
                        "python": platform.python_version(), "platform": platform.platform(),
                        "onnxruntime": __import__("onnxruntime").__version__, "torch": torch.__version__},
            "model": {"arch": "-".join(str(d) for d in [64, *[m.out_features for m in layers]]),
                      "posterior": plan.posterior, "parameters": plan.parameter_count, "trained": trained},
            "settings": {k: v for k, v in cfg.items() if k != "worker_models"}
                        | {"worker_models": [list(w) for w in cfg["worker_models"]]},
        }
        result["engine"] = _engine_section(model, spec, bundles, xs, cfg, log)
        result["conv"] = conv_section(xs, cfg, root / "conv", _time, log)
        result["backbone"] = backbone_section(cfg, root / "backbone", _time, log, http) if cfg["backbone_sizes"] else []
        result["summaries"] = _summary_section(bundles, xs, cfg)
        result["memory"] = _memory_section(plan, bundles, model_file, cfg)
        if http:
            S = 32 if 32 in bundles else next(iter(bundles))
            result["http"] = http_section(bundles[S]["main"], S, xs, model_file, root, cfg, log,
                                          unchecked=bundles[S]["unchecked"])
        else:
            result["http"] = {"skipped": "--no-http"}
        if cfg.get("score_rows"):
            S = 32 if 32 in bundles else next(iter(bundles))
            result["score"] = bench_section(bundles[S]["main"].path, cfg, root / "score", log)
        result["machine"]["load_average_end"] = list(os.getloadavg())
        result["elapsed_s"] = time.perf_counter() - t_start
        _ratios_and_targets(result)
        return result
    finally:
        if own:
            shutil.rmtree(root, ignore_errors=True)


def format_table(result: dict[str, Any]) -> str:
    """The printed report: engine table, summaries, memory, HTTP, ratios, targets."""
    lines = [f"demur bench ({'quick' if result['quick'] else 'full'}) {result['created']}  model "
             f"{result['model']['arch']} {result['model']['posterior']} ({result['model']['parameters']} params, "
             f"{'trained' if result['model']['trained'] else 'untrained'}); load average "
             f"{result['machine']['load_average_start'][0]:.2f} -> {result['machine']['load_average_end'][0]:.2f} on "
             f"{result['machine']['cpus']} cpus. Medians over {result['settings']['repeats']} repeats [min-max].", "",
             "engine level (1 onnxruntime / torch thread), latency ms per call",
             f"{'mode':>14} {'S':>4} {'B':>3} {'median':>9} {'min-max':>19} {'rows/s':>10}"]
    for r in result["engine"]:
        lat = r["latency_ms"]
        lines.append(f"{r['mode']:>14} {r['draws']:>4} {r['batch']:>3} {lat['median']:9.3f} "
                     f"{lat['min']:9.3f}-{lat['max']:<9.3f} {r['rows_per_s']:10.0f}")
    lines += ["", "conv nets through export_model (export/bench/conv.py), 1 onnxruntime thread, latency ms per "
                  "call; flip / stacked beside; file bytes / parameter bytes"]
    for net in result["conv"]:
        stacked = {r["batch"]: r["latency_ms"]["median"] for r in net["engine"] if r["mode"] == "stacked"}
        sizes = ", ".join(f"{m['mode']} {m['file_bytes'] / 1e3:.0f} kB = {m['file_over_param_bytes']:.2f}x"
                          for m in net["memory"])
        lines.append(f"  {net['name']} {net['arch']}, {net['parameters']} params, S={net['draws']}: {sizes}")
        for r in net["engine"]:
            lat = r["latency_ms"]
            vs = f"{lat['median'] / stacked[r['batch']]:6.2f}x stacked" if r["mode"] == "flip" else ""
            lines.append(f"{r['mode']:>14} {r['draws']:>4} {r['batch']:>3} {lat['median']:9.3f} "
                         f"{lat['min']:9.3f}-{lat['max']:<9.3f} {r['rows_per_s']:10.0f} {vs}")
    s = result["summaries"]
    lines += ["", f"summaries + decision at B={s['batch']} S={s['draws']}: {s['summary_ms']['median']:.3f} ms "
                  f"[{s['summary_ms']['min']:.3f}-{s['summary_ms']['max']:.3f}] vs stacked engine "
                  f"{s['engine_ms']['median']:.3f} ms: {s['share_of_engine']:.1%} of engine time", "",
              "memory: graph/model file and resident set of a fresh process after loading + one call",
              f"{'mode':>14} {'S':>4} {'file MB':>9} {'x params':>9} {'RSS MB':>8} {'RSS-base MB':>12}"]
    for r in result["memory"]:
        rss = f"{r['rss_bytes'] / 1e6:8.1f}" if r["rss_bytes"] else f"{'-':>8}"
        delta = f"{r['rss_over_baseline_bytes'] / 1e6:12.1f}" if r["rss_over_baseline_bytes"] else f"{'-':>12}"
        lines.append(f"{r['mode']:>14} {r['draws']:>4} {r['file_bytes'] / 1e6:9.2f} {r['file_over_param_bytes']:9.2f} "
                     f"{rss} {delta}")
    http = result["http"]
    lines += ["", "HTTP on 127.0.0.1: " + (http.get("skipped") or
              f"{http['load_generator']}, {http['clients']} connections, {http['seconds']} s per run, S={http['draws']}")]
    if "cases" in http:
        lines.append(f"{'server':>17} {'front':>7} {'graph':>10} {'B':>3} {'w x t x ort':>11} {'wait':>5} {'req/s':>8} "
                     f"{'rows/s':>9} {'p50 ms':>7} {'p99 ms':>7} {'non2xx':>6} {'ready s':>7} {'srvCPU ms/req':>13} "
                     f"{'wrkCPU':>6} {'implied req/s':>13}")
        shown = [json.dumps(r, sort_keys=True, default=str) for r in http["worker_models"]]
        rest = [c for c in http["cases"] if json.dumps(c, sort_keys=True, default=str) not in shown]
        lines += [_http_row(r) for r in http["worker_models"] + rest]
        same = http.get("engine_same_cores")
        if same:
            lines.append(f"engine only, {same['workers']} process(es) x {same['ort_threads']} onnxruntime thread(s) "
                         f"side by side, B={same['rows']}: " + ", ".join(
                             f"{g} {v:.0f} rows/s" for g, v in same["rows_per_s"].items()))
        c = http["chosen"]
        lines.append(f"chosen worker model: {c['front']} front, {c['workers']} processes x {c['threads']} threads x "
                     f"{c['ort_threads']} onnxruntime threads, batch wait {c['batch_wait_ms']:g} ms")
        f = http["fronts"]
        lines += ["", f"one production front (issue 16): loop front vs maintained ASGI server (uvicorn + httptools "
                      f"under gunicorn, export/bench/asgi.py), same sizing, {f['rounds']} alternated one-case "
                      "round(s)"]
        lines += [_http_row(r) for r in f["runs"]]
        lo, asg = f["loop"], f["asgi"]
        lines += [f"  one-case req/s: loop {lo['one_case_requests_per_s']:.0f} (p99 {lo['one_case_p99_ms']:.1f} ms), "
                  f"ASGI {asg['one_case_requests_per_s']:.0f} (p99 {asg['one_case_p99_ms']:.1f} ms): "
                  f"ASGI / loop {f['asgi_over_loop_one_case']:.3f}",
                  f"  64-case rows/s: loop {lo['many_case_rows_per_s']:.0f} (p99 {lo['many_case_p99_ms']:.1f} ms), "
                  f"ASGI {asg['many_case_rows_per_s']:.0f} (p99 {asg['many_case_p99_ms']:.1f} ms): "
                  f"ASGI / loop {f['asgi_over_loop_many_case_rows']:.3f}",
                  f"  rule: {f['rule']}; chosen front: {f['chosen']}"]
        sup = http.get("support")
        if sup:
            lines += ["", f"support check cost (the default export vs the same graphs without its support section), "
                          f"{sup['rounds']} alternated one-case round(s)"]
            lines += [_http_row(r) + f"  support {r['support']}" for r in sup["runs"]]
            lines.append(f"  one-case req/s: on {sup['on']['requests_per_s']:.0f} (p99 {sup['on']['p99_ms']:.1f} ms), "
                         f"off {sup['off']['requests_per_s']:.0f} (p99 {sup['off']['p99_ms']:.1f} ms): on / off "
                         f"{sup['on_over_off_requests_per_s']:.3f}")
    lines += backbone_lines(result.get("backbone", []))
    score = result.get("score")
    if score:
        lines += ["", f"demur score, rows/s (median [min-max]); score / engine {score['ratio']:.2f} "
                      f"(target >= {score['target']})"]
        for row in score["rows"]:
            r = row["rows_per_s"]
            lines.append(f"  {row['what']:<60} {r['median']:10.0f} [{r['min']:.0f}-{r['max']:.0f}]")
    lines += ["", "ratios"]
    for k, v in result["ratios"].items():
        lines.append(f"  {k:<52} {v:10.3f}" if isinstance(v, (int, float)) else f"  {k:<52} {'-':>10}")
    lines += ["", "targets (issues 8, 12, 16, 22)"]
    for t in result["targets"]:
        verdict = "n/a" if t["reached"] is None else "REACHED" if t["reached"] else "NOT reached"
        value = "-" if t["value"] is None else f"{t['value']:.3f}"
        lines.append(f"  {t['name']:<48} {t['target']:>8}  {value:>10}  {verdict}")
    lines.append(f"\nelapsed {result['elapsed_s']:.0f} s")
    return "\n".join(lines)


def _http_row(r: dict[str, Any]) -> str:
    shape = f"{r['workers']}x{r['threads']}x{r['ort_threads'] or '-'}"
    wait = "-" if r["batch_wait_ms"] is None else f"{r['batch_wait_ms']:g}"
    return (f"{r['server']:>17} {r.get('front', '-'):>7} {r['graph']:>10} {r['batch']:>3} {shape:>11} {wait:>5} "
            f"{r['requests_per_s']:8.0f} {r['rows_per_s']:9.0f} {r['p50_ms']:7.2f} {r['p99_ms']:7.2f} "
            f"{r['non_2xx']:>6} {r['ready_s']:7.2f} {r['server_cpu_ms_per_request']:13.3f} "
            f"{r['client_cpu_ms_per_request']:6.3f} {r['implied_requests_per_s']:13.0f}")


# -- command line ----------------------------------------------------------------------------
def save_result(result: dict[str, Any], out: Path) -> Path:
    """Write ``run_bench``'s result to ``out`` as JSON (NumPy numbers as plain ones, NaN as null)."""
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps(result, indent=2, default=_json_default) + "\n")
    return out


def _json_default(value: Any) -> Any:
    if isinstance(value, (np.floating, np.integer)):
        return value.item()
    if isinstance(value, float) and math.isnan(value):
        return None
    raise TypeError(f"cannot encode {type(value).__name__}")
