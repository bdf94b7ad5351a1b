"""serve/core/render.py: summaries and decisions -> the JSON results a client receives.

References: the result schema in serve/web/openapi.json (``Result``), checked with
jsonschema's Draft 2020-12 validator (the dialect of OpenAPI 3.1); the BALD decomposition
(Houlsby et al. 2011, eq. 1) recomputed with ``scipy.stats.entropy`` from the same draws, so
the rendered numbers are the summary's, in nats, case by case and in request order.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from jsonschema import Draft202012Validator
from scipy.special import softmax
from scipy.stats import entropy

from demur.serve.core import render
from demur.serve.core.decision import DecisionRule, decide
from demur.serve.core.summary import summarise

OPENAPI = json.loads((Path(render.__file__).parents[1] / "web" / "openapi.json").read_text())


def _validator(name: str) -> Draft202012Validator:
    schema = {"$ref": f"#/components/schemas/{name}", "components": OPENAPI["components"]}
    return Draft202012Validator(schema)


def test_classification_results_carry_the_summary_in_request_order() -> None:
    rng = np.random.default_rng(7)
    logits = rng.normal(scale=3.0, size=(16, 4, 3)).astype(np.float32)  # [S, B, K]
    summary = summarise("classification", logits, 0.9)
    rule = DecisionRule("mutual_information", 0.05, "calibrated")
    out = render.results(summary, decide(summary, rule), rule, ("parcel-A", "parcel-B", "parcel-C"),
                         ["c1", None, "c3", "c4"])
    probs = softmax(logits.astype(np.float64), axis=-1)
    mean = probs.mean(axis=0)
    for i, item in enumerate(out):
        _validator("Result").validate(item)
        total = entropy(mean[i])
        expected = np.mean([entropy(p) for p in probs[:, i]])
        assert item["uncertainty"]["unit"] == "nats"
        assert item["uncertainty"]["predictive_entropy"] == pytest.approx(total, abs=1e-6)
        assert item["uncertainty"]["mutual_information"] == pytest.approx(total - expected, abs=1e-6)
        assert item["mean"] == pytest.approx(mean[i].tolist(), abs=1e-6)
        assert item["prediction"] == ("parcel-A", "parcel-B", "parcel-C")[int(np.argmax(mean[i]))]
        assert item["decision"] == ("abstain" if total - expected > 0.05 else "accept")
        assert item["score"] == {"name": "mutual_information", "value": item["uncertainty"]["mutual_information"]}
        assert item["threshold"] == 0.05 and item["interval"]["level"] == 0.9
    assert [r["case_id"] for r in out] == ["c1", None, "c3", "c4"]


def test_regression_results_in_target_units() -> None:
    rng = np.random.default_rng(3)
    draws = np.stack([rng.normal(size=(8, 2)), rng.normal(-2.0, 0.1, size=(8, 2))], axis=-1).astype(np.float32)
    target = {"center": 150.0, "scale": 75.0}
    summary = summarise("regression", draws, 0.8, target)
    rule = DecisionRule("epistemic_std", 1e9, "bundle")
    [first, second] = render.results(summary, decide(summary, rule), rule, ("progression",), [None, "p-2"])
    for item in (first, second):
        _validator("Result").validate(item)
        assert item["decision"] == "accept" and item["prediction"] == item["mean"]
        lo, hi = item["interval"]["lower"], item["interval"]["upper"]
        assert lo < item["mean"] < hi and item["interval"]["level"] == 0.8
        v = item["variance"]
        assert v["total"] == pytest.approx(v["epistemic"] + v["aleatoric"], rel=1e-9)
    # the mixture mean is the average of the draw means, back in target units
    assert first["mean"] == pytest.approx(150.0 + 75.0 * float(draws[:, 0, 0].astype(np.float64).mean()), rel=1e-6)
