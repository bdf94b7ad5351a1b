"""A bundle run offline over many rows, a bounded chunk at a time.

``demur calibrate``, ``demur evaluate`` and the exporter's reference scores all run the
serving engine over a whole file of raw rows; one graph call on every row at once would
hold S x N x K floats of activations inside onnxruntime besides the answer, so the rows go
through in chunks of ``CHUNK_ROWS`` and only the draws are kept.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["CHUNK_ROWS", "draws_in_chunks"]

CHUNK_ROWS = 256
"""Rows per graph run, bounding the engine's working memory to about S * 256 * K floats per call."""


def draws_in_chunks(engine: Any, x: np.ndarray, rows: int = CHUNK_ROWS) -> np.ndarray:
    """``engine.run`` over raw rows ``x`` float[N, ...] in chunks of ``rows``: float32[S, N, K]
    (``engine``: a loaded ``demur.serve.adapters.engine.Engine``)."""
    if not len(x):
        raise ValueError("draws_in_chunks needs at least one row")
    return np.concatenate([engine.run(x[i:i + rows]) for i in range(0, len(x), rows)], axis=1)
