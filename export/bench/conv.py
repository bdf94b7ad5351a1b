"""``demur bench``'s conv nets: a user's own architecture through the public export call.

Why beside the MLP: issue 12 asks the fresh-draw (flip) graph of a conv net to stay within 2x
of the stacked graph's latency at S = 32, B = 1, and its file within 4x of the parameter bytes.
The nets are built the way a user would (sample_requests/own_model.py): a deterministic conv
stem, ReLU, max-pool, residual blocks (demur's ``VariationalConv2d`` -> batch norm -> + skip
-> GELU), demur's ``VariationalLinear`` head; and they go through ``demur.export.export_model``
(parity checks included), once as ``stacked`` and once as ``flip``.

Two sizes, because a tiny net's file is mostly fixed graph structure (node and input
declarations, the Flipout base's ops), not weights: ``small`` (8 channels, one block, ~2k
parameters) is the shape of the sample; ``large`` (32 channels, two blocks, a 128-wide
variational hidden layer, ~86k parameters, the size of the bench's MLP) is where the memory
ratio says something about the weights.

"Parameters" here: the numbers one sampled network holds, i.e. every variational weight and
bias once (its mu; sigma is the posterior's, not the network's), every deterministic parameter
and the batch-norm running statistics. ``file_over_param_bytes`` = graph file bytes / (4 x that).
Untrained weights (the arithmetic, not the accuracy, sets the speed).
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

from demur.export.layers import ResidualBlock, VariationalLinear
from demur.serve.adapters.engine import Engine

__all__ = ["CONV_NETS", "DepotConv", "conv_section", "network_numbers"]

CONV_NETS = {"small": {"channels": 8, "blocks": 1, "hidden": 0},
             "large": {"channels": 32, "blocks": 2, "hidden": 128}}
"""The measured conv nets by name (module docstring)."""

_KINDS = ("stacked", "flip")


class DepotConv(nn.Module):
    """Digits [1, 8, 8] -> 10 logits: conv stem, ReLU, max-pool, ``blocks`` residual blocks,
    optionally a variational hidden layer (GELU), a variational head."""

    def __init__(self, channels: int, blocks: int, hidden: int) -> None:
        super().__init__()
        self.stem = nn.Conv2d(1, channels, 3, padding=1)
        self.blocks = nn.Sequential(*(ResidualBlock(channels) for _ in range(blocks)))
        width = channels * 4 * 4
        self.hidden = VariationalLinear(width, hidden, init_spread=0.02) if hidden else None
        self.head = VariationalLinear(hidden or width, 10, init_spread=0.02)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = self.blocks(F.max_pool2d(torch.relu(self.stem(x)), 2)).flatten(1)
        if self.hidden is not None:
            h = F.gelu(self.hidden(h))
        return self.head(h)


def network_numbers(model: nn.Module) -> int:
    """The numbers one sampled network holds (module docstring): parameters without the
    ``*_rho`` halves of variational layers, plus floating buffers (batch-norm statistics)."""
    params = sum(p.numel() for name, p in model.named_parameters() if not name.endswith("_rho"))
    buffers = sum(b.numel() for b in model.buffers() if b.is_floating_point())
    return int(params + buffers)


def conv_section(xs: np.ndarray, cfg: dict[str, Any], root: Path,
                 timer: Callable[[Callable[[], Any], int, float], dict[str, float]],
                 log: Callable[[str], None]) -> list[dict[str, Any]]:
    """Per conv net: architecture, parameters, engine latency of stacked and flip at S =
    ``cfg["conv_draws"]`` for each B in ``cfg["batches"]`` (one onnxruntime thread, timed by
    ``timer(fn, repeats, budget_s)`` -> seconds median/min/max, the MLP's timer), file sizes."""
    from demur.export import export_model, input_spec

    S = int(cfg["conv_draws"])
    spec = input_spec(xs, names=[f"px_r{r}c{c}" for r in range(8) for c in range(8)], shape=[1, 8, 8])
    out = []
    for name in cfg["conv_nets"]:
        torch.manual_seed(0)
        model = DepotConv(**CONV_NETS[name]).eval()
        numbers = network_numbers(model)
        engine, memory = [], []
        for kind in _KINDS:
            bundle = export_model(model, root / f"conv-{name}-{kind}", inputs=spec,
                                  labels=[str(d) for d in range(10)], kind=kind, draws=S, reference=xs[:64],
                                  name=f"bench-conv-{name}", seed=0)
            size = bundle.graph_path(kind).stat().st_size
            memory.append({"mode": kind, "draws": S, "file_bytes": size, "file_over_param_bytes": size / (4 * numbers)})
            run = Engine(bundle, graph=kind, intra_threads=1, inter_threads=1).load().run
            for B in cfg["batches"]:
                x = xs[:B]
                t = timer(lambda: run(x), cfg["repeats"], cfg["budget_s"])
                engine.append({"mode": kind, "draws": S, "batch": B,
                               "latency_ms": {k: v * 1e3 for k, v in t.items()}, "rows_per_s": B / t["median"]})
                log(f"  conv {name:>5} {kind:>8} S={S:<4} B={B:<3} {t['median'] * 1e3:9.3f} ms")
        c = CONV_NETS[name]
        hidden = f"-v{c['hidden']}" if c["hidden"] else ""
        arch = f"conv{c['channels']}-pool-{c['blocks']}x[vconv{c['channels']}+bn+gelu]{hidden}-v10"
        out.append({"name": name, "arch": arch, "parameters": numbers, "draws": S, "engine": engine,
                    "memory": memory})
    return out
