"""export/bench/engine.py: a tiny ``demur bench`` run has the documented JSON shape.

No timing is asserted (speed is for the benchmark itself, as ratios): these
tests check that every section, ratio and target is present and well formed.
Reference for the parameter count: a dense layer of n_in -> n_out has
n_in * n_out weights and n_out biases (definition of an affine map), so
64-256-256-10 has 16,640 + 65,792 + 2,570 = 85,002 parameters.
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

import pytest

from demur.export.bench.engine import BENCH_FORMAT, TARGETS, format_table, run_bench
from demur.serve.cli import build_parser

TINY = {"draws": [4], "batches": [1, 2], "repeats": 1, "budget_s": 0.0, "rss": False,
        "http_s": 1, "worker_models": [(1, 2, 1, 0.0)], "front_rounds": 1, "conv_draws": 4,
        "conv_nets": ["small"], "backbone_draws": 4, "backbone_sizes": [32], "backbone_batches": [1, 2],
        "backbone_width": 4, "score_rows": 300, "score_workers": []}


@pytest.fixture(scope="module")
def tiny_result(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    return run_bench(quick=True, http=False, workdir=tmp_path_factory.mktemp("bench"), log=lambda _m: None,
                     settings=TINY)


def test_tiny_run_has_every_section(tiny_result: dict[str, Any]) -> None:
    r = tiny_result
    assert r["format"] == BENCH_FORMAT and r["quick"] is True
    assert r["model"] == {"arch": "64-256-256-10", "posterior": "radial", "parameters": 85002, "trained": False}
    modes = {(e["mode"], e["batch"]) for e in r["engine"]}
    expected = {"means", "stacked", "sampler", "flip", "torch_loop", "torch_batched"}
    assert modes == {(m, b) for m in expected for b in (1, 2)}
    for e in r["engine"]:
        lat = e["latency_ms"]
        assert 0 < lat["min"] <= lat["median"] <= lat["max"]
        assert e["rows_per_s"] > 0 and e["draws"] == (1 if e["mode"] == "means" else 4)
    assert set(r["summaries"]) == {"draws", "batch", "engine_ms", "summary_ms", "share_of_engine"}
    mem = {m["mode"]: m for m in r["memory"]}
    # S = 4 weight sets, except the first dense layer: its means and variances plus 4 x out output noises
    # (local reparameterisation where draws enter, export/local.py)
    assert 2 < mem["stacked"]["file_over_param_bytes"] < 4
    assert mem["flip"]["file_over_param_bytes"] == pytest.approx(2, rel=0.15)      # mu + sigma, graph overhead
    assert r["http"] == {"skipped": "--no-http"}
    (conv,) = r["conv"]
    # 8x8 digits: stem 1*8*9+8, one block 8*8*9+8 (+ batch norm: 2*8 affine, 2*8 running statistics),
    # head 128*10+10 (definition of a convolution / affine map)
    assert conv["name"] == "small" and conv["parameters"] == 80 + 584 + 32 + 1290
    assert {(e["mode"], e["batch"]) for e in conv["engine"]} == {(m, b) for m in ("stacked", "flip") for b in (1, 2)}
    assert all(e["draws"] == 4 and e["latency_ms"]["median"] > 0 for e in conv["engine"])
    assert {m["mode"] for m in conv["memory"]} == {"stacked", "flip"}
    (bll,) = r["backbone"]
    assert bll["input"] == [3, 32, 32] and bll["draws"] == 4
    modes = {(row["mode"], row["batch"]) for row in bll["rows"]}
    assert modes == {(m, b) for m in ("stacked", "sampler", "flip", "means", "stacked per draw (before)")
                     for b in (1, 2)}
    assert all(row["over_deterministic"] > 0 for row in bll["rows"])
    assert all(v.startswith("shared") for k, v in bll["computation"].items() if k != "means")
    json.dumps(r)  # serialisable as written to bench.json


def test_the_default_export_is_scored_as_demur_score_scores_it(tiny_result: dict[str, Any]) -> None:
    """The score section measures `demur score` against the engine on the bundle `demur export`
    writes by default (support check on); the cluster rows are skipped in the tiny run."""
    score = tiny_result["score"]
    whats = [row["what"] for row in score["rows"]]
    assert any("engine" in w for w in whats) and any("demur score" in w for w in whats)
    assert score["ratio"] > 0 and score["target"] == 0.7
    assert "demur score, rows/s" in format_table(tiny_result)


def test_ratios_and_targets_are_named(tiny_result: dict[str, Any]) -> None:
    ratios = tiny_result["ratios"]
    assert "flip_over_stacked_S4_B1" in ratios and "torch_loop_over_stacked_S4_B1" in ratios
    assert "summary_share_of_engine_B64_S32" in ratios
    assert "conv_small_flip_over_stacked_S4_B1" in ratios and "memory_file_over_params_conv_small_flip_S4" in ratios
    assert "backbone_3x32x32_stacked_over_deterministic_S4_B2" in ratios
    names = [t["name"] for t in tiny_result["targets"]]
    assert "summaries / engine time, B=64 S=32" in names
    assert any(n.startswith("conv small") and "flip latency" in n for n in names)
    for t in tiny_result["targets"]:
        assert set(t) == {"name", "target", "value", "reached"}
    assert TARGETS["http_requests_per_s"] == 1500.0 and TARGETS["http_p99_ms"] == 30.0  # issue 8, never weakened


def test_table_prints_every_engine_row(tiny_result: dict[str, Any]) -> None:
    table = format_table(tiny_result)
    assert "engine level" in table and "targets (issues 8, 12, 16, 22)" in table and "conv nets" in table
    assert "Bayesian last layers" in table
    assert table.count("\n") > len(tiny_result["engine"])


def test_bench_is_a_demur_subcommand() -> None:
    args = build_parser().parse_args(["bench", "--quick", "--out", "x.json"])
    assert args.quick and args.out == Path("x.json") and callable(args.func)


@pytest.mark.long
@pytest.mark.skipif(not os.access("/usr/bin/wrk", os.X_OK), reason="needs Debian's wrk")
def test_tiny_http_section_has_demur_and_the_torch_server(tmp_path: Path, request: pytest.FixtureRequest) -> None:
    # ten server starts: on demand only (pytest -m long). Both servers on 127.0.0.1, 1-second
    # wrk runs, bounded start (60 s) and stop; shape only, no timing
    if "long" not in (request.config.getoption("-m") or ""):
        pytest.skip("starts ten servers; run with -m long")
    r = run_bench(quick=True, http=True, workdir=tmp_path, log=lambda _m: None, settings=TINY)
    http = r["http"]
    servers = {(c["server"], c["graph"], c["batch"]) for c in http["cases"]}
    assert {("demur", "stacked", 1), ("demur", "flip", 1), ("demur", "stacked", 64),
            ("torch_loop_flask", "torch loop", 1), ("torch_loop_flask", "torch loop", 64)} <= servers
    for case in http["cases"]:
        assert case["requests_per_s"] >= 0 and case["non_2xx"] == 0 and case["ready_s"] > 0
    assert "http_stacked_over_torch_loop_server" in r["ratios"]
    fronts = http["fronts"]
    assert {(c["front"], c["batch"]) for c in fronts["runs"]} == {(f, b) for f in ("loop", "asgi") for b in (1, 64)}
    assert fronts["chosen"] in ("loop", "asgi") and fronts["asgi_over_loop_one_case"] > 0
    assert all(c["non_2xx"] == 0 for c in fronts["runs"])
