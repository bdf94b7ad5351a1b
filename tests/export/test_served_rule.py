"""The served rule is the calibrated rule: ``demur calibrate``'s per-case decisions on its own
calibration file equal the server's, posted in batches of 1, 7 and 64, for every graph kind.

Data: scikit-learn's bundled digits (load_digits), the demo's calibration split written to a
CSV as a user would bring it. The model: the trained demo network (tests/conftest.py).

Fixed draws (stacked, means) must agree case by case, exactly: the threshold sits midway
between two calibration scores, so float32 round-off from batch composition cannot move a
case across it. Fresh draws (sampler, flip) draw new weights on every call, so a case whose
score lies within the Monte-Carlo spread of the threshold can fall either side from one call
to the next; for them the support check (deterministic) must agree case by case, and the
score decisions may differ only on the few cases near the threshold.
"""

from __future__ import annotations

import csv
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from demur.export.calibration import calibrate_file
from demur.export.exporter import export_bundle
from demur.serve.adapters.engine import Engine
from demur.serve.config import ServeConfig
from demur.serve.core.bundle import load_bundle
from demur.serve.web.app import create_app

BATCHES = (1, 7, 64)


def _write_csv(path: Path, names: list[str], x: np.ndarray, y: np.ndarray) -> Path:
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow([*names, "digit"])
        for row, label in zip(x.tolist(), y.tolist()):
            w.writerow([*(f"{v:g}" for v in row), str(label)])
    return path


def _client(bundle: Any, graph: str, data_dir: Path) -> Any:
    """A fresh app serving ``bundle`` as tests/serve/conftest.py's ``make_app`` builds one."""
    config = ServeConfig(bundle=str(bundle.path), seed=0, graph=graph, data_dir=str(data_dir))
    return create_app(config, engine=Engine(bundle, graph=config.graph, seed=config.seed)).test_client()


def _served(client: Any, x: np.ndarray, batch: int) -> tuple[np.ndarray, np.ndarray]:
    """(abstain bool[N], outside bool[N]) as the server answers, ``batch`` cases per request."""
    abstain, outside = [], []
    for start in range(0, len(x), batch):
        r = client.post("/v1/predict", json={"cases": x[start:start + batch].tolist()})
        assert r.status_code == 200, r.get_json()
        for res in r.get_json()["results"]:
            abstain.append(res["decision"] == "abstain")
            outside.append(str(res["reason"]).startswith("outside_training_data"))
    return np.array(abstain), np.array(outside)


@pytest.fixture(scope="module")
def flip_bundle(demo_checkpoint: Path, tmp_path_factory: pytest.TempPathFactory) -> Any:
    return export_bundle(demo_checkpoint, tmp_path_factory.mktemp("flip") / "digits-flip", kind="flip", draws=32,
                         seed=0, version="1")


@pytest.mark.parametrize("kind", ["stacked", "means", "sampler", "flip"])
def test_server_decides_every_calibration_case_as_calibrate_did(kind, demo_bundle, demo_sampler_bundle, flip_bundle,
                                                                demo_dataset, copy_bundle, tmp_path):
    source = {"stacked": demo_bundle, "means": demo_bundle, "sampler": demo_sampler_bundle, "flip": flip_bundle}[kind]
    path = copy_bundle(source)
    names = list(load_bundle(path).manifest.inputs.names)
    data = _write_csv(tmp_path / "keyed.csv", names, demo_dataset.x_cal, demo_dataset.y_cal)
    graph = "means" if kind == "means" else kind
    out = calibrate_file(path, str(data), target="digit", target_abstain=0.1, graph=graph)
    v = out.verdicts
    assert v is not None and len(v.abstain) == len(demo_dataset.y_cal)
    rec = out.record
    # the record's figures are the served rule's, the support check's share counted separately
    assert rec["achieved"]["abstain_rate"] == pytest.approx(float(v.abstain.mean()))
    assert rec["achieved"]["outside_training_data"] == int(v.outside.sum())
    bundle = load_bundle(path)
    threshold = bundle.manifest.decision.threshold
    assert not np.any(np.isclose(v.score, threshold, rtol=1e-6, atol=0)), "threshold on a calibration score"
    client = _client(bundle, graph, tmp_path / "demur-data")
    for batch in BATCHES:
        abstain, outside = _served(client, demo_dataset.x_cal, batch)
        assert np.array_equal(outside, v.outside), f"support check differs at batch {batch}"
        if kind in ("stacked", "means"):
            diff = np.flatnonzero(abstain != v.abstain)
            assert not len(diff), f"batch {batch}: cases {diff[:10]} decided differently from calibrate"
        else:
            # fresh draws: a case near the threshold changes sides between two calls (measured on
            # this model, S = 32: 2-5% of cases); the served rate stays the calibrated one within
            # Monte-Carlo error. Flip's cases in one call share the base perturbation's radii
            # (export/flip.py), so its rate moves by call: calibrate's 359 cases are 2 calls, and
            # the served rate at batch 64 was measured 3.9 points off; tolerances are our choice.
            tolerance = 0.03 if kind == "sampler" else 0.06
            assert np.mean(abstain != v.abstain) <= 0.08, (batch, int(np.sum(abstain != v.abstain)))
            assert abs(abstain.mean() - v.abstain.mean()) <= tolerance, (batch, abstain.mean(), v.abstain.mean())
