"""Load: a real ``demur serve`` (gunicorn, 2 workers x 4 threads) on 127.0.0.1 under
32 concurrent keep-alive clients for 10,000 requests (short, CI) or 64 clients for
100,000 requests (long, on demand): zero errors, latency percentiles reported.

Reference: none outside the project is needed for "zero errors"; percentiles are
numpy.percentile (linear interpolation). Latency is reported, never asserted
(no timed tests): the figures go to the suite's summary table.
"""

from __future__ import annotations

from pathlib import Path

import pytest
import requests

from .harness import Server, digit_body, record, run_load


def _load(rel_bundles: dict[str, Path], tmp_path: Path, n: int, clients: int, name: str) -> None:
    with Server(rel_bundles["current"], tmp_path / "server.log", workers=2, threads=4,
                env={"DEMUR_DATA_DIR": str(tmp_path / "data")}) as server:
        result = run_load(server.url + "/v1/predict", n, clients, make_body=digit_body)
        healthy = requests.get(server.url + "/healthz", timeout=5).status_code
    record(name, requests=result.sent, errors=result.errors, p50_ms=result.percentile_ms(50),
           p99_ms=result.percentile_ms(99), note=f"{clients} clients, {result.sent / result.seconds:.0f} req/s")
    assert result.sent == n
    assert result.errors == 0, result.problems[:5]
    assert result.statuses == {200: n}
    assert result.versions == {"1": n}  # every answer names the model that produced it
    assert healthy == 200


def test_load_short(rel_bundles: dict[str, Path], tmp_path: Path) -> None:
    _load(rel_bundles, tmp_path, 10_000, 32, "load (short)")


@pytest.mark.long
def test_load_long(rel_bundles: dict[str, Path], tmp_path: Path) -> None:
    _load(rel_bundles, tmp_path, 100_000, 64, "load (long)")
