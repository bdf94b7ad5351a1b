"""serve/core/decision.py: the rule "abstain iff score > threshold" and where the rule comes from.

References: the scores are the summary's own fields (checked against scipy in
test_summary.py); here the decision must agree with a direct numpy comparison
of score and threshold, and the override order must follow DEVELOPERS.md
(bundle decision section, overridden by the server configuration).
"""

from __future__ import annotations

import dataclasses
import re

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from demur.serve.core.bundle import DecisionSection
from demur.serve.config import ServeConfig
from demur.serve.core.decision import DecisionRule, decide, rule_from, score_values
from demur.serve.errors import ConfigError
from demur.serve.core.summary import classification_summary, regression_summary


@settings(max_examples=100, deadline=None)
@given(st.integers(0, 2**32 - 1), st.floats(0.0, 2.5), st.sampled_from(["mutual_information",
       "predictive_entropy", "one_minus_max_prob"]))
def test_decision_consistent_with_score_and_threshold(seed, threshold, score):
    """abstain == (score > threshold) elementwise, and the reason states the comparison."""
    rng = np.random.default_rng(seed)
    s = classification_summary(rng.normal(scale=3, size=(16, 12, 10)), 0.9)
    d = decide(s, DecisionRule(score, threshold, "config"))
    np.testing.assert_array_equal(d.score, getattr(s, score))
    np.testing.assert_array_equal(d.abstain, getattr(s, score) > threshold)
    for value, abstain, reason in zip(d.score, d.abstain, d.reason):
        m = re.fullmatch(rf"{score} (\S+)(?: nats)? (>|<=) threshold (\S+)", reason)
        assert m and (m.group(2) == ">") == bool(abstain)
        assert float(m.group(1)) == pytest.approx(value, abs=5e-4)


def test_reason_text_worked_example():
    s = classification_summary(np.array([[[9.0, 0.0]], [[0.0, 9.0]]]), 0.9)  # MI = ln 2 - H(p) ≈ 0.692
    d = decide(s, DecisionRule("mutual_information", 0.15, "calibrated"))
    assert d.abstain.tolist() == [True]
    assert d.reason == ["mutual_information 0.6919 nats > threshold 0.15"]


def test_scores_that_do_not_fit_the_task_are_config_errors():
    rng = np.random.default_rng(0)
    c = classification_summary(rng.normal(size=(4, 3, 5)), 0.9)
    r = regression_summary(rng.normal(size=(4, 3, 2)), 0.9)
    for name in ("interval_width", "epistemic_std"):
        with pytest.raises(ConfigError, match="not defined for classification"):
            score_values(c, name)
        assert score_values(r, name).shape == (3,)
    with pytest.raises(ConfigError, match="not defined for regression"):
        score_values(r, "one_minus_max_prob")
    with pytest.raises(ConfigError, match="must be one of"):
        score_values(c, "confidence")
    with pytest.raises(ConfigError, match="finite"):
        DecisionRule("mutual_information", float("nan"), "config")


@dataclasses.dataclass
class _Manifest:
    task: str
    decision: DecisionSection


def test_rule_from_bundle_and_config_override():
    """Order from DEVELOPERS.md: the bundle's decision section, overridden by ServeConfig."""
    calibrated = _Manifest("classification", DecisionSection("mutual_information", 0.2, {"method": "x"}))
    plain = _Manifest("classification", DecisionSection("mutual_information", 0.3, None))
    assert rule_from(calibrated, ServeConfig()) == DecisionRule("mutual_information", 0.2, "calibrated")
    assert rule_from(plain, None) == DecisionRule("mutual_information", 0.3, "bundle")
    assert rule_from(plain, ServeConfig(threshold=0.05)) == DecisionRule("mutual_information", 0.05, "config")
    assert rule_from(plain, ServeConfig(score="one_minus_max_prob", threshold=0.1)).score == "one_minus_max_prob"
    with pytest.raises(ConfigError, match="no threshold"):
        rule_from(plain, ServeConfig(score="predictive_entropy"))
    with pytest.raises(ConfigError, match="not defined for classification"):
        rule_from(plain, ServeConfig(score="interval_width", threshold=1.0))


class _Outside:
    """A support check double: case i is outside iff flags[i] (the real check: test_support.py)."""

    def __init__(self, flags):
        self.flags = np.asarray(flags, dtype=bool)

    def check(self, x_raw, x_std=None):
        from demur.serve.core.support import SupportResult

        return SupportResult(outside=self.flags[: len(x_raw)], distance=np.zeros(len(x_raw)),
                             reason=["outside_training_data: test" if f else None for f in self.flags[: len(x_raw)]])


def test_served_rule_is_support_first_then_score_and_ranks_as_one_number():
    """ServedRule: an outside case abstains whatever its score, reason first; ``ranking`` as
    np.where(outside, inf, score) <= threshold reproduces ``decide``'s accept flags exactly."""
    from demur.serve.core.decision import ServedRule

    rng = np.random.default_rng(3)
    s = classification_summary(rng.normal(scale=3, size=(16, 6, 10)), 0.9)
    flags = [True, False, False, True, False, False]
    t = float(np.median(s.mutual_information))
    served = ServedRule(DecisionRule("mutual_information", t, "calibrated"), _Outside(flags))
    v = served.decide(s, np.zeros((6, 64)))
    np.testing.assert_array_equal(v.outside, flags)
    np.testing.assert_array_equal(v.abstain, np.asarray(flags) | (s.mutual_information > t))
    assert v.reason[0].startswith("outside_training_data") and v.cause[0] == "outside_training_data"
    score, outside = served.ranking(s, np.zeros((6, 64)))
    np.testing.assert_array_equal(np.where(outside, np.inf, score) <= t, ~v.abstain)
    with pytest.raises(ValueError, match="raw inputs"):
        served.decide(s, None)
    assert decide(s, served.rule, support=served.support, x_raw=np.zeros((6, 64))).abstain.tolist() == v.abstain.tolist()
