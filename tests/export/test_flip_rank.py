"""The flip graph with a full-rank base (export/flip.py, ``FULL_RANK``): Flipout's own base (Wen et
al., ICLR 2018, eq. 4 with an iid Gaussian perturbation per call).

References: ``scipy.stats.kstest`` against ``scipy.stats.norm(mu, sigma)`` for one weight's law
over calls (each draw's weight is exactly N(mu, sigma^2)); the per-draw torch reference
(``reference_draws``) for the ONNX graph, within 1e-4.
"""

from __future__ import annotations

import numpy as np
import onnxruntime as ort
import torch
from scipy import stats

from demur.export.draws import DrawNetwork, draw_noise, reference_draws
from demur.export.flip import FULL_RANK, FlipDraws
from demur.export.graphs import export_graph

from tests.export._own_models import backbone_head, depot_conv_net


def test_full_rank_weights_follow_the_gaussian_posterior() -> None:
    model = depot_conv_net("gaussian")
    net = DrawNetwork(model, "flip", 4, seed=0, input_shape=(1, 8, 8), flip_rank=FULL_RANK)
    mode = net.layers[0]._draw_mode
    assert isinstance(mode, FlipDraws) and {n.law for n in net.noise} == {"signs", "normals"}
    rng = np.random.default_rng(0)
    values = []
    for _ in range(2000):
        net.feed.values = {k: torch.from_numpy(v) for k, v in draw_noise(net.noise, rng).items()}
        w, _ = mode.weights(net.layers[0])
        values.append(float(w[1, 2, 3, 1, 1]))
    layer = model.block.conv
    with torch.no_grad():
        mu, sigma = float(layer.weight_mu[2, 3, 1, 1]), float(layer.weight_sigma[2, 3, 1, 1])
    assert stats.kstest(values, stats.norm(mu, sigma).cdf).pvalue > 1e-3


def test_full_rank_graph_matches_torch(tmp_path) -> None:
    for posterior in ("gaussian", "radial"):
        net = DrawNetwork(backbone_head(posterior), "flip", 6, seed=0, input_shape=(1, 8, 8), flip_rank=FULL_RANK)
        path = tmp_path / f"{posterior}.onnx"
        export_graph(net, path, name="flip")
        x = np.random.default_rng(1).normal(size=(3, 1, 8, 8)).astype(np.float32)
        noise = draw_noise(net.noise, np.random.default_rng(2))
        got = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"]).run(["draws"], {"x": x, **noise})[0]
        want = reference_draws(net, torch.from_numpy(x), noise).numpy()
        assert float((np.abs(got - want) / np.maximum(np.abs(want), 1.0)).max()) <= 1e-4
