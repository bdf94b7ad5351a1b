"""Cases whose draws are NaN or infinite are refused (422 naming the case), never served.

A schema fuzz found it: one pixel at float32's largest value (3.4028235e38, which validation accepts)
overflowed a graph to NaN, and the server answered 200 with null probabilities and "accept". The
pipeline now checks the draws: the request holding such a case gets 422 ``output_not_finite`` with
``field`` = ``cases[i]``; requests batched with it are answered; a scored file marks the row and
goes on. The engine here is the real one, wrapped so that cases whose first raw input is above 1e30
come back NaN (the overflow itself depends on the graph; the refusal must not).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
from prometheus_client import CollectorRegistry

from demur.serve.adapters.engine import Engine
from demur.serve.config import ServeConfig
from demur.serve.core.bundle import load_bundle
from demur.serve.core.pipeline import Runtime
from demur.serve.errors import OutputNotFinite
from demur.serve.web.app import create_app
from demur.serve.web.metrics_http import Metrics


class _Overflowing:
    """The real engine, except that a case whose first raw input exceeds 1e30 gets NaN draws."""

    def __init__(self, engine: Engine) -> None:
        self._engine, self._raw = engine, None

    def __getattr__(self, name: str) -> Any:
        return getattr(self._engine, name)

    def standardise(self, x: np.ndarray) -> np.ndarray:
        self._raw = x
        return self._engine.standardise(x)

    def run_standardised(self, x_std: np.ndarray) -> np.ndarray:
        draws = self._engine.run_standardised(x_std)
        huge = self._raw.reshape(len(self._raw), -1)[:, 0] > 1e30
        draws[:, huge, :] = np.nan
        return draws


def _runtime(bundle: Any, tmp_path: Path) -> Runtime:
    config = ServeConfig(bundle=str(bundle.path), seed=0, data_dir=str(tmp_path / "data"))
    runtime = Runtime(config, load_engine=lambda p: _Overflowing(Engine(load_bundle(p), seed=0)))
    runtime.start()
    return runtime


def test_only_the_body_with_the_case_is_refused(tiny_bundle_factory: Any, tmp_path: Path) -> None:
    bundle = tiny_bundle_factory()
    n = bundle.manifest.inputs.size
    fine, huge = [0.0] * n, [3.4e38] + [0.0] * (n - 1)
    runtime = _runtime(bundle, tmp_path)
    _, answers = runtime.answer([{"cases": [fine, fine]}, {"cases": [fine, huge, fine]}, {"cases": [fine]}])
    assert [len(a["results"]) for a in (answers[0], answers[2])] == [2, 1]
    err = answers[1]
    assert isinstance(err, OutputNotFinite) and err.status == 422 and err.field == "cases[1]"
    assert "not a finite number" in err.message
    for a in (answers[0], answers[2]):
        assert all(np.isfinite(r["uncertainty"]["predictive_entropy"]) for r in a["results"])


def test_http_answers_422_naming_the_case(tiny_bundle_factory: Any, tmp_path: Path) -> None:
    bundle = tiny_bundle_factory()
    n = bundle.manifest.inputs.size
    config = ServeConfig(bundle=str(bundle.path), seed=0, data_dir=str(tmp_path / "data"))
    app = create_app(config, engine=_Overflowing(Engine(load_bundle(bundle.path), seed=0)),
                     metrics=Metrics(config, registry=CollectorRegistry()))
    r = app.test_client().post("/v1/predict", json={"cases": [[0.0] * n, [3.4e38] + [0.0] * (n - 1)]})
    assert r.status_code == 422
    body = r.get_json()["error"]
    assert body["code"] == "output_not_finite" and body["field"] == "cases[1]"


def test_huge_but_finite_draws_are_served() -> None:
    """Draws near float32's largest value are finite: their sum overflowing must not refuse them."""
    import pytest

    from demur.serve.core.pipeline import _check_finite

    draws = np.full((4, 3, 2), 3e38, dtype=np.float32)
    _check_finite(draws)                      # no refusal
    draws[1, 2, 0] = np.inf
    with pytest.raises(OutputNotFinite) as info:
        _check_finite(draws)
    assert info.value.cases == [2] and info.value.field == "cases[2]"


def test_a_value_that_standardises_past_float32_is_refused_before_the_graph(tmp_path: Path) -> None:
    """(x - center) / scale runs in float32 (the graph's input type): 3e38 over a scale of 0.01 is 3e40,
    past float32's largest value (about 3.4e38, numpy.finfo(np.float32).max), so it standardises to
    infinity although validation accepted it. Refused with the same 422 naming the case, before the
    graph runs, the support check silent (warnings are errors in this suite), the other body answered."""
    import torch

    from demur.export import export_model
    from demur.export.layers import build_model

    rng = np.random.default_rng(0)
    reference = rng.uniform(0.0, 1.0, size=(64, 4))
    spec = {"names": ["a", "b", "c", "d"], "shape": [4], "dtype": "float32", "center": [0.5] * 4,
            "scale": [0.01, 1.0, 1.0, 1.0], "low": [0.0] * 4, "high": [1.0] * 4, "kind": "tabular"}
    torch.manual_seed(0)
    model = build_model("mlp", [4], 3, "radial", hidden=(8,), init_sigma=0.05)
    bundle = export_model(model, tmp_path / "bundle", labels=["x", "y", "z"], inputs=spec, reference=reference,
                          kind="stacked", draws=8, seed=0, name="tiny-scale", version="0")
    runs = []

    class _Counting:
        def __init__(self, engine: Engine) -> None:
            self._engine = engine

        def __getattr__(self, name: str) -> Any:
            return getattr(self._engine, name)

        def run_standardised(self, x_std: np.ndarray) -> np.ndarray:
            runs.append(len(x_std))
            return self._engine.run_standardised(x_std)

    config = ServeConfig(bundle=str(bundle.path), seed=0, data_dir=str(tmp_path / "data"))
    runtime = Runtime(config, load_engine=lambda p: _Counting(Engine(load_bundle(p), seed=0)))
    runtime.start()
    runs.clear()
    _, answers = runtime.answer([{"cases": [[0.5, 0.5, 0.5, 0.5], [3e38, 0.5, 0.5, 0.5]]},
                                 {"cases": [[0.4, 0.5, 0.6, 0.5]]}])
    err = answers[0]
    assert isinstance(err, OutputNotFinite) and err.status == 422 and err.field == "cases[1]"
    assert len(answers[1]["results"]) == 1
    assert runs == [1]            # only the second body's case reached the graph
