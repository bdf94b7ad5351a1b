"""Write the demo's sample request bodies (deterministic; the JSON files are committed).

The scenario: handwritten postcode digits at a parcel-sorting depot, scikit-learn's
bundled 8x8 digits (``load_digits``, values 0..16), rows taken from the fixed test
split of ``demur.export.datasets.load_dataset("digits")`` (seed 0), which no model trains on.

Which rows, chosen without any model (nearest class centroid of the train split):

- ``clear.json``      the test digit farthest inside its own class (largest gap between
                      its nearest and second-nearest centroid), sent as an 8x8 grid;
- ``ambiguous.json``  the test digit with the smallest such gap (it sits between two
                      classes), sent as a flat list of 64 numbers;
- ``corrupted.json``  the clear digit with a smudge (a 3x3 block of full ink) and
                      Gaussian noise (sd 5, seed 0), clipped to 0..16;
- ``batch.json``      the first 16 test digits with parcel case ids;
- ``named.json``      one digit as an object keyed by feature name (px_r0c0 .. px_r7c7).

Usage::

    python sample_requests/make_samples.py            # rewrites the JSON files beside this script
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from demur.export.datasets import load_dataset  # noqa: E402  (torch-free)


def _ints(row: np.ndarray) -> list[float | int]:
    return [int(v) if float(v).is_integer() else round(float(v), 1) for v in row]


def build() -> dict[str, dict[str, object]]:
    data = load_dataset("digits", seed=0)
    x_train, y_train = data.split("train")
    x_test, y_test = data.split("test")
    centroids = np.stack([x_train[y_train == k].mean(axis=0) for k in range(10)])
    dist = np.linalg.norm(x_test[:, None, :] - centroids[None], axis=2)  # [N, 10]
    near = np.sort(dist, axis=1)
    gap = near[:, 1] - near[:, 0]
    own = np.argmin(dist, axis=1) == y_test
    clear = int(np.flatnonzero(own)[np.argmax(gap[own])])
    ambiguous = int(np.argmin(gap))

    rng = np.random.default_rng(0)
    smudged = x_test[clear].reshape(8, 8).copy()
    smudged[2:5, 3:6] = 16.0
    corrupted = np.clip(smudged.ravel() + rng.normal(0.0, 5.0, size=64), 0.0, 16.0)

    names = list(data.feature_names)
    return {
        "clear.json": {"cases": [np.asarray(_ints(x_test[clear])).reshape(8, 8).tolist()],
                       "case_ids": [f"clear-test{clear}-digit{y_test[clear]}"]},
        "ambiguous.json": {"cases": [_ints(x_test[ambiguous])],
                           "case_ids": [f"ambiguous-test{ambiguous}-digit{y_test[ambiguous]}"]},
        "corrupted.json": {"cases": [_ints(corrupted)],
                           "case_ids": [f"corrupted-test{clear}-digit{y_test[clear]}"]},
        "batch.json": {"cases": [_ints(r) for r in x_test[:16]],
                       "case_ids": [f"parcel-{i:04d}-digit{y_test[i]}" for i in range(16)]},
        "named.json": {"cases": [dict(zip(names, _ints(x_test[1])))],
                       "case_ids": [f"named-test1-digit{y_test[1]}"]},
    }


def main() -> int:
    for name, body in build().items():
        text = json.dumps(body, separators=(",", ":")) + "\n"
        (HERE / name).write_text(text, encoding="utf-8")
        print(f"wrote {HERE / name}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
