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
its own direction and radius), as in weight space. In the fresh gaussian
draws the bias's normal joins the output's: y_j = x . mu_j + mu_b_j +
sqrt(sum_i x_i^2 sigma_ji^2 + sigma_b_j^2) * g_j, one normal per output.

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
``sampler``, ``flip``  every eligible dense layer, fresh per call from noise the
             engine feeds (``LocalDraws``): S x out normals (radial: plus S x 2
             radii and S chi-squares, the engine's ``chisquare`` law), not
             S x out x in (the sampler's weights) or out x in (Flipout's base).
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

from demur.export.draws import Feed, NoiseInput, _Mode
from demur.export.layers import VariationalLayer, VariationalLinear

__all__ = ["LocalDraws", "local_eligible", "local_noise", "localise_entries", "stored_generator"]


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
    fed normals ``normals.L{index}.local`` (g; gaussian: the bias's variance joins the output's, so
    this is the only input) and, radial, ``normals.L{index}.bias``, ``normals.L{index}.radius`` [S, 2]
    (r for the weight and the bias) and
    ``chisquare.L{index}.dof{k}`` [S] (C, k = out (in - 1); absent when in = 1)."""

    def __init__(self, layer: VariationalLinear, S: int, *, stored: tuple[torch.Tensor, torch.Tensor] | None = None,
                 feed: Feed | None = None, index: int = 0) -> None:
        self.S = int(S)
        with torch.no_grad():
            self.mu_w, self.mu_b = layer.weight_mu.detach().clone(), layer.bias_mu.detach().clone()
            self.var_w = layer.weight_sigma.detach().square()
            self.sigma_b = layer.bias_sigma.detach().clone()
        self.stored, self.feed, self.radial = stored, feed, layer.posterior == "radial"
        out = int(layer.out_features)
        self.dof = out * (int(layer.in_features) - 1)
        self.names = (f"normals.L{index}.local", f"normals.L{index}.bias", f"normals.L{index}.radius",
                      f"chisquare.L{index}.dof{self.dof}")
        if stored is None:
            # gaussian: the bias's normal joins the output's (a sum of independent normals), one input
            specs = [NoiseInput(self.names[0], (self.S, out))]
            if self.radial:
                specs += [NoiseInput(self.names[1], (self.S, out)), NoiseInput(self.names[2], (self.S, 2))]
                if self.dof:
                    specs.append(NoiseInput(self.names[3], (self.S,)))
            self.noise = tuple(specs)
        self.fold_bias = stored is None and not self.radial
        """Fresh gaussian draws: b = mu_b and the bias's variance joins the output's (``run``)."""

    def _draws(self) -> tuple[torch.Tensor, torch.Tensor]:
        """(n [S, out], b [S, out]) of this call: stored, or from the fed noise (module docstring)."""
        if self.stored is not None:
            return self.stored
        assert self.feed is not None
        g = self.feed[self.names[0]]
        if not self.radial:
            return g, self.mu_b.expand(self.S, -1)
        eps_b = self.feed[self.names[1]]
        r = self.feed[self.names[2]]                                                  # [S, 2]: weight, bias
        rest = self.feed[self.names[3]][:, None] if self.dof else torch.zeros_like(r[:, :1])
        n = r[:, :1] * g / torch.sqrt(g.square().sum(dim=1, keepdim=True) + rest)
        b = self.mu_b + self.sigma_b * (eps_b / torch.linalg.vector_norm(eps_b, dim=1, keepdim=True)) * r[:, 1:]
        return n, b

    def weights(self, layer: VariationalLayer) -> tuple[torch.Tensor, torch.Tensor]:
        raise NotImplementedError("local draws have no weight sets; use per_draw for the reference")

    def run(self, layer: VariationalLayer, x: torch.Tensor) -> torch.Tensor:
        """x [S*B, in] (draw-carrying) or, where draws enter, [B, in] -> [S*B, out], draw-major."""
        n, b = self._draws()
        mean = F.linear(x, self.mu_w)
        # sqrt(x^2 . sigma^2) scaled by each row's largest |x|: x^2 would overflow float32 from |x| ~ 1.8e19,
        # where the layer's own output (x . mu) is still finite
        # (at least 1, so sigma_b^2 / scale^2 below cannot overflow where x is all zeros)
        scale = x.abs().amax(dim=-1, keepdim=True).clamp_min(1.0)
        if self.fold_bias:  # sigma_b^2 scaled like x^2 . sigma^2, so the square root takes one sum
            sd = torch.sqrt(F.linear((x / scale).square(), self.var_w, self.sigma_b.square() / scale.square())) * scale
        else:
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
        var_b = self.sigma_b.square() if self.fold_bias else torch.zeros_like(self.sigma_b)
        return [_OneLocal(self.mu_w, self.var_w, var_b, n[s], b[s]) for s in range(self.S)]


class _OneLocal(_Mode):
    """Draw s alone: y = x mu^T + b_s + sqrt(x^2 (sigma^2)^T + var_b) n_s, per case, on an ordinary
    batch (var_b: the bias's variance where it joins the output's noise, else 0)."""

    def __init__(self, mu_w: torch.Tensor, var_w: torch.Tensor, var_b: torch.Tensor, n: torch.Tensor,
                 b: torch.Tensor) -> None:
        self.mu_w, self.var_w, self.var_b, self.n, self.b = mu_w, var_w, var_b, n, b

    def run(self, layer: VariationalLayer, x: torch.Tensor) -> torch.Tensor:
        return F.linear(x, self.mu_w, self.b) + torch.sqrt(F.linear(x.square(), self.var_w, self.var_b)) * self.n


_DRY_CASES = 3
"""Cases in ``local_eligible``'s dry pass: one vector per case means a [3, in] input, so rows
flattened from a sequence ([B * T, in], T > 1) never pass for cases."""


def local_eligible(model: nn.Module, input_shape: tuple[int, ...]) -> set[int]:
    """ids of the dense variational layers that see one vector per case ([B, in], B rows, not a
    sequence [B, T, in] nor its positions flattened to [B * T, in] rows) and run once per forward:
    where local reparameterisation is exact (export/local.py). One dry pass on ``_DRY_CASES`` zero
    cases, the layers' own draws made under a forked RNG so the caller's torch RNG is untouched."""
    seen: dict[int, list[tuple[int, ...]]] = {}

    def record(mod: nn.Module, args: tuple[Any, ...]) -> None:
        seen.setdefault(id(mod), []).append(tuple(args[0].shape) if isinstance(args[0], torch.Tensor) else ())

    layers = [m for m in model.modules() if isinstance(m, VariationalLinear)]
    hooks = [m.register_forward_pre_hook(record) for m in layers]
    modes = [m._draw_mode for m in layers]
    try:
        for m in layers:
            m._draw_mode = None
        with torch.no_grad(), torch.random.fork_rng(devices=[]):
            model(torch.zeros((_DRY_CASES, *input_shape)))
    except Exception:  # the shape errors are reported by the export's own checks; here: no local draws
        return set()
    finally:
        for h in hooks:
            h.remove()
        for m, mode in zip(layers, modes):
            m._draw_mode = mode
    return {key for key, shapes in seen.items() if len(shapes) == 1 and len(shapes[0]) == 2
            and shapes[0][0] == _DRY_CASES}


def localise_entries(members: Sequence[nn.Module], entries: Sequence[nn.Module], input_shape: tuple[int, ...],
                     seed: int) -> int:
    """Stacked graphs: give every eligible dense layer among ``entries`` (where draws enter, fed by the
    draw-free part) stored local draws in place of its S weight sets; the number of layers changed.
    Why only there: on a draw-free [B, in] batch two small matmuls replace reading S weight copies;
    on draw-carrying rows [S*B, in] they would cost twice a stored set's matmul at large B."""
    gen, changed = stored_generator(seed), 0
    for member in members:
        eligible = local_eligible(member, input_shape)
        for lay in member.modules():
            mode = getattr(lay, "_draw_mode", None)
            if id(lay) in eligible and any(lay is e for e in entries) and mode is not None and mode.S > 1:
                lay._draw_mode = LocalDraws(lay, mode.S, stored=local_noise(lay, mode.S, gen))
                changed += 1
    return changed
