"""Local reparameterisation (export/local.py): a dense layer's draws made in its outputs.

References:
- the law of one case's output under a mean-field gaussian weight draw: a sum of independent
  normals, N(x . mu_j + mu_b, sum_i x_i^2 sigma_ji^2 + sigma_b^2) per output j (Kingma, Salimans &
  Welling, NeurIPS 2015, section 2.3), checked with ``scipy.stats.kstest`` against ``scipy.stats.norm``;
- the radial posterior (Farquhar, Osborne & Gal, AISTATS 2020, eq. 2) sampled in weight space by
  the layer's own ``draw`` against the local draws, ``scipy.stats.ks_2samp`` on one output and on
  the length of the whole output's deviation (a check of the joint law, not only the marginals);
- the ONNX graphs against the per-draw torch reference (``reference_draws``) within 1e-4.
"""

from __future__ import annotations

import numpy as np
import onnxruntime as ort
import pytest
import torch
from scipy import stats
from torch import nn

from demur.export.draws import DrawNetwork, draw_noise, reference_draws
from demur.export.flip import FlipDraws
from demur.export.graphs import export_graph
from demur.export.layers import VariationalLinear
from demur.export.local import LocalDraws, local_noise

from tests.export._local import local_layer
from tests.export._own_models import backbone_head

SHAPE = (1, 8, 8)


def _layer(posterior: str, d_in: int = 12, out: int = 5, seed: int = 0) -> VariationalLinear:
    torch.manual_seed(seed)
    layer = VariationalLinear(d_in, out, posterior=posterior, init_spread=0.3)
    with torch.no_grad():
        layer.weight_mu.normal_(0, 0.5)
    return layer


@torch.no_grad()
def test_fresh_gaussian_outputs_follow_the_sum_of_independent_normals() -> None:
    layer = _layer("gaussian")
    x = torch.randn(1, 12, generator=torch.Generator().manual_seed(1))
    net = DrawNetwork(nn.Sequential(layer), "sampler", 500, seed=0, input_shape=(12,))
    assert isinstance(net.layers[0]._draw_mode, LocalDraws)
    noise = draw_noise(net.noise, np.random.default_rng(2))
    y = net(x, *(torch.from_numpy(noise[n.name]) for n in net.noise))[:, 0, :]      # [500, 5]
    mean = (x @ layer.weight_mu.T + layer.bias_mu)[0]
    sd = torch.sqrt(x.square() @ layer.weight_sigma.square().T + layer.bias_sigma.square())[0]
    for j in range(5):
        assert stats.kstest(y[:, j].numpy(), stats.norm(float(mean[j]), float(sd[j])).cdf).pvalue > 1e-3


@torch.no_grad()
@pytest.mark.parametrize("d_in, out", [(12, 5), (3, 2)])
def test_stored_radial_noise_has_the_weight_space_law(d_in: int, out: int) -> None:
    """n = r g / sqrt(||g||^2 + C), C ~ chi-square(out (in - 1)), against w = mu + sigma (eps/||eps||) r."""
    layer = _layer("radial", d_in, out)
    x = torch.randn(1, d_in, generator=torch.Generator().manual_seed(1))
    S = 4000
    n, b = local_noise(layer, S, torch.Generator().manual_seed(3))
    local = torch.stack([local_layer(x, layer, n[s], b[s])[0] for s in range(S)])        # [S, out]
    d = layer.draw(S, torch.Generator().manual_seed(4))
    weights = torch.einsum("bi,soi->so", x, d["weight"]) + d["bias"]                   # [S, out]
    for name, a, c in (("output 0", local[:, 0], weights[:, 0]),
                       ("deviation length", (local - layer.bias_mu - x @ layer.weight_mu.T).norm(dim=1),
                        (weights - layer.bias_mu - x @ layer.weight_mu.T).norm(dim=1))):
        assert stats.ks_2samp(a.numpy(), c.numpy()).pvalue > 1e-3, name


@torch.no_grad()
def test_fresh_radial_outputs_have_the_weight_space_law() -> None:
    """The sampler graph's radial local draws (fed g, radii and the engine's chi-square) against the
    layer's own weight-space draws, as above; the noise is filled by the serving engine's own
    generator (serve/adapters/engine.py), chi-square included."""
    from demur.serve.adapters.engine import _Noise

    layer = _layer("radial", 12, 5)
    x = torch.randn(1, 12, generator=torch.Generator().manual_seed(1))
    net = DrawNetwork(nn.Sequential(layer), "sampler", 8, seed=0, input_shape=(12,))
    assert [n.name for n in net.noise][-1] == "chisquare.L0.dof55"                   # 5 x (12 - 1)

    class _Session:  # what _Noise.of reads from an onnxruntime session
        def get_inputs(self) -> list:
            return [type("A", (), {"name": n.name, "shape": list(n.shape), "type": "tensor(float)"})
                    for n in net.noise]

    engine_noise = _Noise.of(_Session(), "sampler", 5)
    local = []
    for _ in range(500):
        feed = engine_noise.draw()
        local.append(net(x, *(torch.from_numpy(feed[n.name]) for n in net.noise))[:, 0, :])
    local = torch.cat(local)                                                            # [4000, 5]
    d = layer.draw(4000, torch.Generator().manual_seed(4))
    weights = torch.einsum("bi,soi->so", x, d["weight"]) + d["bias"]
    mean = layer.bias_mu + x @ layer.weight_mu.T
    assert stats.ks_2samp(local[:, 2].numpy(), weights[:, 2].numpy()).pvalue > 1e-3
    assert stats.ks_2samp((local - mean).norm(dim=1).numpy(), (weights - mean).norm(dim=1).numpy()).pvalue > 1e-3


def test_graphs_match_the_per_draw_reference_in_onnxruntime(tmp_path) -> None:
    for posterior in ("gaussian", "radial"):
        for kind in ("stacked", "sampler", "flip"):
            net = DrawNetwork(backbone_head(posterior), kind, 6, seed=0, input_shape=SHAPE)
            local = [isinstance(lay._draw_mode, LocalDraws) for lay in net.layers]
            # stacked: where draws enter (the first head layer); fresh kinds: every dense layer
            assert local == ([True, False] if kind == "stacked" else [True, True]), (posterior, kind)
            path = tmp_path / f"{posterior}-{kind}.onnx"
            export_graph(net, path, name=kind)
            x = np.random.default_rng(1).normal(size=(3, *SHAPE)).astype(np.float32)
            noise = draw_noise(net.noise, np.random.default_rng(2))
            sess = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
            got = sess.run(["draws"], {"x": x, **noise})[0]
            want = reference_draws(net, torch.from_numpy(x), noise).numpy()
            assert float((np.abs(got - want) / np.maximum(np.abs(want), 1.0)).max()) <= 1e-4, (posterior, kind)
            if kind == "stacked":
                assert "local reparameterisation" in net.computation


class _Sequence(nn.Module):
    """A dense variational layer on a sequence [B, T, in] (positions share one weight draw)."""

    def __init__(self) -> None:
        super().__init__()
        self.layer = VariationalLinear(4, 3, posterior="gaussian", init_sigma=0.1)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.layer(x.reshape(x.shape[0], 2, 4)).sum(dim=1)


class _Rows(nn.Module):
    """The same sequence flattened to rows [B * T, in] before the layer (the common ``reshape(-1, in)``
    idiom): still one weight draw shared by a case's positions, though the layer sees 2-d input."""

    def __init__(self) -> None:
        super().__init__()
        self.layer = VariationalLinear(4, 3, posterior="gaussian", init_sigma=0.1)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.layer(x.reshape(-1, 4)).reshape(x.shape[0], 2, 3).sum(dim=1)


class _Twice(nn.Module):
    """One dense variational layer applied twice per forward (its two calls share one weight draw)."""

    def __init__(self) -> None:
        super().__init__()
        self.layer = VariationalLinear(4, 4, posterior="gaussian", init_sigma=0.1)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.layer(torch.relu(self.layer(x)))


@pytest.mark.parametrize("make, shape", [(_Sequence, (8,)), (_Rows, (8,)), (_Twice, (4,))],
                         ids=["sequence", "sequence flattened to rows", "called twice"])
def test_layers_where_outputs_share_a_draw_keep_weight_draws(make, shape) -> None:
    """Local noise is exact only for one vector per case and one call per forward (export/local.py)."""
    for kind in ("stacked", "sampler", "flip"):
        net = DrawNetwork(make(), kind, 4, seed=0, input_shape=shape)
        assert not isinstance(net.layers[0]._draw_mode, LocalDraws), kind
        if kind == "flip":
            assert isinstance(net.layers[0]._draw_mode, FlipDraws)


@torch.no_grad()
@pytest.mark.parametrize("posterior", ["gaussian", "radial"])
@pytest.mark.parametrize("value", [0.0, 1e-20, 1e20])
def test_inputs_of_zeros_or_extreme_size_keep_finite_draws(posterior: str, value: float) -> None:
    """The scaled square root (export/local.py, ``run``): all-zero, tiny and huge (x^2 beyond float32)
    inputs give finite draws, equal to the plain per-draw formula wherever that one is finite."""
    layer = _layer(posterior)
    x = torch.full((2, 12), value)
    for kind in ("sampler", "stacked"):
        net = DrawNetwork(nn.Sequential(layer), kind, 6, seed=0, input_shape=(12,))
        noise = draw_noise(net.noise, np.random.default_rng(0))
        y = net(x, *(torch.from_numpy(noise[n.name]) for n in net.noise))
        assert torch.isfinite(y).all(), (kind, value)
        if value < 1e19:  # the reference squares x itself: comparable only where x^2 is a float32
            assert torch.allclose(y, reference_draws(net, x, noise), rtol=1e-4, atol=1e-6), (kind, value)
