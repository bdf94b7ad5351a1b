"""export_model on users' own modules (README, "Your own model").

References named beside each check:
* torch's own forward of the user's module, run once per draw with that draw's plain
  weights (``forward_with``: F.linear / F.conv2d) and dropout mask
  (``demur.export.draws.reference_draws``), against onnxruntime on the exported file;
* ``torch.softmax`` averaged over the members of a deep ensemble (Lakshminarayanan et
  al., NeurIPS 2017, eq. of the mixture predictive);
* torch's own dropout in training mode (``nn.Dropout``, Gal & Ghahramani, ICML 2016:
  the MC-dropout predictive is the average over masks), many passes;
* the residual forward written out with ``F.linear`` and ``torch.tanh``;
* scipy.stats.kstest against scipy.stats.norm for Flipout conv weights (Wen et al.,
  ICLR 2018: each draw keeps the base's law; significance 0.001, common practice).
Data: scikit-learn's bundled digits (load_digits).
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import onnxruntime as ort
import pytest
import torch
import torch.nn.functional as F
from scipy import stats
from sklearn.datasets import load_digits
from torch import nn

from demur.export import export_model, input_spec
from demur.export.draws import DrawNetwork, draw_noise, reference_draws
from demur.export.errors import ExportError, GraphBuildError
from demur.export.flip import FULL_RANK, LOW_RANK, FlipDraws
from demur.export.local import local_noise, stored_generator
from demur.serve.adapters.engine import Engine
from demur.serve.cli import main
from demur.serve.core.summary import summarise

from tests.export._local import local_layer
from tests.export._own_models import depot_conv_net, dropout_mlp, plain_mlp, residual_sequential

TOL = 1e-4


@pytest.fixture(scope="module")
def digits() -> tuple[np.ndarray, np.ndarray]:
    x, y = load_digits(return_X_y=True)
    return x.astype(np.float64), y


def _graph_vs_torch(bundle, kind: str, net: DrawNetwork, x_raw: np.ndarray, seed: int) -> float:
    """Largest |onnx - torch| / max(|torch|, 1) for the bundle's ``kind`` graph, same draws."""
    spec = bundle.manifest.inputs
    x = ((x_raw - np.asarray(spec.center)) / np.asarray(spec.scale)).astype(np.float32).reshape(-1, *spec.shape)
    noise = draw_noise(net.noise, np.random.default_rng(seed))
    sess = ort.InferenceSession(str(bundle.graph_path(kind)), providers=["CPUExecutionProvider"])
    got = sess.run(["draws"], {"x": x, **noise})[0]
    want = reference_draws(net, torch.from_numpy(x), noise).numpy()
    assert got.shape == want.shape
    return float((np.abs(got - want) / np.maximum(np.abs(want), 1.0)).max())


@pytest.mark.parametrize("posterior", ["radial", "gaussian"])
@pytest.mark.parametrize("kind", ["stacked", "sampler", "flip"])
def test_conv_net_with_pool_batchnorm_residual_gelu_matches_torch(digits, tmp_path: Path, kind: str,
                                                                  posterior: str) -> None:
    """Max-pool, batch norm (eval), a residual block, GELU, layer norm, tanh, deterministic conv and
    linear layers mixed with variational ones: onnxruntime == torch per draw within 1e-4."""
    x, _ = digits
    model = depot_conv_net(posterior)
    spec = input_spec(x[:1000], shape=[1, 8, 8])
    bundle = export_model(model, tmp_path / "b", inputs=spec, kind=kind, draws=8, reference=x[1000:1100], seed=4)
    assert bundle.manifest.posterior["family"] == posterior
    for graph in (kind, "means"):
        net = DrawNetwork(model, graph, 8, seed=4, input_shape=(1, 8, 8))
        assert _graph_vs_torch(bundle, graph, net, x[1100:1164], seed=11) <= TOL
    served = Engine(bundle, graph=kind, seed=1).load().run(x[:3])
    assert served.shape == (8, 3, 10) and np.isfinite(served).all()


def test_deep_ensemble_serves_the_average_of_member_softmaxes(digits, tmp_path: Path) -> None:
    """Reference: torch.softmax of each member, averaged (Lakshminarayanan et al. 2017); 1e-5."""
    x, _ = digits
    members = [plain_mlp(seed=s) for s in range(5)]
    spec = input_spec(x[:1000])
    bundle = export_model(members, tmp_path / "b", inputs=spec, reference=x[1000:1200], seed=0)
    m = bundle.manifest
    assert m.posterior["family"] == "ensemble" and m.posterior["members"] == 5 and m.graphs["stacked"].draws == 5
    cases = x[1200:1240]
    got = summarise(m.task, Engine(bundle).load().run(cases), m.interval_level, m.target).mean_probs
    xs = torch.from_numpy(spec.standardise(cases))
    with torch.no_grad():
        want = torch.stack([torch.softmax(member(xs).double(), dim=-1) for member in members]).mean(0).numpy()
    assert np.abs(got - want).max() <= 1e-5
    means = Engine(bundle, graph="means").load().run(cases)[0]
    assert np.abs(special_softmax(means) - want).max() <= 1e-5  # the means graph: the same average


def test_ensemble_of_variational_members_serves_the_mixture_of_their_posteriors(digits, tmp_path: Path) -> None:
    """A list of radial MLPs: each member contributes S // M draws from its own posterior (a mixture
    of posteriors, Wilson & Izmailov, NeurIPS 2020). Reference: each member's draws (its own
    ``sample_network``, one seeded generator member after member) pushed through ``F.linear`` and
    ``torch.relu`` by hand, ``torch.softmax`` per draw, averaged over all draws; 1e-5."""
    from demur.export.layers import build_model, sample_network

    x, _ = digits
    members = []
    for s in range(3):
        torch.manual_seed(s)
        members.append(build_model("mlp", [64], 10, "radial", hidden=(16,), init_spread=0.05))
    spec = input_spec(x[:1000])
    bundle = export_model(members, tmp_path / "b", inputs=spec, reference=x[1000:1200], draws=7, seed=3)
    m = bundle.manifest
    assert m.posterior["family"] == "ensemble" and m.posterior["members"] == 3
    assert m.posterior["draws_per_member"] == 2 and m.posterior["member_family"] == "radial"
    assert m.graphs["stacked"].draws == 6  # 3 members x (7 // 3) draws
    cases = x[1200:1240]
    xs = torch.from_numpy(spec.standardise(cases)).float()
    gen, local = torch.Generator().manual_seed(3), stored_generator(3)
    logits = []
    for member in members:
        (l1, l2) = sample_network(member, 2, gen)
        n, b = local_noise(member[1], 2, local)  # the first layer: where draws enter, local noise (export/local.py)
        for p in range(2):
            h = torch.relu(local_layer(xs, member[1], n[p], b[p]))
            logits.append(F.linear(h, l2["weight"][p], l2["bias"][p]))
    want_draws = torch.stack(logits).double()
    served = Engine(bundle).load().run(cases)
    assert np.abs(served - want_draws.numpy()).max() <= 1e-4  # draw for draw, member-major
    got = summarise(m.task, served, m.interval_level, m.target).mean_probs
    want = torch.softmax(want_draws, dim=-1).mean(0).numpy()
    assert np.abs(got - want).max() <= 1e-5
    assert not np.allclose(served[0], served[1])  # a member's two draws differ: its posterior's spread
    with torch.no_grad():  # the means graph: the members' posterior means, softmaxes averaged
        at_means = torch.stack([torch.softmax(F.linear(torch.relu(F.linear(xs, mb[1].weight_mu, mb[1].bias_mu)),
                                                       mb[3].weight_mu, mb[3].bias_mu).double(), -1)
                                for mb in members]).mean(0).numpy()
    assert np.abs(special_softmax(Engine(bundle, graph="means").load().run(cases)[0]) - at_means).max() <= 1e-5


def test_holdout_class_of_an_ensemble_of_plain_networks_is_refused_by_name(tmp_path: Path) -> None:
    """`demur evaluate --holdout-class` retrains the model; demur trains only variational members,
    so an ensemble of the user's plain networks is refused naming the field, never retrained wrong."""
    from demur.export import evaluate
    from demur.export.datasets import load_dataset
    from demur.serve.errors import ConfigError

    ds = load_dataset("digits")
    bundle = export_model([plain_mlp(seed=s) for s in range(2)], tmp_path / "b", inputs=input_spec(ds.x_train),
                          reference=ds.x_val, seed=0)
    assert "member_family" not in bundle.manifest.posterior and bundle.manifest.posterior["draws_per_member"] == 1
    with pytest.raises(ConfigError, match="ensembles of variational members") as info:
        evaluate(bundle, ds.x_test[:40], ds.y_test[:40], holdout=("9", ds))
    assert info.value.field == "holdout_class"


def special_softmax(z: np.ndarray) -> np.ndarray:
    from scipy import special

    return special.softmax(z.astype(np.float64), axis=-1)


def test_mc_dropout_sampler_approaches_torch_mc_average_and_calls_differ(digits, tmp_path: Path) -> None:
    """Reference: torch's nn.Dropout in training mode, 6400 passes (Gal & Ghahramani 2016)."""
    x, _ = digits
    model = dropout_mlp()
    spec = input_spec(x[:1000])
    bundle = export_model(model, tmp_path / "b", inputs=spec, kind="sampler", draws=32,
                          reference=x[1000:1100], seed=0)
    m = bundle.manifest
    assert m.posterior["family"] == "mc_dropout" and m.posterior["dropout"] == [0.3, 0.3]
    cases = x[1100:1108]
    engine = Engine(bundle, seed=5).load()
    runs = [engine.run(cases) for _ in range(200)]
    assert not np.array_equal(runs[0], runs[1])
    served = np.concatenate([special_softmax(r) for r in runs])                     # [6400, B, K]
    xs = torch.from_numpy(spec.standardise(cases))
    model.train()
    with torch.no_grad():
        torch.manual_seed(0)
        ref = torch.stack([torch.softmax(model(xs).double(), -1) for _ in range(6400)]).numpy()
    model.eval()
    se = np.sqrt(served.var(0) / len(served) + ref.var(0) / len(ref))
    assert (np.abs(served.mean(0) - ref.mean(0)) <= 5 * se + 1e-4).all()


def test_mc_dropout_stacked_keeps_s_fixed_masks(digits, tmp_path: Path) -> None:
    x, _ = digits
    bundle = export_model(dropout_mlp(), tmp_path / "b", inputs=input_spec(x[:500]), draws=6,
                          reference=x[500:600], seed=2)
    engine = Engine(bundle).load()
    a, b = engine.run(x[:4]), engine.run(x[:4])
    np.testing.assert_array_equal(a, b)
    assert a.shape == (6, 4, 10) and not np.allclose(a[0], a[1])


def test_residual_sequential_subclass_exports_its_own_forward(digits, tmp_path: Path) -> None:
    """The nn.Sequential subclass whose forward adds a skip: the means graph equals the forward
    written out with F.linear and torch.tanh at the posterior means (it used to differ by 0.2)."""
    x, _ = digits
    model = residual_sequential()
    spec = input_spec(x[:500])
    bundle = export_model(model, tmp_path / "b", inputs=spec, reference=x[500:600], seed=0)
    xs = torch.from_numpy(spec.standardise(x[600:640]))
    first, last = model[0], model[2]
    with torch.no_grad():
        h = F.linear(xs, first.weight_mu, first.bias_mu)
        want = F.linear(torch.tanh(h) + h, last.weight_mu, last.bias_mu).numpy()
    got = Engine(bundle, graph="means").load().run(x[600:640])[0]
    assert np.abs(got - want).max() <= TOL


def test_label_and_output_width_mismatch_is_refused_and_leaves_nothing(digits, tmp_path: Path) -> None:
    x, _ = digits
    with pytest.raises(ExportError, match="outputs 10 logits per case but 3 labels") as info:
        export_model([plain_mlp(seed=s) for s in range(2)], tmp_path / "b", inputs=input_spec(x[:200]),
                     labels=["a", "b", "c"], reference=x[:50])
    assert info.value.field == "labels" and list(tmp_path.iterdir()) == []


class _BranchOnValues(nn.Module):
    """A forward that branches on the data: tracing keeps the branch of its zero input (-y),
    so ONNX would be wrong for inputs whose sum is positive."""

    def __init__(self) -> None:
        super().__init__()
        self.net = residual_sequential()

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        y = self.net(x)
        return y if float(x.sum()) > 0 else -y


class _Unexportable(nn.Module):
    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return torch.linalg.eigh(x.unflatten(1, (8, 8)) @ x.unflatten(1, (8, 8)).transpose(1, 2))[0].flatten(1)


def test_refusals_are_named_never_silent(digits, tmp_path: Path) -> None:
    x, _ = digits
    spec = input_spec(x[:200])
    with pytest.raises(GraphBuildError, match="largest relative difference"):
        export_model(_BranchOnValues(), tmp_path / "a", inputs=spec, reference=np.full((20, 64), 16.0), seed=0)
    bad = nn.Sequential(_Unexportable(), nn.Linear(8, 10), nn.Dropout(0.1))
    with pytest.raises(GraphBuildError, match=r"layer '0' \(_Unexportable\)") as info:
        export_model(bad, tmp_path / "b", inputs=spec, kind="sampler", reference=x[:20])
    assert info.value.field == "0"
    with pytest.raises(GraphBuildError, match="inputs.shape"):
        export_model(depot_conv_net(), tmp_path / "c", inputs=spec, reference=x[:20])
    with pytest.raises(GraphBuildError, match="no variational layers and no dropout"):
        export_model(plain_mlp(), tmp_path / "d", inputs=spec, reference=x[:20])
    with pytest.raises(ExportError, match="deep ensemble") as info:
        export_model([plain_mlp(), plain_mlp(seed=1)], tmp_path / "e", inputs=spec, kind="sampler")
    assert info.value.field == "kind"
    with pytest.raises(ExportError, match="64 columns"):
        export_model(residual_sequential(), tmp_path / "f", inputs=spec, reference=x[:5, :10])
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("rank", [FULL_RANK, LOW_RANK], ids=["full-rank", "rank-16"])
def test_flip_conv_weights_keep_the_gaussian_posterior_per_weight(rank: int) -> None:
    """Each Flipout draw's conv weight is N(mu, sigma^2) (Wen et al. 2018; the full-rank base, and the
    rank-M base's exact marginal, export/flip.py): one weight over 2000 calls, kstest against scipy.stats.norm."""
    model = depot_conv_net("gaussian")
    layer = model.block.conv
    net = DrawNetwork(model, "flip", 4, seed=0, input_shape=(1, 8, 8), flip_rank=rank)
    mode = net.layers[0]._draw_mode
    assert isinstance(mode, FlipDraws)
    rng = np.random.default_rng(0)
    values = []
    for _ in range(2000):
        net.feed.values = {k: torch.from_numpy(v) for k, v in draw_noise(net.noise, rng).items()}
        w, _ = mode.weights(net.layers[0])
        values.append(float(w[0, 2, 3, 1, 1]))
    with torch.no_grad():
        mu, sigma = float(layer.weight_mu[2, 3, 1, 1]), float(layer.weight_sigma[2, 3, 1, 1])
    assert stats.kstest(values, stats.norm(mu, sigma).cdf).pvalue > 1e-3


def test_cli_factory_exports_a_users_module(digits, tmp_path: Path, capsys) -> None:
    """demur export --factory MODULE:FUNCTION --weights state_dict.pt --data train.csv."""
    x, y = digits
    model = depot_conv_net()
    torch.save(model.state_dict(), tmp_path / "weights.pt")
    names = [f"px{i}" for i in range(64)]
    for name, rows in (("train.csv", slice(0, 300)), ("held.csv", slice(300, 400))):
        with open(tmp_path / name, "w", newline="") as fh:
            w = csv.writer(fh)
            w.writerow([*names, "digit"])
            w.writerows([[*map(float, r), int(t)] for r, t in zip(x[rows], y[rows])])
    argv = ["export", "--factory", "tests.export._own_models:depot_conv_net", "--weights",
            str(tmp_path / "weights.pt"), "--data", str(tmp_path / "train.csv"), "--reference",
            str(tmp_path / "held.csv"), "--target", "digit", "--shape", "1,8,8", "--flip", "--draws", "4",
            "--seed", "3", "--out", str(tmp_path / "bundle")]
    assert main(argv) == 0
    out = capsys.readouterr().out
    assert "(radial), flip graph with 4 draws" in out
    # where the draws enter is printed, as the manifest records it (graphs.flip.computation)
    assert "  flip graph: shared: the draw-free part runs once per call; draws enter at " in out
    from demur.serve.core.bundle import load_bundle

    bundle = load_bundle(tmp_path / "bundle")
    assert list(bundle.manifest.inputs.names) == names and bundle.manifest.inputs.shape == (1, 8, 8)
    net = DrawNetwork(model, "flip", 4, seed=3, input_shape=(1, 8, 8))
    assert _graph_vs_torch(bundle, "flip", net, x[400:420], seed=2) <= TOL
    assert main(["export", "--factory", "tests.export._own_models:nothing", "--weights", "w", "--data", "d",
                 "--out", str(tmp_path / "x")]) == 1
    assert "MODULE:FUNCTION" in capsys.readouterr().err


def _write_rows(path: Path, names: list[str], x: np.ndarray, y: np.ndarray, order: np.ndarray) -> Path:
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["digit", *[names[j] for j in order]])
        w.writerows([[int(t), *map(float, r[order])] for r, t in zip(x, y)])
    return path


def test_cli_reference_columns_are_matched_by_name_and_the_factory_found_beside_you(digits, tmp_path: Path,
                                                                                    monkeypatch, capsys) -> None:
    """--reference written in another column order than --data gives the same bundle figures (support
    check's held-out record, default threshold) as the ordered file: columns by name, as calibrate reads
    them; read by position every reference row was once out of range. The factory's module is imported
    from the current directory, as ``python -m`` does (Python docs, sys.path[0]). Data: load_digits."""
    x, y = digits
    names = [f"px{i}" for i in range(64)]
    (tmp_path / "mynets.py").write_text("from tests.export._own_models import dropout_mlp\n\n"
                                        "def build():\n    return dropout_mlp()\n")
    torch.save(dropout_mlp().state_dict(), tmp_path / "weights.pt")
    ordered = np.arange(64)
    _write_rows(tmp_path / "train.csv", names, x[:300], y[:300], ordered)
    _write_rows(tmp_path / "held.csv", names, x[300:400], y[300:400], ordered)
    _write_rows(tmp_path / "shuffled.csv", names, x[300:400], y[300:400], np.random.default_rng(0).permutation(64))
    monkeypatch.chdir(tmp_path)
    monkeypatch.syspath_prepend(str(Path(__file__).resolve().parents[2]))  # `tests` importable, not tmp_path
    monkeypatch.delitem(__import__("sys").modules, "mynets", raising=False)
    from demur.serve.core.bundle import load_bundle

    made = {}
    for ref in ("held.csv", "shuffled.csv"):
        argv = ["export", "--factory", "mynets:build", "--weights", "weights.pt", "--data", "train.csv",
                "--reference", ref, "--target", "digit", "--draws", "4", "--seed", "3", "--out", f"b-{ref}"]
        assert main(argv) == 0, capsys.readouterr().err
        made[ref] = load_bundle(tmp_path / f"b-{ref}").manifest
    a, b = made["held.csv"], made["shuffled.csv"]
    assert a.raw["support"]["heldout"] == b.raw["support"]["heldout"]
    assert a.raw["support"]["heldout"]["outside_range"] < 10
    assert a.decision.threshold == b.decision.threshold
    typo = tmp_path / "typo.csv"
    typo.write_text((tmp_path / "held.csv").read_text().replace("px7,", "pX7,", 1))
    assert main(["export", "--factory", "mynets:build", "--weights", "weights.pt", "--data", "train.csv",
                 "--reference", str(typo), "--target", "digit", "--out", "b-typo"]) == 1
    assert "unknown column(s) 'pX7' (did you mean 'px7'?)" in capsys.readouterr().err
    assert not (tmp_path / "b-typo").exists()
