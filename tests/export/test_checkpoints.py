"""The training checkpoint (export/checkpoints.py): written by ``train``, read with
``torch.load(weights_only=True)`` (torch's safe loader: tensors and plain containers only),
foreign or damaged files refused with a named error."""

from __future__ import annotations

import json

import pytest
import torch

from demur.export.checkpoints import CHECKPOINT_FORMAT, load_checkpoint
from demur.export.datasets import load_dataset
from demur.export.errors import CheckpointError
from demur.export.layers import VariationalLinear, variational_layers
from demur.export.training import DEFAULTS, train


def test_checkpoint_loads_with_weights_only(tmp_path):
    ds = load_dataset("digits")
    result = train(ds, epochs=1, out=tmp_path, hidden=(16,), progress=False)
    # reference: torch.load(weights_only=True) refuses anything but tensors and plain containers
    raw = torch.load(tmp_path / "checkpoint.pt", weights_only=True)
    assert raw["format"] == CHECKPOINT_FORMAT and raw["version"] == 1
    for key in ("arch", "state_dict", "task", "labels", "inputs", "target", "data", "metrics", "drift_features"):
        assert key in raw, key
    assert raw["arch"] == {"kind": "mlp", "hidden": [16], "channels": [16, 32], "posterior": "radial",
                           "prior_scale": 1.0, "init_sigma": 1e-3, "sigma_param": DEFAULTS["sigma_param"],
                           "input_sigma_param": None}
    assert raw["data"] == {"source": "digits", "target": "digit", "seed": 0}
    assert set(raw["inputs"]) >= {"names", "shape", "center", "scale", "low", "high", "kind"}
    assert len(raw["drift_features"]["edges"]) == 64
    model, meta = load_checkpoint(tmp_path)
    assert "state_dict" not in meta and meta["labels"] == [str(i) for i in range(10)]
    for a, b in zip(variational_layers(model), variational_layers(result.model)):
        assert torch.equal(a.weight_mu, b.weight_mu) and torch.equal(a.bias_rho, b.bias_rho)
    record = json.loads((tmp_path / "training.json").read_text())
    assert record["history"][0]["epoch"] == 1 and "test" in record["metrics"]


def test_foreign_checkpoints_are_refused(tmp_path):
    with pytest.raises(CheckpointError, match="no checkpoint at"):
        load_checkpoint(tmp_path)
    torch.save({"format": "something-else"}, tmp_path / "checkpoint.pt")
    with pytest.raises(CheckpointError, match="format must be 'demur-checkpoint'; got 'something-else'"):
        load_checkpoint(tmp_path)
    torch.save({"format": CHECKPOINT_FORMAT, "version": 99}, tmp_path / "checkpoint.pt")
    with pytest.raises(CheckpointError, match="version 99 is not supported"):
        load_checkpoint(tmp_path)
    torch.save({"layer": VariationalLinear(2, 2)}, tmp_path / "checkpoint.pt")  # a pickled module
    with pytest.raises(CheckpointError, match="not a readable demur checkpoint"):
        load_checkpoint(tmp_path)


def test_ensemble_checkpoint_with_missing_members_is_refused(tmp_path):
    ds = load_dataset("digits")
    train(ds, epochs=1, out=tmp_path, hidden=(16,), progress=False)
    raw = torch.load(tmp_path / "checkpoint.pt", weights_only=True)
    torch.save({**raw, "members": 3, "state_dict": [raw["state_dict"]]}, tmp_path / "checkpoint.pt")
    with pytest.raises(CheckpointError, match="3 members needs as many state_dicts"):
        load_checkpoint(tmp_path)
