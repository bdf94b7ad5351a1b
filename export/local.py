"""Local reparameterisation: a dense variational layer's draws made in its outputs, not its weights.

Why: S draws of a dense layer's weights cost S x its parameters, stored
(stacked) or fed as fresh normals every call (sampler, flip). For a
deterministic backbone with a variational head that is the whole cost of
the draws: a 512 -> 256 head is 131k weights, 4.2M fresh normals per call
at S = 32 against a backbone that runs once. For ONE case, though, a dense
layer's output under a weight draw has a law that needs no weight tensor
(Kingma, Salimans & Welling, "Variational Dropout and the Local
Reparameterization Trick", NeurIPS 2015, section 2.3). With input x [in],
weight mean mu and scale sigma [out, in]::

    gaussian  y_j = x . mu_j + b_j + sqrt(sum_i x_i^2 sigma_ji^2) * g_j,
              g_j ~ N(0, 1) iid over j

because the outputs j use disjoint weights (independent), and each is a sum
of independent Gaussians.

radial (Farquhar, Osborne & Gal, AISTATS 2020, eq. 2), w = mu + sigma *
(eps / ||eps||) * r over the whole [out, in] tensor: write a_j = x * sigma_j
and split each row eps_j into its part along a_j and the rest. Then
a_j . eps_j = ||a_j|| g_j with g_j ~ N(0, 1), and ||eps||^2 = sum_j g_j^2 +
C, where C ~ chi-square with out * (in - 1) degrees of freedom is the rows'
remaining squared length, independent of g. So, exactly::

    radial    y_j = x . mu_j + b_j + sqrt(sum_i x_i^2 sigma_ji^2) * n_j,
              n = r * g / sqrt(||g||^2 + C),  g ~ N(0, I_out), r ~ N(0, 1)

The bias draw ``b`` is the layer's own (gaussian mu + sigma * eps; radial
its own direction and radius), as in weight space.

What is exact and what is not. Per case, the S outputs are S independent
draws of exactly the law the S weight draws give: the case's mean,
interval, entropies and mutual information are estimated from the same
distribution. Across the cases of one call the draws are not one shared
network: case b's draw s is not computed with the same weight matrix as
case b''s. Nothing demur serves depends on that (every summary is per case).
It holds only where the layer sees one vector per case ([B, in], not a
sequence [B, T, in] whose positions share the weights) and runs once per
forward (a layer called twice would see the same noise twice, where the
true draws correlate the two calls only through the shared weights);
``DrawNetwork`` checks both on a dry run and keeps weight draws otherwise.

Where demur uses it (export/draws.py):

``stacked``  the first dense variational layer on a path (fed by the
             draw-free part, export/shared.py): n and b stored at export (S x
             out numbers each, drawn once with the export seed), so the graph
             is deterministic, as stacked graphs are, and reads mu and
             sigma^2 once instead of S weight copies. Layers after it keep
             their stored weight sets: on [S*B, in] rows the two matmuls here
             cost twice a stored set's at large B.
``sampler``, ``flip``  every eligible dense gaussian layer, fresh per call from
             fed normals ``normals.L{i}.local`` [S, out] and ``normals.L{i}.bias``
             [S, out]: S x out numbers, not S x out x in (the sampler) or out x in
             (Flipout's base). The radial family keeps weight draws in these
             graphs: its C would need a chi-square per draw, which the engine's
             noise laws do not make.
"""

from __future__ import annotations

import numpy as np
import torch
import torch.nn.functional as F

from demur.export.draws import Feed, NoiseInput, _Mode
from demur.export.layers import VariationalLayer, VariationalLinear

__all__ = ["LocalDraws", "local_noise", "stored_generator"]


def stored_generator(seed: int) -> torch.Generator:
    """The generator a stacked graph exported with ``seed`` draws its stored local noise from (the
    weight sets come from ``torch.Generator().manual_seed(seed)``; this one is offset so the two
    streams never coincide)."""
    return torch.Generator().manual_seed(int(seed) + 7919)


@torch.no_grad()
def local_noise(layer: VariationalLinear, S: int, generator: torch.Generator) -> tuple[torch.Tensor, torch.Tensor]:
    """(n [S, out], b [S, out]): the standardised output noise and the bias draws of S stored draws
    (module docstring), from the seeded ``generator`` (and, radial, a numpy generator seeded from it)."""
    out, d_in = int(layer.out_features), int(layer.in_features)
    g = torch.randn((S, out), generator=generator, dtype=torch.float64)
    bias = layer.draw(S, generator)["bias"].float()   # the layer's own bias draws (its family's law)
    if layer.posterior != "radial":
        return g.float(), bias
    r = torch.randn((S, 1), generator=generator, dtype=torch.float64)
    seed = int(torch.randint(0, 2**62, (1,), generator=generator))
    dof = out * (d_in - 1)
    rest = np.random.default_rng(seed).chisquare(dof, S) if dof > 0 else np.zeros(S)
    norm = torch.sqrt(g.square().sum(dim=1, keepdim=True) + torch.from_numpy(rest)[:, None])
    return (r * g / norm).float(), bias


class LocalDraws(_Mode):
    """One dense variational layer's S draws by local reparameterisation (module docstring).

    ``stored``: (n [S, out], b [S, out]) fixed at export (stacked); None: fresh per call from the
    fed normals ``normals.L{index}.local`` and ``normals.L{index}.bias`` (gaussian only)."""

    def __init__(self, layer: VariationalLinear, S: int, *, stored: tuple[torch.Tensor, torch.Tensor] | None = None,
                 feed: Feed | None = None, index: int = 0) -> None:
        self.S = int(S)
        with torch.no_grad():
            self.mu_w, self.mu_b = layer.weight_mu.detach().clone(), layer.bias_mu.detach().clone()
            self.var_w = layer.weight_sigma.detach().square()
            self.sigma_b = layer.bias_sigma.detach().clone()
        self.stored, self.feed = stored, feed
        self.names = (f"normals.L{index}.local", f"normals.L{index}.bias")
        if stored is None:
            if layer.posterior != "gaussian":
                raise ValueError("fresh local draws are for the gaussian family (module docstring)")
            out = int(layer.out_features)
            self.noise = (NoiseInput(self.names[0], (self.S, out)), NoiseInput(self.names[1], (self.S, out)))

    def _draws(self) -> tuple[torch.Tensor, torch.Tensor]:
        """(n [S, out], b [S, out]) of this call."""
        if self.stored is not None:
            return self.stored
        assert self.feed is not None
        return self.feed[self.names[0]], self.mu_b + self.sigma_b * self.feed[self.names[1]]

    def weights(self, layer: VariationalLayer) -> tuple[torch.Tensor, torch.Tensor]:
        raise NotImplementedError("local draws have no weight sets; use per_draw for the reference")

    def run(self, layer: VariationalLayer, x: torch.Tensor) -> torch.Tensor:
        """x [S*B, in] (draw-carrying) or, where draws enter, [B, in] -> [S*B, out], draw-major."""
        n, b = self._draws()
        mean = F.linear(x, self.mu_w)
        # sqrt(x^2 . sigma^2) scaled by each row's largest |x|: x^2 would overflow float32 from |x| ~ 1.8e19,
        # where the layer's own output (x . mu) is still finite
        scale = x.abs().amax(dim=-1, keepdim=True).clamp_min(1e-30)
        sd = torch.sqrt(F.linear((x / scale).square(), self.var_w)) * scale
        out = int(self.mu_w.shape[0])
        if self.entering:                                               # [B, out] -> [S, B, out]
            y = mean + b[:, None, :] + sd * n[:, None, :]
        else:
            S = self.S
            y = (mean.reshape(S, -1, out) + b[:, None, :] + sd.reshape(S, -1, out) * n[:, None, :])
        return y.reshape(-1, out)

    run_plain = run
    """Where draws enter (export/shared.py sets ``entering``): the same code on a [B, in] batch."""

    def per_draw(self, layer: VariationalLayer) -> list[_Mode]:
        """The reference's S one-draw layers on a plain batch (export/draws.py, ``reference_draws``)."""
        n, b = self._draws()
        return [_OneLocal(self.mu_w, self.var_w, n[s], b[s]) for s in range(self.S)]


class _OneLocal(_Mode):
    """Draw s alone: y = x mu^T + b_s + sqrt(x^2 (sigma^2)^T) n_s, per case, on an ordinary batch."""

    def __init__(self, mu_w: torch.Tensor, var_w: torch.Tensor, n: torch.Tensor, b: torch.Tensor) -> None:
        self.mu_w, self.var_w, self.n, self.b = mu_w, var_w, n, b

    def run(self, layer: VariationalLayer, x: torch.Tensor) -> torch.Tensor:
        return F.linear(x, self.mu_w, self.b) + torch.sqrt(F.linear(x.square(), self.var_w)) * self.n
