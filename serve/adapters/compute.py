"""What a worker process computes with: its engine and its threads, as the config says.

Why the BLAS threads are set here: numpy's matrix products (the support check's k-NN product,
serve/core/support.py) run on OpenBLAS, which by default starts one thread per core in every
process. The server already runs one worker process per core, and each worker's onnxruntime
session has its own threads, so a multi-threaded BLAS in every worker oversubscribes the cores:
threads that spin waiting for each other on a core another process holds. Measured in one
process beside two other busy processes on this 2-core machine (the bench MLP bundle, support
check on, four 64-case bodies answered together): 38 ms per answer with OpenBLAS's default
threads, 13 ms with one thread; the support check alone 11 ms against 0.3 ms per call.
``blas_threads`` (default 1) sets it per process, for numpy's and scipy's BLAS alike.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from demur.serve.config import ServeConfig

__all__ = ["engine_loader", "limit_blas_threads"]

def limit_blas_threads(threads: int) -> None:
    """At most ``threads`` BLAS threads in this process from now on (threadpoolctl, which finds
    every OpenBLAS / MKL / BLIS library loaded, numpy's and scipy's included)."""
    from threadpoolctl import threadpool_limits

    threadpool_limits(limits=int(threads), user_api="blas")


def engine_loader(config: ServeConfig) -> Callable[[str], Any]:
    """``path -> Engine`` with the config's graph and thread settings: what a server worker and
    ``demur score`` open. onnxruntime is imported only once a bundle is opened."""
    def load(path: str) -> Any:
        from demur.serve.adapters.engine import Engine
        from demur.serve.core.bundle import load_bundle

        limit_blas_threads(config.blas_threads)
        return Engine(load_bundle(path), graph=config.graph, intra_threads=config.ort_intra_threads,
                      inter_threads=config.ort_inter_threads, seed=config.seed)
    return load
