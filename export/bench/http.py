"""``demur bench``'s HTTP section: the loop front's sizings, the maintained ASGI server beside
it, and the obvious torch server, all on 127.0.0.1 under one load generator.

Why a load generator in C: Debian's ``wrk`` (one thread, ``CLIENTS`` keep-alive connections, a
Lua script for the POST body) costs ~0.02 ms of CPU per request, so the client takes little of
the 2 cores the servers need. Every run also records the CPU the server's process group and
wrk spent per request: that figure does not depend on how busy the machine is, and
``implied_requests_per_s`` (cores / CPU per request) estimates an idle machine's capacity,
labelled as an estimate beside the measured figure.

What is measured (``_http_section``):

* the loop front (``demur serve``, serve/web/loop/) at each sizing of ``worker_models``
  ``(workers, threads, onnxruntime threads, batch wait ms)``, one-case and 64-case requests
  at S = 32; the chosen sizing has the most one-case requests/s (p99 within target, no
  errors) among those within 15% of the best 64-case rows/s;
* the bundle is what ``demur export`` writes by default: with its support check (and drift
  reference); with the chosen sizing, the same graphs without the support section, alternated
  one-case rounds, give the check's cost as a ratio (``support``);
* with the chosen sizing: the flip graph; the maintained ASGI server (export/bench/asgi.py:
  uvicorn with httptools under gunicorn's process management, an asyncio batcher, the Flask
  app through a WSGI adapter) against the loop front, alternated in ``front_rounds`` rounds,
  one-case and 64-case; the engine alone in the same processes x threads (the ceiling for
  HTTP rows/s); a minimal Flask app running the torch loop under gunicorn.

The one-front rule (issue 16): adopt the ASGI server when its one-case requests/s is within
15% of the loop front's (``FRONT_RULE``), else keep the loop front; the run records which.
"""

from __future__ import annotations

import contextlib
import json
import os
import re
import resource
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import time
import urllib.request
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np

from demur.export.errors import ExportError
from demur.serve.core.bundle import Bundle

__all__ = ["CLIENTS", "FRONT_RULE", "MODEL_ENV", "WRK", "baseline_model", "body_cost", "child_env",
           "http_section", "torch_app"]

WRK = "/usr/bin/wrk"
CLIENTS = 32
FRONT_RULE = 0.85
"""The ASGI server is adopted when its one-case requests/s >= FRONT_RULE x the loop front's."""
MODEL_ENV = "DEMUR_BENCH_TORCH_MODEL"  # read by torch_app() in the baseline server's workers
_P99_MS = 30.0                         # the one-case p99 target (TARGETS in export/bench/engine.py)


def child_env(*, one_thread: bool = False, **extra: str) -> dict[str, str]:
    """The environment of a measured child: no inherited ``DEMUR_*`` and no inherited thread
    settings. ``one_thread``: OpenMP, MKL and OpenBLAS at one thread, for the children whose own
    code sets none (the torch baseline server, engine-only processes). demur's servers get no such
    variable: they run with the threads ``demur serve`` sets itself (``blas_threads``,
    serve/adapters/compute.py), which is what a user gets."""
    env = {k: v for k, v in os.environ.items()
           if not k.startswith("DEMUR_") and k not in ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS")}
    if one_thread:
        env.update({"OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1"})
    env.update(extra)
    return env


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _get(url: str, timeout: float = 2.0) -> int:
    try:
        with urllib.request.urlopen(url, timeout=timeout) as r:  # noqa: S310 - 127.0.0.1 only
            return int(r.status)
    except OSError:
        return 0


@contextlib.contextmanager
def _server(argv: list[str], env: dict[str, str], port: int, log_path: Path) -> Iterator[tuple[float, int]]:
    """Start a server process group; yield (seconds from start to a 200 on /readyz, group id); stop it."""
    t0 = time.perf_counter()
    with open(log_path, "ab") as logf:
        proc = subprocess.Popen(argv, env=env, stdout=logf, stderr=subprocess.STDOUT, start_new_session=True)
    try:
        ready = None
        for _ in range(1200):  # bounded: 60 s
            if proc.poll() is not None:
                raise ExportError(f"server {' '.join(argv[:3])} exited with {proc.returncode}; see {log_path}",
                                  field="http")
            if _get(f"http://127.0.0.1:{port}/readyz", 0.5) == 200:
                ready = time.perf_counter() - t0
                break
            time.sleep(0.05)
        if ready is None:
            raise ExportError(f"server {' '.join(argv[:3])} was not ready within 60 s; see {log_path}", field="http")
        yield ready, proc.pid
    finally:
        with contextlib.suppress(ProcessLookupError):
            os.killpg(proc.pid, signal.SIGTERM)
        try:
            proc.wait(20)
        except subprocess.TimeoutExpired:
            with contextlib.suppress(ProcessLookupError):
                os.killpg(proc.pid, signal.SIGKILL)
            proc.wait(5)


_UNITS = {"us": 1e-3, "ms": 1.0, "s": 1e3, "m": 6e4}


def _ms(text: str) -> float:
    m = re.fullmatch(r"([\d.]+)(us|ms|s|m)", text.strip())
    return float(m.group(1)) * _UNITS[m.group(2)] if m else float("nan")


def _group_cpu_s(pgid: int) -> float:
    """CPU seconds (user + system) used so far by every live process of group ``pgid`` (from /proc)."""
    total = 0
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            fields = stat.read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue
        if int(fields[2]) == pgid:
            total += int(fields[11]) + int(fields[12])
    return total / os.sysconf("SC_CLK_TCK")


def _measured(url: str, body: bytes, seconds: int, workdir: Path, pgid: int, ctype: str = "application/json",
              clients: int = CLIENTS) -> dict[str, Any]:
    """A wrk run plus the CPU it cost (server group and wrk) per request; see the module docstring."""
    cpu0, kids0 = _group_cpu_s(pgid), resource.getrusage(resource.RUSAGE_CHILDREN)
    r = _wrk(url, body, seconds, workdir, ctype, clients)
    cpu1, kids1 = _group_cpu_s(pgid), resource.getrusage(resource.RUSAGE_CHILDREN)
    n = max(1, r["requests"])
    server = (cpu1 - cpu0) / n
    client = (kids1.ru_utime + kids1.ru_stime - kids0.ru_utime - kids0.ru_stime) / n
    r.update({"server_cpu_ms_per_request": server * 1e3, "client_cpu_ms_per_request": client * 1e3,
              "implied_requests_per_s": (os.cpu_count() or 1) / (server + client) if server + client > 0 else 0.0})
    return r


def _lua_string(text: str) -> str:
    """``text`` as a Lua long-bracket string whose level no ``]=...=]`` inside it can close."""
    level = 1
    while f"]{'=' * level}]" in text:
        level += 1
    return f"[{'=' * level}[{text}]{'=' * level}]"


def _lua_bytes(data: bytes) -> str:
    """``data`` as a Lua string of decimal escapes (binary-safe: long brackets rewrite line ends)."""
    return '"' + "".join(f"\\{b}" for b in data) + '"'


def _wrk(url: str, body: bytes, seconds: int, workdir: Path, ctype: str = "application/json",
         clients: int = CLIENTS) -> dict[str, Any]:
    """One wrk run (1 thread, ``clients`` connections, keep-alive): requests/s, p50, p99, non-2xx."""
    script = workdir / "post.lua"
    text = _lua_string(body.decode()) if ctype == "application/json" else _lua_bytes(body)
    script.write_text(f'wrk.method = "POST"\nwrk.headers["Content-Type"] = "{ctype}"\nwrk.body = {text}\n')
    out = subprocess.run([WRK, "-t1", f"-c{clients}", f"-d{seconds}s", "--timeout", "30s", "--latency", "-s",
                          str(script), url],
                         capture_output=True, text=True, timeout=seconds + 60)
    text = out.stdout
    rps = re.search(r"Requests/sec:\s+([\d.]+)", text)
    p50 = re.search(r"^\s+50%\s+(\S+)", text, re.M)
    p99 = re.search(r"^\s+99%\s+(\S+)", text, re.M)
    bad = re.search(r"Non-2xx or 3xx responses:\s+(\d+)", text)
    errors = re.search(r"Socket errors:.*", text)
    count = re.search(r"(\d+) requests in", text)
    return {"requests_per_s": float(rps.group(1)) if rps else 0.0, "requests": int(count.group(1)) if count else 0,
            "p50_ms": _ms(p50.group(1)) if p50 else float("nan"),
            "p99_ms": _ms(p99.group(1)) if p99 else float("nan"),
            "non_2xx": int(bad.group(1)) if bad else 0, "socket_errors": errors.group(0) if errors else ""}


def _body(xs: np.ndarray, B: int) -> bytes:
    return json.dumps({"cases": [[float(v) for v in row] for row in xs[:B]]}, separators=(",", ":")).encode()


# -- the servers ------------------------------------------------------------------------------
def _loop_argv(bundle: Bundle, port: int, workers: int, threads: int, ort: int, graph: str,
               data: Path) -> list[str]:
    return [sys.executable, "-m", "demur.serve.cli", "serve", str(bundle.path), "--host", "127.0.0.1",
            "--port", str(port), "--workers", str(workers), "--threads", str(threads), "--ort-threads", str(ort),
            "--graph", graph, "--data-dir", str(data)]


def _asgi_argv(port: int, workers: int) -> list[str]:
    # the access log on, as the loop front's: both write one line per request
    return [sys.executable, "-m", "gunicorn", "-k", "uvicorn_worker.UvicornWorker", "--workers", str(workers),
            "--bind", f"127.0.0.1:{port}", "--keep-alive", "5", "--access-logfile", "-", "--log-level", "warning",
            "demur.export.bench.asgi:app_from_environment()"]


def _asgi_env(bundle: Bundle, workers: int, threads: int, ort: int, graph: str, data: Path) -> dict[str, str]:
    env = {"DEMUR_BUNDLE": str(bundle.path), "DEMUR_GRAPH": graph, "DEMUR_THREADS": str(threads),
           "DEMUR_ORT_INTRA_THREADS": str(ort), "DEMUR_DATA_DIR": str(data), "DEMUR_WORKERS": str(workers)}
    if workers > 1:  # shared metrics, as demur serve sets up for more than one worker
        env["DEMUR_METRICS_MULTIPROCESS_DIR"] = tempfile.mkdtemp(prefix="demur-bench-metrics-", dir=data.parent)
    return child_env(**env)


def _torch_argv(port: int, workers: int, threads: int) -> list[str]:
    return [sys.executable, "-m", "gunicorn", "--bind", f"127.0.0.1:{port}", "--workers", str(workers),
            "--threads", str(threads), "--worker-class", "gthread", "--log-level", "warning",
            "demur.export.bench.http:torch_app()"]


_RATE_DEMUR = """
import sys, time
import numpy as np
from demur.serve.core.bundle import load_bundle
from demur.serve.adapters.engine import Engine
bundle, kind, rows, threads, start, seconds = sys.argv[1], sys.argv[2], int(sys.argv[3]), int(sys.argv[4]), float(sys.argv[5]), float(sys.argv[6])
engine = Engine(load_bundle(bundle), graph=kind, intra_threads=threads).load()
x = np.load(sys.argv[7])[:rows]
engine.run(x)
while time.time() < start:
    time.sleep(0.005)
n, t0 = 0, time.perf_counter()
while time.perf_counter() - t0 < seconds:
    engine.run(x)
    n += 1
print(n * rows / (time.perf_counter() - t0))
"""


def _parallel_rows(bundle: Bundle, kind: str, xs_file: Path, rows: int, procs: int, threads: int,
                   seconds: float) -> float:
    """Engine-only rows/s of ``procs`` processes x ``threads`` onnxruntime threads running side by
    side (started together), summed: what the server's worker model could do without HTTP."""
    start = time.time() + 3.0  # all loaded before any starts
    argv = [str(bundle.path), kind, str(rows), str(threads), str(start), str(seconds), str(xs_file)]
    children = [subprocess.Popen([sys.executable, "-c", _RATE_DEMUR, *argv], stdout=subprocess.PIPE, text=True,
                                 env=child_env(one_thread=True)) for _ in range(procs)]
    total = 0.0
    for child in children:
        out, _ = child.communicate(timeout=120 + seconds)
        total += float(out.strip().splitlines()[-1]) if child.returncode == 0 and out.strip() else float("nan")
    return total


# -- the section ------------------------------------------------------------------------------
class _Runner:
    """Starts one server, warms it, measures one body, stops it; logs a line per run."""

    def __init__(self, bundle: Bundle, xs: np.ndarray, workdir: Path, seconds: int,
                 log: Callable[[str], None]) -> None:
        self.bundle, self.workdir, self.seconds, self.log = bundle, workdir, seconds, log
        self.bodies = {1: _body(xs, 1), 64: _body(xs, 64)}
        self.logs = workdir / "servers.log"

    def _run(self, argv: list[str], env: dict[str, str], port: int, B: int) -> dict[str, Any]:
        with _server(argv, env, port, self.logs) as (ready, pgid):
            url = f"http://127.0.0.1:{port}/v1/predict"
            _wrk(url, self.bodies[1], 1, self.workdir)  # warm-up
            r = _measured(url, self.bodies[B], self.seconds, self.workdir, pgid)
        r.update({"batch": B, "ready_s": ready, "rows_per_s": r["requests_per_s"] * B})
        return r

    def demur(self, front: str, workers: int, threads: int, ort: int, wait_ms: float, graph: str,
              B: int, bundle: Bundle | None = None) -> dict[str, Any]:
        port = _free_port()
        data = self.workdir / f"data-{port}"
        if front == "loop":
            argv = _loop_argv(bundle or self.bundle, port, workers, threads, ort, graph, data)
            env = child_env(DEMUR_BATCH_WAIT_MS=str(wait_ms))
        else:  # the candidate batches what arrived in one loop pass: a wait of 0
            data.mkdir(parents=True, exist_ok=True)
            argv, env, wait_ms = _asgi_argv(port, workers), _asgi_env(self.bundle, workers, threads, ort, graph,
                                                                      data), 0.0
        r = self._run(argv, env, port, B)
        r.update({"server": "demur", "front": front, "graph": graph, "workers": workers, "threads": threads,
                  "ort_threads": ort, "batch_wait_ms": wait_ms})
        self.log(f"  http demur {front:>5} {graph:>7} w={workers} t={threads} ort={ort} wait={wait_ms}ms B={B:<3} "
                 f"{r['requests_per_s']:8.0f} req/s p50 {r['p50_ms']:.1f} ms p99 {r['p99_ms']:.1f} ms; server CPU "
                 f"{r['server_cpu_ms_per_request']:.2f} ms/req, wrk {r['client_cpu_ms_per_request']:.2f}")
        return r

    def torch(self, model_file: Path, S: int, workers: int, threads: int, B: int) -> dict[str, Any]:
        port = _free_port()
        env = child_env(one_thread=True, **{MODEL_ENV: str(model_file), "DEMUR_BENCH_DRAWS": str(S)})
        r = self._run(_torch_argv(port, workers, threads), env, port, B)
        r.update({"server": "torch_loop_flask", "front": "gthread", "graph": "torch loop", "workers": workers,
                  "threads": threads, "ort_threads": None, "batch_wait_ms": None})
        self.log(f"  http torch-loop flask B={B:<3} {r['requests_per_s']:8.0f} req/s p50 {r['p50_ms']:.1f} ms "
                 f"p99 {r['p99_ms']:.1f} ms")
        return r


def _fronts(run: _Runner, sizing: tuple[int, int, int, float], rounds: int) -> dict[str, Any]:
    """The loop front and the ASGI server, same sizing, alternated (ABAB...) so drifting load
    hits both alike; medians over the rounds, and the front the 15% rule picks."""
    w, t, o, wait = sizing
    rows: dict[str, dict[int, list[dict[str, Any]]]] = {"loop": {1: [], 64: []}, "asgi": {1: [], 64: []}}
    for i in range(rounds):
        for front in (("loop", "asgi") if i % 2 == 0 else ("asgi", "loop")):
            rows[front][1].append(run.demur(front, w, t, o, wait, "stacked", 1))
    for front in ("loop", "asgi"):
        rows[front][64].append(run.demur(front, w, t, o, wait, "stacked", 64))

    def med(front: str, B: int, key: str) -> float:
        return float(statistics.median(r[key] for r in rows[front][B]))

    summary = {front: {"one_case_requests_per_s": med(front, 1, "requests_per_s"),
                       "one_case_p99_ms": med(front, 1, "p99_ms"), "one_case_p50_ms": med(front, 1, "p50_ms"),
                       "one_case_server_cpu_ms_per_request": med(front, 1, "server_cpu_ms_per_request"),
                       "many_case_rows_per_s": med(front, 64, "rows_per_s"),
                       "many_case_p99_ms": med(front, 64, "p99_ms"),
                       "non_2xx": sum(r["non_2xx"] for B in (1, 64) for r in rows[front][B])}
               for front in ("loop", "asgi")}
    loop_rps = summary["loop"]["one_case_requests_per_s"]
    ratio = summary["asgi"]["one_case_requests_per_s"] / loop_rps if loop_rps > 0 else float("nan")
    chosen = "asgi" if ratio >= FRONT_RULE and not summary["asgi"]["non_2xx"] else "loop"
    return {"sizing": {"workers": w, "threads": t, "ort_threads": o, "batch_wait_ms": wait}, "rounds": rounds,
            "runs": [r for f in ("loop", "asgi") for B in (1, 64) for r in rows[f][B]], **summary,
            "asgi_over_loop_one_case": ratio,
            "asgi_over_loop_many_case_rows": (summary["asgi"]["many_case_rows_per_s"]
                                              / max(summary["loop"]["many_case_rows_per_s"], 1e-9)),
            "rule": f"adopt the ASGI server if its one-case req/s >= {FRONT_RULE:g} x the loop front's",
            "chosen": chosen}


def _support_cost(run: _Runner, sizing: tuple[int, int, int, float], unchecked: Bundle,
                  rounds: int) -> dict[str, Any]:
    """One-case stacked requests/s of the default bundle (support check on) and of the same graphs
    without the support section, alternated in ``rounds`` rounds; medians and their ratio."""
    w, t, o, wait = sizing
    runs: dict[str, list[dict[str, Any]]] = {"on": [], "off": []}
    for i in range(rounds):
        for which in (("on", "off") if i % 2 == 0 else ("off", "on")):
            r = run.demur("loop", w, t, o, wait, "stacked", 1, bundle=None if which == "on" else unchecked)
            r["support"] = which
            runs[which].append(r)
    med = {k: {m: float(statistics.median(r[m] for r in v))
               for m in ("requests_per_s", "p99_ms", "server_cpu_ms_per_request")} for k, v in runs.items()}
    off = med["off"]["requests_per_s"]
    return {"rounds": rounds, "runs": runs["on"] + runs["off"], "on": med["on"], "off": med["off"],
            "on_over_off_requests_per_s": med["on"]["requests_per_s"] / off if off > 0 else float("nan")}


def http_section(bundle: Bundle, S: int, xs: np.ndarray, model_file: Path, workdir: Path, cfg: dict[str, Any],
                 log: Callable[[str], None], unchecked: Bundle | None = None) -> dict[str, Any]:
    """Every HTTP measurement of one run (module docstring); ``bundle`` holds stacked and flip at S
    with the support check a default export carries; ``unchecked``: the same graphs without it."""
    if not os.access(WRK, os.X_OK):
        return {"skipped": f"{WRK} not found (apt-get install wrk)"}
    run = _Runner(bundle, xs, workdir, cfg["http_s"], log)
    section: dict[str, Any] = {"draws": S, "clients": CLIENTS, "seconds": cfg["http_s"],
                               "load_generator": "wrk (Debian), 1 thread, keep-alive, Lua POST body",
                               "worker_models": [], "cases": []}
    # each loop sizing serves one-case and 64-case requests; the choice is the sizing with the most
    # one-case requests/s (p99 within target, no errors) among those within 15% of the best 64-case
    # rows/s: fast for single parcels without giving up large batches
    singles, batches = [], []
    for workers, threads, ort, wait_ms in cfg["worker_models"]:
        singles.append(run.demur("loop", workers, threads, ort, wait_ms, "stacked", 1))
        batches.append(run.demur("loop", workers, threads, ort, wait_ms, "stacked", 64))
    section["worker_models"] = singles + batches
    top_rows = max(r["rows_per_s"] for r in batches)
    fit = [i for i, (one, big) in enumerate(zip(singles, batches))
           if one["p99_ms"] < _P99_MS and not one["non_2xx"] and not big["non_2xx"]
           and big["rows_per_s"] >= 0.85 * top_rows]
    pick = max(fit or range(len(singles)), key=lambda i: singles[i]["requests_per_s"])
    best = singles[pick]
    w, t, o, wait = (best[k] for k in ("workers", "threads", "ort_threads", "batch_wait_ms"))
    section["chosen"] = {"front": "loop", "workers": w, "threads": t, "ort_threads": o, "batch_wait_ms": wait}
    section["cases"] += [best, run.demur("loop", w, t, o, wait, "flip", 1), batches[pick],
                         run.demur("loop", w, t, o, wait, "flip", 64)]
    section["fronts"] = _fronts(run, (w, t, o, wait), cfg["front_rounds"])
    if unchecked is not None:
        section["support"] = _support_cost(run, (w, t, o, wait), unchecked, max(2, cfg["front_rounds"]))
    xs_file = workdir / "cases.npy"
    np.save(xs_file, xs[:64])
    section["engine_same_cores"] = {
        "workers": w, "ort_threads": o, "rows": 64,
        "rows_per_s": {g: _parallel_rows(bundle, g, xs_file, 64, w, o, cfg["http_s"]) for g in ("stacked", "flip")}}
    section["cases"] += [run.torch(model_file, S, w, t, B) for B in (1, 64)]
    return section


def body_cost(bundle: Bundle, bodies: dict[str, tuple[bytes, str]], workdir: Path, seconds: int,
              log: Callable[[str], None], clients: int = 4, rounds: int = 2) -> list[dict[str, Any]]:
    """One-case requests to ``demur serve`` as it starts by default (2 workers on 2 cores), each
    body of ``bodies`` (label -> (bytes, Content-Type)) in alternated rounds on one server:
    requests/s, p99, server CPU per request. ``clients`` connections: few, for a slow graph."""
    port = _free_port()
    argv = [sys.executable, "-m", "demur.serve.cli", "serve", str(bundle.path), "--host", "127.0.0.1", "--port",
            str(port), "--data-dir", str(workdir / f"data-{port}")]
    rows = []
    with _server(argv, child_env(), port, workdir / "servers.log") as (_ready, pgid):
        url = f"http://127.0.0.1:{port}/v1/predict"
        for i in range(rounds):
            for label, (body, ctype) in (list(bodies.items()) if i % 2 == 0 else list(bodies.items())[::-1]):
                _wrk(url, body, 1, workdir, ctype, clients)  # warm-up
                r = _measured(url, body, seconds, workdir, pgid, ctype, clients)
                r.update({"body": label, "bytes": len(body), "clients": clients, "round": i})
                rows.append(r)
                log(f"  http one case {label:>14} {len(body) / 1e3:9.1f} kB {r['requests_per_s']:8.1f} req/s p99 "
                    f"{r['p99_ms']:.1f} ms; server CPU {r['server_cpu_ms_per_request']:.2f} ms/req")
    return rows


# -- the baseline server ---------------------------------------------------------------------
def baseline_model(path: str) -> tuple[Any, dict[str, Any]]:
    """The bench's MLP and input spec from the file ``export/bench/engine.py`` saved (torch, eval mode)."""
    import torch

    from demur.export.layers import build_model

    saved = torch.load(path, weights_only=True)
    model = build_model("mlp", [64], 10, saved["posterior"], hidden=tuple(saved["hidden"]))
    model.load_state_dict(saved["state_dict"])
    model.eval()
    return model, saved["inputs"]


def torch_app() -> Any:
    """The obvious server a user would write: Flask, a torch loop of S sampled forward passes.

    gunicorn factory (``demur.export.bench.http:torch_app()``); reads the model file named
    by ``DEMUR_BENCH_TORCH_MODEL`` and S from ``DEMUR_BENCH_DRAWS`` when called
    (in each worker). Same request body as demur's predict route; answers mean
    probabilities, predicted label and mutual information per case.
    """
    import torch
    from flask import Flask, jsonify, request

    torch.set_num_threads(1)
    model, spec = baseline_model(os.environ[MODEL_ENV])
    S = int(os.environ.get("DEMUR_BENCH_DRAWS", "32"))
    center = torch.tensor(spec["center"], dtype=torch.float32)
    scale = torch.tensor(spec["scale"], dtype=torch.float32)
    app = Flask("torch-loop-baseline")

    @app.post("/v1/predict")
    def predict() -> Any:
        x = (torch.tensor(request.get_json()["cases"], dtype=torch.float32) - center) / scale
        with torch.no_grad():
            logp = torch.stack([torch.log_softmax(model(x), -1) for _ in range(S)])  # [S, B, K]
        p = logp.exp()
        mean = p.mean(0)
        predictive = -(mean * mean.clamp_min(1e-30).log()).sum(-1)
        expected = -(p * logp).sum(-1).mean(0)
        return jsonify({"results": [{"prediction": int(k), "mean": m, "mutual_information": float(mi)}
                                    for k, m, mi in zip(mean.argmax(-1), mean.tolist(), predictive - expected)]})

    @app.get("/readyz")
    def ready() -> Any:
        return jsonify({"status": "ready"})

    return app
