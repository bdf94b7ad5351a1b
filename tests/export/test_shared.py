"""Shared computation (export/shared.py): the draw-free part runs once, draws fan out where they enter.

Reference for every value: ``demur.export.draws.reference_draws``, the torch module run once per
draw on the B cases with that draw's plain weights and masks (it shares nothing), fed the same
noise; tolerance 1e-4 relative to max(|torch|, 1), the exporter's parity tolerance. What is
shared is checked by behaviour: how many rows the backbone's first layer sees, and how many
times a module runs per forward (torch forward hooks).
"""

from __future__ import annotations

import numpy as np
import onnxruntime as ort
import pytest
import torch
from sklearn.datasets import load_digits

from demur.export import export_model, input_spec
from demur.export.draws import DrawNetwork, draw_noise, reference_draws
from demur.export.shared import SharedComputationNotice

from tests.export._own_models import (
    Untraceable,
    backbone_dropout,
    backbone_head,
    depot_conv_net,
    shared_backbone_ensemble,
)

TOL = 1e-4
SHAPE = (1, 8, 8)


@pytest.fixture(scope="module")
def digits() -> tuple[np.ndarray, object]:
    x = load_digits().data.astype(np.float64)
    return x, input_spec(x[:600], shape=list(SHAPE))


def _rows_seen(net: DrawNetwork, module: torch.nn.Module, x: torch.Tensor) -> list[int]:
    seen: list[int] = []
    hook = module.register_forward_pre_hook(lambda _m, args: seen.append(int(args[0].shape[0])))
    try:
        with torch.no_grad():
            net(x, *(torch.from_numpy(v) for v in draw_noise(net.noise, np.random.default_rng(0)).values()))
    finally:
        hook.remove()
    return seen


def _torch_matches_reference(net: DrawNetwork, x: torch.Tensor) -> None:
    noise = draw_noise(net.noise, np.random.default_rng(4))
    with torch.no_grad():
        got = net(x, *(torch.from_numpy(noise[n.name]) for n in net.noise))
    want = reference_draws(net, x, noise)
    assert got.shape == want.shape
    assert float(((got - want).abs() / want.abs().clamp_min(1.0)).max()) <= TOL


CASES = [
    ("backbone + gaussian head", lambda: backbone_head("gaussian"), ("stacked", "sampler", "flip", "means")),
    ("backbone + radial head", lambda: backbone_head("radial"), ("stacked", "sampler", "flip")),
    ("backbone + dropout head", backbone_dropout, ("stacked", "sampler")),
    # skip draw-free (the block's input), branch variational (its convolution)
    ("residual block, variational branch", depot_conv_net, ("stacked", "sampler", "flip")),
]


@pytest.mark.parametrize("name, make, kinds", CASES, ids=[c[0] for c in CASES])
def test_shared_forward_matches_the_per_draw_reference(name, make, kinds) -> None:
    x = torch.randn(5, *SHAPE, generator=torch.Generator().manual_seed(0))
    for kind in kinds:
        net = DrawNetwork(make(), kind, 8, seed=2, input_shape=SHAPE)
        assert not net.fell_back and net.computation.startswith(("shared", "one pass")), net.computation
        _torch_matches_reference(net, x)


def test_backbone_runs_on_the_cases_not_on_the_draws() -> None:
    """The backbone's first layer sees B rows (not S * B); the head's variational layer S * B."""
    x = torch.zeros(3, *SHAPE)
    for kind in ("stacked", "sampler", "flip"):
        net = DrawNetwork(backbone_head(), kind, 16, seed=0, input_shape=SHAPE)
        member = net.members[0]
        assert _rows_seen(net, member[0].stem[0], x) == [3]
        # where the first draw enters: the B rows (a gaussian dense layer: local reparameterisation in
        # every kind, export/local.py)
        assert _rows_seen(net, member[1], x) == [3]
        assert _rows_seen(net, member[3], x) == [3 * 16]
        assert "draws enter at 1" in net.computation
    per_draw = DrawNetwork(backbone_head(), "stacked", 16, seed=0, input_shape=SHAPE, shared=False)
    assert _rows_seen(per_draw, per_draw.members[0][0].stem[0], x) == [3 * 16]  # today's path, for contrast


@pytest.mark.parametrize("kind", ["stacked", "flip"])
def test_residual_skip_is_repeated_not_recomputed(kind: str) -> None:
    """DepotConvNet: stem and pool run once on B rows; the block's variational conv carries the draws
    and its draw-free skip is repeated at the addition. Flip builds the call's 8 weight sets where
    draws enter (export/flip.py), so its conv too sees the 2 rows, not 16."""
    net = DrawNetwork(depot_conv_net(), kind, 8, seed=0, input_shape=SHAPE)
    x = torch.zeros(2, *SHAPE)
    assert _rows_seen(net, net.members[0].stem, x) == [2]
    assert _rows_seen(net, net.members[0].pool, x) == [2]             # the skip's value, computed once
    assert _rows_seen(net, net.members[0].block.conv, x) == [2]       # draws enter: 8 sets in one conv
    assert _rows_seen(net, net.members[0].block.bn, x) == [16]
    assert "draws enter at block.conv" in net.computation


@pytest.mark.parametrize("variational", [False, True], ids=["plain-heads", "variational-heads"])
def test_ensemble_sharing_a_frozen_backbone_runs_it_once(variational: bool) -> None:
    members = shared_backbone_ensemble(3, variational=variational)
    net = DrawNetwork(members, "stacked", 6, seed=1, input_shape=SHAPE)
    assert net.members[0][0] is net.members[1][0] is net.members[2][0]   # still one module after the copy
    x = torch.randn(4, *SHAPE, generator=torch.Generator().manual_seed(1))
    assert _rows_seen(net, net.members[0][0].stem[0], x) == [4]            # once for the three members
    _torch_matches_reference(net, x)
    means = DrawNetwork(members, "means", 6, seed=1, input_shape=SHAPE)
    _torch_matches_reference(means, x)


@pytest.mark.parametrize("what", ["head-flip", "dropout-sampler", "ensemble"])
def test_exported_shared_graphs_match_torch_in_onnxruntime(digits, tmp_path, what) -> None:
    """Through export_model (its parity check on reference rows), then again here for B = 1 and 7
    (the batch axis stays free), against the per-draw reference."""
    x, spec = digits
    model = {"head-flip": backbone_head, "dropout-sampler": backbone_dropout,
             "ensemble": lambda: shared_backbone_ensemble(3, variational=True)}[what]()
    kind = {"head-flip": "flip", "dropout-sampler": "sampler", "ensemble": "stacked"}[what]
    bundle = export_model(model, tmp_path / what, inputs=spec, kind=kind, draws=6, reference=x[600:700], seed=3)
    entry = bundle.manifest.raw["graphs"][kind]
    assert entry["computation"].startswith("shared")
    for B in (1, 7):
        x_std = spec.standardise(x[700:700 + B]).astype(np.float32)
        net = DrawNetwork(model, kind, 6, seed=3, input_shape=SHAPE)
        noise = draw_noise(net.noise, np.random.default_rng(B))
        sess = ort.InferenceSession(str(bundle.graph_path(kind)), providers=["CPUExecutionProvider"])
        got = sess.run(["draws"], {"x": x_std, **noise})[0]
        want = reference_draws(net, torch.from_numpy(x_std), noise).numpy()
        assert got.shape == want.shape == (net.S, B, 10)
        assert float((np.abs(got - want) / np.maximum(np.abs(want), 1.0)).max()) <= TOL


def test_untraceable_forward_exports_the_old_way_and_says_so(digits, tmp_path) -> None:
    x, spec = digits
    net = DrawNetwork(Untraceable(), "stacked", 4, seed=0, input_shape=SHAPE)
    assert net.fell_back and "torch.fx cannot trace the forward of Untraceable" in net.computation
    with pytest.warns(SharedComputationNotice, match="runs the whole network once per draw"):
        bundle = export_model(Untraceable(), tmp_path / "b", inputs=spec, draws=4, reference=x[600:650], seed=0)
    entry = bundle.manifest.raw["graphs"]["stacked"]
    assert entry["computation"].startswith("per draw") and "TraceError" in entry["computation"]
    _torch_matches_reference(net, torch.randn(3, *SHAPE))


class _SizeFromTheCases(torch.nn.Module):
    """Reads B from the draw-free input and reshapes the draw-carrying output with it: the shared
    forward runs in torch, but the ONNX tracer cannot follow it (a new user's idiom, found in trial)."""

    def __init__(self) -> None:
        super().__init__()
        from demur.export.layers import VariationalLinear

        torch.manual_seed(0)
        self.var = VariationalLinear(4, 3, posterior="gaussian", init_sigma=0.1)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        B = x.shape[0]
        return self.var(x.reshape(-1, 4)).reshape(B, 2, 3).sum(1)


def test_a_shared_forward_the_onnx_tracer_refuses_exports_per_draw_and_says_so(tmp_path) -> None:
    x = np.random.default_rng(0).normal(size=(60, 8))
    with pytest.warns(SharedComputationNotice, match="did not export to ONNX"):
        bundle = export_model(_SizeFromTheCases().eval(), tmp_path / "b", inputs=input_spec(x[:50]),
                              labels=["a", "b", "c"], kind="sampler", draws=8, reference=x[50:], seed=0)
    assert bundle.manifest.raw["graphs"]["sampler"]["computation"].startswith("per draw")
