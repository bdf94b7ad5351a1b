"""The review-order trial (export/review_value.py) runs end to end on scikit-learn's bundled
digits at a toy size; its measured table is in the README (a measurement, not a test)."""

from __future__ import annotations

from demur.export.review_value import measure_review_order


def test_the_trial_compares_both_orders_on_the_same_retraining() -> None:
    row = measure_review_order(0, start=80, budget=10, epochs=2, draws=4)
    assert row["queue"] >= 10
    for name in ("start_accuracy", "oldest", "most_uncertain"):
        assert 0.0 <= row[name] <= 1.0
    assert row["oldest_gain_per_label"] == (row["oldest"] - row["start_accuracy"]) / 10
