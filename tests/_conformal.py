"""Split-conformal coverage over repeated random calibration/test splits (Lei et al. 2018),
shared by the tests that check coverage of served regression intervals."""

from __future__ import annotations

import numpy as np

from demur.serve.offline.calibration import conformal_scale


def split_coverages(y: np.ndarray, mean: np.ndarray, sd: np.ndarray, alpha: float, *,
                    seed: int, splits: int = 300) -> list[float]:
    """Test-half coverage of mean ± q·sd, q fitted on the other half, for ``splits`` random halvings."""
    rng = np.random.default_rng(seed)
    n = len(y)
    covs: list[float] = []
    for _ in range(splits):
        perm = rng.permutation(n)
        ci, ti = perm[: n // 2], perm[n // 2:]
        q = conformal_scale(y[ci], mean[ci], sd[ci], alpha)
        covs.append(float(np.mean(np.abs(y[ti] - mean[ti]) <= q * sd[ti])))
    return covs
