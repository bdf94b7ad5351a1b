"""A large input served as ``demur export`` writes it by default, through HTTP.

A new user's trial found the default export of a 3x224x224 model unusable: every pixel of 2,000
training rows in the manifest's support sample (about 1.9 GB), ~70 ms of support check and 150,528
drift counters and Prometheus series per case. Here a conv net on 3x32x32 inputs (3,072 features,
past serve/core/projection.py's PROJECT_ABOVE) is exported with ``demur.export.export_model`` and
its default reference, then served: the support check measures on the projection, clean images
are accepted as before, far-off ones (inverted, 1 - x; uniform noise, both within the pixel
range) abstain with the support reason, and ``/metrics`` carries at most 256 drift series.

Data: scikit-learn's bundled digits (sklearn.datasets.load_digits), each pixel blown up to 4x4 and
copied to three channels, scaled to [0, 1]. References: the support check's own held-out rate
(split-conformal, serve/core/support.py) for the clean cases; Prometheus' instrumentation
practice against high-cardinality labels (prometheus.io/docs/practices/naming) for the series cap.
"""

from __future__ import annotations

import io
from typing import Any

import numpy as np
import pytest
import torch
from prometheus_client.parser import text_string_to_metric_families
from sklearn.datasets import load_digits
from torch import nn

from demur.export import export_model, input_spec
from demur.export.layers import VariationalConv2d, VariationalLinear
from demur.serve.core.drift import DRIFT_MAX_FEATURES
from demur.serve.core.npy_body import NPY_MEDIA_TYPE
from demur.serve.core.projection import PROJECT_ABOVE

DIGITS = load_digits()
IMAGES = (np.kron(DIGITS.data.reshape(-1, 8, 8), np.ones((4, 4)))[:, None].repeat(3, axis=1) / 16.0)


class _SmallColourNet(nn.Module):
    """3x32x32 -> 10: a plain conv stem, one variational conv, pooling, a variational head."""

    def __init__(self) -> None:
        super().__init__()
        self.stem = nn.Sequential(nn.Conv2d(3, 4, 3, stride=2, padding=1), nn.ReLU())
        self.vconv = VariationalConv2d(4, 4, 3, padding=1, posterior="radial", init_sigma=0.05)
        self.pool = nn.AvgPool2d(4)
        self.head = VariationalLinear(4 * 4 * 4, 10, posterior="radial", init_sigma=0.05)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = self.pool(torch.relu(self.vconv(self.stem(x))))
        return self.head(h.flatten(1))


@pytest.fixture(scope="module")
def bundle(tmp_path_factory: pytest.TempPathFactory) -> Any:
    torch.manual_seed(0)
    x = IMAGES[:1200].reshape(1200, -1)
    spec = input_spec(x, names=[f"c{c}r{r}k{k}" for c in range(3) for r in range(32) for k in range(32)],
                      shape=[3, 32, 32])
    return export_model(_SmallColourNet().eval(), tmp_path_factory.mktemp("large") / "bundle", inputs=spec,
                        labels=[str(d) for d in range(10)], kind="stacked", draws=8, reference=x,
                        name="colour-digits", seed=0)


def _post_npy(client: Any, x: np.ndarray) -> Any:
    buf = io.BytesIO()
    np.save(buf, x.astype(np.float32))
    return client.post("/v1/predict", data=buf.getvalue(), content_type=NPY_MEDIA_TYPE)


def test_the_default_export_of_a_large_input_serves_with_its_checks(bundle: Any, make_app: Any) -> None:
    assert bundle.manifest.inputs.size == 3072 > PROJECT_ABOVE
    manifest_bytes = (bundle.path / "manifest.json").stat().st_size
    assert manifest_bytes < 8_000_000          # the unprojected sample alone would be ~24 MB of base64
    client = make_app(bundle, threshold=10.0).test_client()   # no score abstains: only the support check
    model = client.get("/v1/model").get_json()
    assert model["support"]["checked"] and model["support"]["projection"]["dims"] == 512

    clean = IMAGES[1200:1400]
    r = _post_npy(client, clean)
    assert r.status_code == 200
    flagged = [x for x in r.get_json()["results"] if x["decision"] == "abstain"]
    assert len(flagged) <= 0.05 * len(clean)   # the check is set for 1% on held-out cases

    noise = np.random.default_rng(0).uniform(0.0, 1.0, size=(50, 3, 32, 32))
    for far in (1.0 - IMAGES[1400:1450], noise):
        results = _post_npy(client, far).get_json()["results"]
        assert all(x["decision"] == "abstain" and "outside_training_data" in x["reason"] for x in results)

    text = client.get("/metrics").get_data(as_text=True)
    series = [s for f in text_string_to_metric_families(text) if f.name == "demur_drift_feature_psi"
              for s in f.samples]
    assert 0 < len(series) <= DRIFT_MAX_FEATURES
