"""Regression end to end as a new user does it, from the command line, with a model of their own.

Data: scikit-learn's bundled load_diabetes (442 patients, 10 features, disease progression after
one year, mean about 152, sd about 77), split by a seeded permutation into train / cal / test CSVs.
The model: tests/export/_own_models.py's ``diabetes_regressor``, trained here on the standardised
target (Gaussian NLL + KL), exported with ``demur export --factory ... --task regression``.

Checked: export refuses a regression model without ``--target-stats`` (the target's scale would
otherwise be guessed as 0 and 1, serving every mean in standardised units); with ``--target-stats
data`` the manifest records the training target's mean and sd (numpy, ddof 0) and the served
means are on the target's scale (MAE well under the target's sd); calibrate then gives coverage
near its level on the independent test file; evaluate writes the regression tables.
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import pytest

from demur.serve.cli import main
from demur.serve.core.bundle import load_bundle

TARGET = "progression"


def _write(path: Path, names: list[str], x: np.ndarray, y: np.ndarray) -> Path:
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow([*names, TARGET])
        w.writerows([[*map(repr, row), repr(t)] for row, t in zip(x.tolist(), y.tolist())])
    return path


@pytest.fixture(scope="module")
def diabetes_files(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """train/cal/test CSVs and the trained weights of a user's own regression network."""
    import torch
    from sklearn.datasets import load_diabetes

    from demur.export import input_spec
    from demur.export.layers import total_kl
    from tests.export._own_models import diabetes_regressor

    data = load_diabetes()
    x, y = data.data * 100.0, data.target  # features in readable units (x100), as a survey file holds them
    names = [str(n) for n in data.feature_names]
    perm = np.random.default_rng(0).permutation(len(y))
    parts = {"train": perm[:300], "cal": perm[300:371], "test": perm[371:]}
    root = tmp_path_factory.mktemp("diabetes-own")
    files = {k: _write(root / f"{k}.csv", names, x[i], y[i]) for k, i in parts.items()}
    tr = parts["train"]
    xs = torch.from_numpy(input_spec(x[tr], names).standardise(x[tr]))
    ys = torch.from_numpy(((y[tr] - y[tr].mean()) / y[tr].std()).astype(np.float32))
    model = diabetes_regressor()
    opt = torch.optim.Adam(model.parameters(), lr=1e-2)
    for _ in range(400):
        out = model(xs)
        nll = 0.5 * (out[:, 1] + (ys - out[:, 0]) ** 2 / out[:, 1].exp()).mean()
        loss = nll + total_kl(model) / len(ys)
        opt.zero_grad()
        loss.backward()
        opt.step()
    torch.save(model.state_dict(), root / "weights.pt")
    files["weights"] = root / "weights.pt"
    files["root"] = root
    return files


def test_regression_from_the_command_line_is_served_on_the_targets_scale(diabetes_files, capsys):
    f = diabetes_files
    out = f["root"] / "bundle"
    argv = ["export", "--factory", "tests.export._own_models:diabetes_regressor", "--weights", str(f["weights"]),
            "--data", str(f["train"]), "--target", TARGET, "--task", "regression", "--out", str(out)]
    assert main(argv) != 0
    assert "--target-stats" in capsys.readouterr().err and not out.exists()
    assert main([*argv, "--target-stats", "data"]) == 0
    m = load_bundle(out).manifest
    y_train = np.loadtxt(f["train"], delimiter=",", skiprows=1)[:, -1]
    assert m.target["center"] == pytest.approx(float(np.mean(y_train)))
    assert m.target["scale"] == pytest.approx(float(np.std(y_train)))
    assert main(["calibrate", str(out), "--data", str(f["cal"]), "--target", TARGET, "--test", str(f["test"]),
                 "--coverage", "0.9"]) == 0
    printed = capsys.readouterr().out
    rec = load_bundle(out).manifest.decision.calibration
    assert rec["conformal"]["score"] in ("normalised", "absolute") and "residuals" in printed
    # q is a multiple of the predictive sd (normalised) or target units (absolute): either way the
    # served interval covers the independent test file near its level (71 cases: binomial sd 0.036)
    assert rec["test"]["coverage"] >= 0.8, rec["test"]
    assert main(["evaluate", str(out), "--data", str(f["test"]), "--target", TARGET,
                 "--out", str(f["root"] / "eval")]) == 0
    printed = capsys.readouterr().out
    print(f"\n[diabetes, own model, CLI]\n{printed}")
    import json

    body = json.loads((f["root"] / "eval" / "evaluation.json").read_text())["models"]["bundle"]
    sc = body["scores"]
    assert sc["mae"] < 0.8 * 77 and sc["rmse"] < 77  # on the target's scale (sd about 77), not 0-centred
    assert (f["root"] / "eval" / "index.html").is_file() and sum(sc["pit"]["counts"]) == 71
    assert {"every_feature_x10", "first_feature_far", "clean"} <= set(body["shift"])
    # what stands in the way of far inputs: the support check puts them outside the training data
    assert body["shift"]["every_feature_x10"]["outside_training_data"] == 1.0
    assert body["shift"]["first_feature_far"]["accepted"] == 0.0


def test_a_model_on_the_wrong_scale_is_called_out_by_calibrate(diabetes_bundle, copy_bundle):
    """A regression bundle whose recorded target standardisation is wrong (centre 0, scale 1 for a
    model trained on the standardised diabetes target, scikit-learn's load_diabetes) serves means
    near 0 for targets of 25-346: its own 90% interval covers almost nothing. calibrate still
    widens the interval until coverage holds (split conformal guarantees that much), so it must
    say plainly that the model looks wrong."""
    import json

    from demur.export.calibration import calibrate_file
    from demur.serve.core.bundle import write_manifest

    path = copy_bundle(diabetes_bundle)
    raw = json.loads((path / "manifest.json").read_text())
    raw["target"] = {**raw["target"], "center": 0.0, "scale": 1.0}
    write_manifest(path, raw)
    out = calibrate_file(path, "diabetes", coverage=0.9)
    assert any("covered only" in n and "--target-stats" in n for n in out.notes)
    assert out.record["conformal"]["model_coverage_before"] < 0.45


def test_the_coverage_warning_tells_a_scale_mistake_from_overconfidence() -> None:
    """Targets: scikit-learn's bundled diabetes progression (load_diabetes). Means on the target's
    scale with intervals too narrow are overconfidence (the conformal interval is the fix); the same
    means standardised, as when a target's standardisation is left out of the export, are a scale
    mistake. Above half the level there is no warning."""
    from sklearn.datasets import load_diabetes

    from demur.export.calibration import _coverage_warning

    y = load_diabetes().target.astype(float)
    near = y + np.random.default_rng(0).normal(0.0, 0.3 * y.std(), size=y.shape)
    over = _coverage_warning(0.2, 0.9, 1.7, near, y)
    assert over is not None and "overconfident" in over and "--target-stats" not in over
    scaled = _coverage_warning(0.2, 0.9, 1.7, (near - y.mean()) / y.std(), y)
    assert scaled is not None and "--target-stats" in scaled and "off the target's scale" in scaled
    assert _coverage_warning(0.46, 0.9, 1.7, near, y) is None
