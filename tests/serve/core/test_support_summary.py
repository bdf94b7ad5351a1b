"""What the support check stores (serve/core/support.py ``summary``; export_model ``support=``).

References: scikit-learn's ``KMeans`` (the centroids of well-separated blobs from
``sklearn.datasets.make_blobs``), scikit-learn's bundled digits and the built-in shift table
(``demur.serve.offline.evaluation.shifted_inputs``) for the centroid summary against raw rows;
the split-conformal bound (Vovk et al. 2005) for the false-alarm rate.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.cluster import KMeans
from sklearn.datasets import load_digits, make_blobs

from demur.serve.core.support import MIN_CLUSTER_ROWS, _from_record, kmeans_centroids, support_record
from demur.serve.offline.evaluation import auroc, shifted_inputs


def test_kmeans_finds_the_blobs_sklearn_finds() -> None:
    z, _ = make_blobs(n_samples=600, centers=6, n_features=5, cluster_std=0.4, random_state=0)
    ours = kmeans_centroids(z, 6, seed=0)
    ref = KMeans(n_clusters=6, n_init=10, random_state=0).fit(z).cluster_centers_
    assert ours.shape == (6, 5)
    gap = np.sqrt(((ours[:, None, :] - ref[None]) ** 2).sum(-1)).min(axis=1)
    assert gap.max() < 0.05          # each of ours sits on one of sklearn's centres


def test_every_centroid_averages_enough_rows_and_is_no_row() -> None:
    z = np.random.default_rng(0).normal(size=(203, 8))
    c = kmeans_centroids(z, 256, seed=1)
    assert 1 <= len(c) <= 203 // MIN_CLUSTER_ROWS
    labels = np.argmin(((z[:, None, :] - c[None]) ** 2).sum(-1), axis=1)
    assert np.bincount(labels, minlength=len(c)).min() >= 1
    assert np.sqrt(((c[:, None, :] - z[None]) ** 2).sum(-1)).min() > 1e-3


@pytest.fixture(scope="module")
def digits_split():
    from demur.export.exporter import input_spec

    x = load_digits().data.astype(np.float64)
    idx = np.random.default_rng(0).permutation(len(x))
    train, held, test = x[idx[:1000]], x[idx[1000:1400]], x[idx[1400:]]
    return train, held, test, input_spec(train, shape=[1, 8, 8]).spec


def test_centroids_keep_the_shift_table_auroc(digits_split) -> None:
    """Centroids against raw rows on every built-in shift: at least 0.95 of the rows' AUROC (issue 23)."""
    train, held, test, spec = digits_split
    checks = {s: _from_record(support_record(train, held, spec, summary=s), spec) for s in ("rows", "centroids")}
    assert checks["centroids"].record["stored"]["kind"] == "centroids" and checks["centroids"].neighbours == 1
    assert len(checks["centroids"].sample) < len(checks["rows"].sample) / 5
    shifts = shifted_inputs(test, low=np.array(spec["low"]), high=np.array(spec["high"]),
                            center=np.array(spec["center"]), image_shape=(1, 8, 8), seed=0)

    def score(check, x):
        s = check.scores(x)
        return np.where(np.isfinite(s), s, 1e9)

    for name, xs in shifts.items():
        rows = auroc(score(checks["rows"], xs), score(checks["rows"], test))
        cents = auroc(score(checks["centroids"], xs), score(checks["centroids"], test))
        assert cents >= 0.95 * rows, (name, rows, cents)
    # split-conformal: flagged share of fresh in-distribution rows near alpha (1%); 397 rows, so a
    # generous binomial margin (common practice: about 3 standard errors)
    flagged = float(np.mean(checks["centroids"].check(test).outside))
    assert flagged <= 0.01 + 3 * np.sqrt(0.01 * 0.99 / len(test)) + 0.01


def test_export_states_what_it_stores(tmp_path, digits_split) -> None:
    from tests.export._own_models import residual_sequential

    from demur.export import export_model, input_spec

    train, held, _, _ = digits_split
    spec = input_spec(train)
    wheres = {}
    for choice in ("rows", "centroids", "none"):
        b = export_model(residual_sequential(), tmp_path / choice, inputs=spec, draws=4, reference=held[:100],
                         seed=0, support=choice)
        statement = b.manifest.raw["extensions"]["training_data"]
        wheres[choice] = {item["where"]: item["what"] for item in statement}
        assert "inputs.center, inputs.scale, inputs.low, inputs.high" in wheres[choice]
        assert ("support" in b.manifest.raw) == (choice != "none")
    assert "give back the raw training rows" in wheres["rows"]["support.sample"]
    assert "centroids" in wheres["centroids"]["support.sample"]
    assert wheres["none"]["support"].startswith("none")
    with pytest.raises(Exception, match="support must be one of"):
        export_model(residual_sequential(), tmp_path / "bad", inputs=spec, reference=held[:10], support="hashes")
