"""export/bench/score.py: the scoring section of ``demur bench`` has its documented shape.

No timing is asserted (speed is the benchmark's own job, as ratios measured in one run):
a tiny run checks that every row, the ratio and the target are present and well formed.
The rows scored are scikit-learn's bundled digits.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

from demur.export.bench.score import SCORE_TARGET, score_section


def test_score_section_has_every_row_and_the_ratio(tiny_bundle_factory: Any, tmp_path: Path) -> None:
    bundle = tiny_bundle_factory(task="classification", kind="stacked", draws=8)
    section = score_section(bundle.path, rows=3000, workdir=tmp_path, repeats=1, workers=(1,), partitions=2)
    whats = [row["what"] for row in section["rows"]]
    assert whats[0].startswith("engine only") and whats[2].startswith("demur score parquet")
    assert any(w.startswith("Dask local cluster, 1 worker") for w in whats)
    for row in section["rows"]:
        spread = row["rows_per_s"]
        assert 0 < spread["min"] <= spread["median"] <= spread["max"] and math.isfinite(spread["max"])
    assert section["target"] == SCORE_TARGET and section["met"] == (section["ratio"] >= SCORE_TARGET)
    assert section["cases"] == 3000 and (tmp_path / "scored-1w" / "part-00001.parquet").is_file()
