"""Fixtures for the reliability suite: bundle directories for roll-outs and the figures table.

Tests marked ``long`` run only when asked for (``pytest -m long``); the short
variants run in CI. The table of figures is printed at the end of the run.
"""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path
from typing import Any

import pytest

from demur.serve.core.bundle import load_bundle, write_manifest

from .harness import RECORDS, format_table

TOKENS = {"predict": "rel-predict-token-7f3a", "review": "rel-review-token-91c2", "admin": "rel-admin-token-c0de"}
"""Tokens the suite's servers are started with (test values, 127.0.0.1 only)."""


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    expr = config.getoption("markexpr") or ""
    if "long" in expr:
        return
    skip = pytest.mark.skip(reason="long reliability variant: run with -m long")
    here = Path(__file__).parent
    for item in items:
        if "long" in item.keywords and Path(str(item.fspath)).is_relative_to(here):
            item.add_marker(skip)


def pytest_terminal_summary(terminalreporter: Any) -> None:
    if RECORDS and not os.environ.get("DEMUR_RELIABILITY_REPORT"):  # run_suite.py prints its own
        terminalreporter.write_sep("=", "demur reliability figures")
        terminalreporter.write_line(format_table(RECORDS))


def _versioned_copy(src: Path, dest: Path, version: str) -> Path:
    shutil.copytree(src, dest)
    raw = json.loads((dest / "manifest.json").read_text())
    raw["model"]["version"] = version
    write_manifest(dest, raw)
    load_bundle(dest)
    return dest


@pytest.fixture(scope="module")
def rel_bundles(tiny_bundle_factory: Any, tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """bundles/v1, bundles/v2 (same graphs, other version), bundles/corrupt (a flipped
    graph byte: its SHA-256 no longer matches), bundles/current -> v1."""
    root = tmp_path_factory.mktemp("rel-bundles")
    base = Path(tiny_bundle_factory().path)
    v1 = _versioned_copy(base, root / "v1", "1")
    v2 = _versioned_copy(base, root / "v2", "2")
    corrupt = _versioned_copy(base, root / "corrupt", "3")
    graph = sorted(corrupt.glob("*.onnx"))[0]
    data = bytearray(graph.read_bytes())
    data[len(data) // 2] ^= 0xFF
    graph.write_bytes(bytes(data))
    current = root / "current"
    current.symlink_to(v1, target_is_directory=True)
    return {"root": root, "v1": v1, "v2": v2, "corrupt": corrupt, "current": current}
