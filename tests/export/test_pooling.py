"""Adaptive pooling after the draws enter (export/pooling.py).

Found by a new-user trial: a conv net with ``nn.AdaptiveAvgPool2d(4)`` after a
``VariationalConv2d`` was refused by every graph kind ("ONNX export of operator
adaptive_avg_pool2d, input size not accessible"): torch's TorchScript exporter loses the spatial
size through the Reshape that carries the draws in the batch.

Reference for every value: torch's own ``nn.AdaptiveAvgPool2d`` / ``nn.AdaptiveMaxPool2d``
(ATen's adaptive pooling), on the user's unchanged module; the exported graph is run in
onnxruntime. Tolerance 1e-4 relative to max(|torch|, 1), the exporter's parity tolerance.
"""

from __future__ import annotations

import numpy as np
import onnxruntime as ort
import pytest
import torch
import torch.nn.functional as F
from sklearn.datasets import load_digits
from torch import nn

from demur.export import export_model, input_spec
from demur.export.layers import VariationalConv2d, VariationalLinear
from demur.export.pooling import FixedWindowPool, adaptive_windows, fixed_window_pools

TOL = 1e-4


@pytest.mark.parametrize("size, out", [((8, 8), 4), ((8, 8), 3), ((7, 9), (2, 4)), ((6, 5), (None, 2)),
                                       ((5, 5), 1), ((4, 4), 4), ((3, 7), (5, 3))])
@pytest.mark.parametrize("mode", ["avg", "max"])
def test_fixed_windows_equal_torchs_adaptive_pooling(size, out, mode) -> None:
    x = torch.randn(3, 2, *size, generator=torch.Generator().manual_seed(0))
    want = (nn.AdaptiveAvgPool2d(out) if mode == "avg" else nn.AdaptiveMaxPool2d(out))(x)
    got = FixedWindowPool(out, mode)(x)
    assert got.shape == want.shape
    torch.testing.assert_close(got, want, rtol=1e-6, atol=1e-6)


def test_windows_follow_torchs_start_and_end_index() -> None:
    """ATen: start = floor(i * n / m), end = ceil((i + 1) * n / m); 10 pooled to 4 -> [0,3) [2,5) [5,8) [7,10)."""
    assert adaptive_windows(10, 4) == [(0, 3), (2, 5), (5, 8), (7, 10)]
    assert adaptive_windows(8, 4) == [(0, 2), (2, 4), (4, 6), (6, 8)]


class _PoolAfterDraws(nn.Module):
    """Deterministic stem, a variational convolution, adaptive pools after it, a variational head."""

    def __init__(self) -> None:
        super().__init__()
        self.stem = nn.Sequential(nn.Conv2d(1, 4, 3, padding=1), nn.ReLU())
        self.vconv = VariationalConv2d(4, 4, 3, padding=1, posterior="gaussian", init_spread=0.05)
        self.avg = nn.AdaptiveAvgPool2d(3)            # 8 -> 3: not a divisor
        self.max = nn.AdaptiveMaxPool2d((2, None))
        self.head = VariationalLinear(4 * 9 + 4 * 2 * 8, 10, posterior="gaussian", init_spread=0.05)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = F.relu(self.vconv(self.stem(x)))
        return self.head(torch.cat([self.avg(h).flatten(1), self.max(h).flatten(1)], dim=1))


def _means(model: nn.Module, x: torch.Tensor) -> torch.Tensor:
    """The user's module at the posterior means (torch's own pooling)."""
    h = F.relu(model.vconv.forward_mean(model.stem(x)))
    return model.head.forward_mean(torch.cat([model.avg(h).flatten(1), model.max(h).flatten(1)], dim=1))


@pytest.mark.parametrize("kind", ["stacked", "sampler", "flip"])
def test_adaptive_pools_after_a_variational_conv_export_and_match_torch(kind: str, tmp_path) -> None:
    torch.manual_seed(0)
    x = load_digits().data.astype(np.float64)
    spec = input_spec(x[:400], shape=[1, 8, 8])
    model = _PoolAfterDraws().eval()
    bundle = export_model(model, tmp_path / "b", inputs=spec, kind=kind, draws=8, reference=x[400:460], seed=1)
    assert bundle.manifest.raw["graphs"][kind]["computation"].startswith("shared"), bundle.manifest.raw["graphs"]
    assert isinstance(model.avg, nn.AdaptiveAvgPool2d) and isinstance(model.max, nn.AdaptiveMaxPool2d)  # untouched
    xs = spec.standardise(x[460:480])
    got = ort.InferenceSession(str(tmp_path / "b" / "means.onnx")).run(["draws"], {"x": xs})[0][0]
    with torch.no_grad():
        want = _means(model, torch.from_numpy(xs)).numpy()
    assert np.max(np.abs(got - want) / np.maximum(np.abs(want), 1.0)) <= TOL


def test_fixed_window_pools_replaces_every_adaptive_pool_once() -> None:
    shared = nn.AdaptiveAvgPool2d(2)
    m = nn.Sequential(shared, nn.Sequential(shared, nn.AdaptiveMaxPool2d(2, return_indices=True)), nn.ReLU())
    assert fixed_window_pools(m) == 1  # the shared pool is one module; max with indices is kept
    assert isinstance(m[0], FixedWindowPool) and m[1][0] is m[0]
    assert isinstance(m[1][1], nn.AdaptiveMaxPool2d)
