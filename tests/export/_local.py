"""The local reparameterisation written out by hand, for references that replay a stacked graph's draws.

Kingma, Salimans & Welling, "Variational Dropout and the Local Reparameterization Trick", NeurIPS 2015,
section 2.3: for one case x, a dense layer's output under a mean-field weight draw is
y = x mu^T + b + sqrt(x^2 (sigma^2)^T) * n, n standard normal per output (gaussian). demur's stacked
graphs store n and b where draws enter a dense layer (export/local.py, which also derives the radial n).
"""

from __future__ import annotations

import torch
import torch.nn.functional as F

from demur.export.layers import VariationalLinear


@torch.no_grad()
def local_layer(x: torch.Tensor, layer: VariationalLinear, n: torch.Tensor, b: torch.Tensor) -> torch.Tensor:
    """One draw of ``layer`` on the plain batch x [B, in] from output noise n [out] and bias draw b [out]."""
    return F.linear(x, layer.weight_mu, b) + torch.sqrt(F.linear(x.square(), layer.weight_sigma.square())) * n
