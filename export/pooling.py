"""Adaptive 2-D pooling written with fixed windows, so torch's ONNX exporter can write it where draws run.

Why: the TorchScript exporter (``torch.onnx.export(..., dynamo=False)``, export/graphs.py) writes
``nn.AdaptiveAvgPool2d`` / ``nn.AdaptiveMaxPool2d`` with an output other than 1 x 1 only when it
knows the input's spatial size at that node. It loses that size through the reshapes that carry S
draws in the batch (a Reshape to ``[-1, C, H, W]``, export/draws.py), so a network with such a
pool after a ``VariationalConv2d`` was refused ("ONNX export of operator adaptive_avg_pool2d,
input size not accessible"), and so was any non-divisible adaptive pool. Every per-case size is
fixed by ``inputs.shape``, so the sizes are known while tracing: ``FixedWindowPool`` reads them as
Python ints and writes the pooling with fixed windows.

Exact, by torch's definition of adaptive pooling (ATen, ``AdaptiveAveragePooling.cpp``:
``start_index``/``end_index``): output i of an axis of length n pooled to m takes the inputs
``floor(i * n / m)`` to ``ceil((i + 1) * n / m) - 1``. When m divides n these are the windows of a
plain pooling with kernel = stride = n / m (one AveragePool/MaxPool node). Otherwise each axis is
reduced window by window (a slice and a mean or max per output), one axis after the other: the
windows are rectangles, so the mean (or max) over a window is the mean (max) over its rows of the
mean (max) over its columns.

``fixed_window_pools(module)`` swaps them in place on ``DrawNetwork``'s private copy of the user's
module; the user's own module is never changed.
"""

from __future__ import annotations

from collections.abc import Sequence

import torch
import torch.nn.functional as F
from torch import nn

__all__ = ["FixedWindowPool", "adaptive_windows", "fixed_window_pools"]


def adaptive_windows(n: int, m: int) -> list[tuple[int, int]]:
    """[start, end) of each of the ``m`` adaptive-pooling windows over an axis of length ``n``."""
    return [((i * n) // m, -((-(i + 1) * n) // m)) for i in range(m)]


class FixedWindowPool(nn.Module):
    """``nn.AdaptiveAvgPool2d`` / ``nn.AdaptiveMaxPool2d`` (``mode`` "avg" or "max", same
    ``output_size``, None keeping that axis) as fixed windows: x [N, C, H, W] -> [N, C, h, w]."""

    def __init__(self, output_size: int | Sequence[int | None], mode: str) -> None:
        super().__init__()
        if mode not in ("avg", "max"):
            raise ValueError(f"mode must be 'avg' or 'max'; got {mode!r}")
        self.output_size = (output_size, output_size) if isinstance(output_size, int) or output_size is None \
            else tuple(output_size)
        self.mode = mode

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        H, W = (int(d) for d in x.shape[-2:])          # Python ints: the per-case shape is fixed
        h, w = (n if m is None else int(m) for m, n in zip(self.output_size, (H, W)))
        if H % h == 0 and W % w == 0:
            kernel = (H // h, W // w)
            return F.avg_pool2d(x, kernel, kernel) if self.mode == "avg" else F.max_pool2d(x, kernel, kernel)
        return self._reduce(self._reduce(x, -2, H, h), -1, W, w)

    def _reduce(self, x: torch.Tensor, axis: int, n: int, m: int) -> torch.Tensor:
        if n == m:
            return x
        parts = []
        for start, end in adaptive_windows(n, m):
            piece = x.narrow(axis, start, end - start)
            parts.append(piece.mean(axis, keepdim=True) if self.mode == "avg" else piece.amax(axis, keepdim=True))
        return torch.cat(parts, dim=axis)

    def extra_repr(self) -> str:
        return f"output_size={self.output_size}, mode={self.mode}"


def fixed_window_pools(module: nn.Module) -> int:
    """Replace, in place, every adaptive 2-D average/max pool inside ``module`` (not returning
    indices) by its ``FixedWindowPool``; returns how many were replaced."""
    made: dict[int, FixedWindowPool] = {}      # a pool used in two places stays one module
    for parent in list(module.modules()):
        for name, child in list(parent.named_children()):
            if id(child) not in made:
                if isinstance(child, nn.AdaptiveAvgPool2d):
                    made[id(child)] = FixedWindowPool(child.output_size, "avg")
                elif isinstance(child, nn.AdaptiveMaxPool2d) and not child.return_indices:
                    made[id(child)] = FixedWindowPool(child.output_size, "max")
                else:
                    continue
            setattr(parent, name, made[id(child)])
    return len(made)
