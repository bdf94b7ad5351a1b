"""A bundle run offline over many rows, a bounded chunk at a time.

``demur calibrate``, ``demur evaluate`` and the exporter's reference scores all run the
serving path over a whole file of raw rows. One graph call on every row at once would hold
S x N x K floats of activations inside onnxruntime, and the support check's k-NN distances
an N x 2000 matrix (serve/core/support.py, ``MAX_SAMPLE``): 16 kB a row, 1.6 GB for 100k
rows. So the rows go through in chunks of ``CHUNK_ROWS``: ``chunks`` for a caller that
summarises and decides per chunk, ``draws_in_chunks`` for one that keeps only the draws.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import numpy as np

__all__ = ["CHUNK_ROWS", "chunks", "draws_in_chunks"]

CHUNK_ROWS = 256
"""Rows per graph run: about S * 256 * K floats of draws and 256 x 2000 support distances per chunk."""


def chunks(x: np.ndarray, rows: int = CHUNK_ROWS) -> Iterator[np.ndarray]:
    """Consecutive slices of ``x`` (float[N, ...]) of at most ``rows`` rows, in order (views, no copies)."""
    for start in range(0, len(x), rows):
        yield x[start:start + rows]


def draws_in_chunks(engine: Any, x: np.ndarray, rows: int = CHUNK_ROWS) -> np.ndarray:
    """``engine.run`` over raw rows ``x`` float[N, ...], a chunk at a time: float32[S, N, K]
    (``engine``: a loaded ``demur.serve.adapters.engine.Engine``)."""
    if not len(x):
        raise ValueError("draws_in_chunks needs at least one row")
    return np.concatenate([engine.run(xb) for xb in chunks(x, rows)], axis=1)
