"""The training checkpoint: what ``demur train`` writes and ``demur export`` reads.

``DIR/checkpoint.pt`` holds only tensors, dicts, lists, strings and numbers, so
``torch.load(..., weights_only=True)`` reads it and nothing else is unpickled. Keys
(DEVELOPERS.md, "Checkpoint"): ``format`` (``CHECKPOINT_FORMAT``), ``version``
(``CHECKPOINT_VERSION``), ``arch`` ({"kind", "hidden", "channels", "posterior",
"prior_scale", "init_sigma", "sigma_param", "input_sigma_param"}; the last two
absent in older checkpoints: softplus, and the first layer like the rest), ``state_dict``, ``task``, ``labels``, ``inputs`` (the
bundle's input spec), ``target``, ``data`` (how to reload the splits), ``metrics``,
``training`` (the settings), ``drift_features``. An ensemble checkpoint adds ``members``
(M), ``member_metrics`` and ``training.member_seeds``; its ``state_dict`` is a list of M
state_dicts and ``load_checkpoint`` returns the list of members.

Kept apart from ``demur.export.training`` (the ELBO fit): the exporter and the benchmark
read checkpoints without caring how they were trained.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import torch
from torch import nn

from demur.export.errors import CheckpointError
from demur.export.layers import build_model

__all__ = ["CHECKPOINT_FILE", "CHECKPOINT_FORMAT", "CHECKPOINT_VERSION", "load_checkpoint", "save_checkpoint"]

CHECKPOINT_FORMAT = "demur-checkpoint"
CHECKPOINT_VERSION = 1
CHECKPOINT_FILE = "checkpoint.pt"


def save_checkpoint(out: Path | str, meta: dict[str, Any], state: Any) -> Path:
    """Write ``meta`` (the keys above, without ``state_dict``) and ``state`` (one state_dict,
    or a list of them for an ensemble) to ``out/checkpoint.pt``; return its path."""
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    path = out / CHECKPOINT_FILE
    torch.save({**meta, "format": CHECKPOINT_FORMAT, "version": CHECKPOINT_VERSION, "state_dict": state}, path)
    return path


def load_checkpoint(directory: Path | str) -> tuple[nn.Sequential | list[nn.Sequential], dict[str, Any]]:
    """Rebuild the trained model (eval mode) and its metadata from ``DIR/checkpoint.pt``; an
    ensemble checkpoint (``members``, ``train_ensemble``) gives the list of its members.

    Reads with ``torch.load(weights_only=True)``: nothing but tensors and
    plain containers is unpickled. ``meta`` is the checkpoint without ``state_dict``.
    """
    path = Path(directory)
    if path.is_dir():
        path = path / CHECKPOINT_FILE
    if not path.is_file():
        raise CheckpointError(f"no checkpoint at {path}: expected the output directory of 'demur train'",
                              field="checkpoint")
    try:
        raw = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as exc:  # torch raises UnpicklingError, RuntimeError, EOFError...
        raise CheckpointError(f"{path} is not a readable demur checkpoint: {exc}", field="checkpoint") from exc
    if not isinstance(raw, dict) or raw.get("format") != CHECKPOINT_FORMAT:
        got = raw.get("format") if isinstance(raw, dict) else type(raw).__name__
        raise CheckpointError(f"{path}: format must be {CHECKPOINT_FORMAT!r}; got {got!r}", field="format")
    if raw.get("version") != CHECKPOINT_VERSION:
        raise CheckpointError(
            f"{path}: checkpoint version {raw.get('version')!r} is not supported; expected {CHECKPOINT_VERSION}",
            field="version",
        )
    meta = {k: v for k, v in raw.items() if k != "state_dict"}
    arch = meta["arch"]
    outputs = len(meta["labels"]) if meta["task"] == "classification" else 2
    states = raw.get("state_dict")
    ensemble = "members" in meta
    if ensemble and (not isinstance(states, list) or len(states) != meta["members"] or len(states) < 2):
        got = len(states) if isinstance(states, list) else type(states).__name__
        raise CheckpointError(f"{path}: an ensemble checkpoint of {meta['members']} members needs as many "
                              f"state_dicts (at least 2); got {got}", field="state_dict")
    models = []
    for state in (states if ensemble else [states]):
        model = build_model(
            arch["kind"], meta["inputs"]["shape"], outputs, arch["posterior"], prior_scale=arch["prior_scale"],
            hidden=arch["hidden"], channels=arch["channels"], init_sigma=arch.get("init_sigma", 1e-3),
            sigma_param=arch.get("sigma_param", "softplus"), input_sigma_param=arch.get("input_sigma_param"),
        )
        try:
            model.load_state_dict(state)
        except (RuntimeError, KeyError, TypeError, AttributeError) as exc:
            raise CheckpointError(f"{path}: weights do not fit the recorded architecture: {exc}",
                                  field="state_dict") from exc
        models.append(model.eval())
    return (models if ensemble else models[0]), meta
