"""The flip graph with a full-rank base (export/flip.py, ``FULL_RANK``): Flipout's own base (Wen et
al., ICLR 2018, eq. 4 with an iid Gaussian perturbation per call).

Reference: the per-draw torch reference (``reference_draws``) for the ONNX graph, within 1e-4 (each
weight's law over calls is checked in test_own_model.py, against scipy.stats.norm, for both bases).
"""

from __future__ import annotations

import numpy as np
import onnxruntime as ort
import torch

from demur.export.draws import DrawNetwork, draw_noise, reference_draws
from demur.export.flip import FULL_RANK
from demur.export.graphs import export_graph

from tests.export._own_models import backbone_head


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
