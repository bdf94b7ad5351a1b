"""S draws of any torch module in one forward pass: the batch carries the draws.

Why: a bundle's graphs return ``draws`` float32[S, B, K]. Rather than
rewriting a user's network op by op (the old ``onnx.helper`` builder knew
five module types), ``DrawNetwork`` runs the user's own module, with its own
``forward``, on a batch of ``S * B`` rows, draw-major (row ``s * B + b`` is
case ``b`` under draw ``s``). Only the layers that differ between draws act
on the draw axis:

* ``VariationalLinear`` applies draw ``s``'s weights to rows ``s * B ..``:
  one batched matmul ``[S, B, in] @ [S, in, out]``;
* ``VariationalConv2d`` folds the draws into channels, ``[B, S * C, H, W]``,
  and runs one grouped convolution (``groups = S``) over S weight sets;
* ``nn.Dropout`` / ``nn.Dropout2d`` (MC dropout, Gal & Ghahramani, ICML 2016)
  multiply rows of draw ``s`` by mask ``s``, one mask per draw shared by the
  cases of a request (a draw is one sampled network).

Every other layer is untouched and sees an ordinary batch: pooling, GELU,
residual additions, deterministic ``nn.Linear``/``nn.Conv2d``, layer norm,
and batch norm, which in eval mode normalises each row with its stored
running statistics, so it is per-row and safe over ``S * B`` rows. (Batch
norm in training mode, or any layer that mixes rows of a batch, would mix
draws; the parity check in export/exporter.py refuses such an export.)

Where the draws come from, per graph kind:

``stacked``  S weight sets drawn at export (``sample_network`` with the seed)
             and S dropout masks, stored as constants; where draws enter a
             dense layer (fed by the draw-free part), S output noises instead
             of S weight sets (local reparameterisation, export/local.py).
``sampler``  fresh every call, from noise the engine feeds as graph inputs
             (serve/adapters/engine.py, "Noise fed by the engine"): per
             variational layer ``normals.L{i}.weight`` [S, *w],
             ``normals.L{i}.bias`` [S, out] and, radial, ``normals.L{i}.radius``
             [S, 2]; per dropout layer ``uniforms.D{j}`` [S, 1, *mask shape]
             (keep where u > p, u uniform on (0, 1]). A dense layer that sees
             one vector per case draws its outputs instead (``LocalDraws``,
             export/local.py; exact per case).
``flip``     fresh Flipout draws (export/flip.py), noise fed the same way;
             dense layers as in the sampler (local: exact and cheaper than
             Flipout's base).
``means``    one draw: the posterior means, dropout off (identity); for an
             ensemble, the members' averaged prediction.

A list of modules is a deep ensemble (Lakshminarayanan, Pritzel & Blundell,
NeurIPS 2017), always stacked. Members without variational layers give one
draw each (S = M). Members with variational layers give ``S // M`` stored
draws each from their own posterior (at least one; S = M * (S // M)), so the
served predictive is the equal-weight mixture of the members' posteriors (a
mixture of variational posteriors, as in Wilson & Izmailov, NeurIPS 2020,
"multi-SWAG": each member's own spread plus the spread between members).
Draws are member-major: draws ``m * P .. (m + 1) * P - 1`` are member m's.

``reference_draws`` is the torch reference the exporter checks every graph
against: it runs the user's module once per draw on the B cases with plain
per-draw weights (``forward_with``) and masks, so it shares none of the
``S * B`` folding above.
"""

from __future__ import annotations

import copy
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

from demur.serve.core.bundle import GRAPH_KINDS
from demur.serve.core.noise import noise_dof, noise_law

from demur.export.errors import GraphBuildError
from demur.export.layers import VariationalConv2d, VariationalLayer, VariationalLinear, sample_network
from demur.export.pooling import fixed_window_pools
from demur.export.shared import NotShareable, SharedPlan, plan_shared

__all__ = [
    "DRAW_KINDS",
    "FAMILIES",
    "DrawNetwork",
    "DropoutDraws",
    "Feed",
    "NoiseInput",
    "apply_draws",
    "draw_noise",
    "reference_draws",
    "static_shape",
]

DRAW_KINDS = GRAPH_KINDS
"""Graph kinds a ``DrawNetwork`` can run."""

FAMILIES = ("gaussian", "radial", "ensemble", "mc_dropout")
"""What a bundle's set of draws is (the manifest's ``posterior.family``)."""

_DROPOUTS = (nn.Dropout, nn.Dropout2d)

SHARED_TOLERANCE = 1e-4
"""Largest relative difference (to max(|value|, 1)) between the shared and the per-draw forward in
torch before the shared one is used: the exporter's parity tolerance."""


@dataclass(frozen=True)
class NoiseInput:
    """One graph input the engine fills per call; its law is the name's part before the first dot."""

    name: str
    shape: tuple[int, ...]

    @property
    def law(self) -> str:
        return noise_law(self.name)


class Feed:
    """The noise values of the current forward pass, by input name (shared by every draw mode)."""

    def __init__(self) -> None:
        self.values: dict[str, torch.Tensor] = {}

    def __getitem__(self, name: str) -> torch.Tensor:
        return self.values[name]


def draw_noise(inputs: Sequence[NoiseInput], rng: np.random.Generator) -> dict[str, np.ndarray]:
    """Values for ``inputs`` by the engine's laws (signs +-1, normals N(0, 1), uniforms on (0, 1],
    chi-square with the name's degrees of freedom)."""
    out = {}
    for spec in inputs:
        if spec.law == "chisquare":
            out[spec.name] = rng.chisquare(noise_dof(spec.name), spec.shape).astype(np.float32)
        elif spec.law == "signs":
            out[spec.name] = np.where(rng.integers(0, 2, spec.shape) == 1, 1.0, -1.0).astype(np.float32)
        elif spec.law == "normals":
            out[spec.name] = rng.standard_normal(spec.shape).astype(np.float32)
        else:
            out[spec.name] = (1.0 - rng.random(spec.shape)).astype(np.float32)
    return out


# -- applying S weight sets to a draw-carrying batch --------------------------------------
def static_shape(dims: Sequence[Any]) -> tuple[int, ...]:
    """``dims`` as Python ints, for the per-case dimensions (every one but the batch, fixed by
    ``inputs.shape``). Why: reshapes written with ints trace to one Reshape of a constant shape;
    ``unflatten``/``flatten`` on traced sizes trace to Shape/Gather/Slice/Concat chains around every
    layer, which cost the stacked MLP graph ~30% of its CPU time per one-case call (demur bench)."""
    return tuple(int(d) for d in dims)


def apply_draws(layer: VariationalLayer, x: torch.Tensor, weight: torch.Tensor, bias: torch.Tensor,
                S: int) -> torch.Tensor:
    """Draw s's weights on rows s*B..(s+1)*B-1 of ``x`` [S*B, ...]; weight [S, *w], bias [S, out]."""
    if isinstance(layer, VariationalConv2d):
        c, h, w = static_shape(x.shape[1:])
        xs = x.reshape(S, -1, c, h, w).transpose(0, 1).reshape(-1, S * c, h, w)   # [B, S*C, H, W]
        y = F.conv2d(xs, weight.flatten(0, 1), bias.flatten(), stride=layer.stride, padding=layer.padding,
                     groups=S)
        h, w = static_shape(y.shape[2:])
        return y.reshape(-1, S, layer.out_channels, h, w).transpose(0, 1).reshape(-1, layer.out_channels, h, w)
    if isinstance(layer, VariationalLinear):
        return _linear_draws(layer, x, weight.transpose(1, 2), bias, S)
    raise GraphBuildError(f"{type(layer).__name__} is a variational layer demur cannot export (only "
                          "VariationalLinear and VariationalConv2d)", field="model")


def _linear_draws(layer: VariationalLinear, x: torch.Tensor, weight_t: torch.Tensor, bias: torch.Tensor,
                  S: int) -> torch.Tensor:
    """x [S*B, ..., in]; weight_t [S, in, out] (transposed); bias [S, out] -> [S*B, ..., out]."""
    xs = x.reshape(S, -1, layer.in_features)                                 # [S, B * ..., in]
    y = torch.matmul(xs, weight_t) + bias.reshape(S, 1, layer.out_features)
    return y.reshape(-1, *static_shape(x.shape[1:-1]), layer.out_features)


class _Mode:
    """How one variational layer makes its S draws. ``weights`` gives them as [S, *w], [S, out]
    (the reference uses those); ``run`` applies them to a draw-carrying batch."""

    noise: tuple[NoiseInput, ...] = ()
    S: int = 1
    entering = False
    """Set by export/shared.py while the layer is called on a draw-free batch [B, ...] (where draws
    enter); a mode with ``run_plain`` then takes that batch as it is."""

    def weights(self, layer: VariationalLayer) -> tuple[torch.Tensor, torch.Tensor]:
        raise NotImplementedError

    def run(self, layer: VariationalLayer, x: torch.Tensor) -> torch.Tensor:
        w, b = self.weights(layer)
        return apply_draws(layer, x, w, b, self.S)

    def per_draw(self, layer: VariationalLayer) -> list[_Mode]:
        """S one-draw modes on an ordinary batch, the draws this mode makes (the torch reference)."""
        w, b = self.weights(layer)
        return [_Single(w[s], b[s]) for s in range(self.S)]


def _plain_draws(layer: VariationalLayer, x: torch.Tensor, w_cat: torch.Tensor, b_cat: torch.Tensor,
                 S: int) -> torch.Tensor:
    """S weight sets on a draw-free batch x [B, ...] -> [S*B, ...] draw-major, as ONE matmul or
    convolution with the sets side by side (``w_cat``: linear [in, S*out], conv [S*out, in, k, k];
    ``b_cat`` [S*out]): each weight is read once, and x is never repeated S times."""
    if isinstance(layer, VariationalConv2d):
        y = F.conv2d(x, w_cat, b_cat, stride=layer.stride, padding=layer.padding)     # [B, S*out, H, W]
        h, w = static_shape(y.shape[2:])
        return y.reshape(-1, S, layer.out_channels, h, w).transpose(0, 1).reshape(-1, layer.out_channels, h, w)
    assert isinstance(layer, VariationalLinear)
    case = static_shape(x.shape[1:-1])
    y = torch.matmul(x, w_cat) + b_cat                                                # [B, ..., S*out]
    y = y.reshape(-1, S, layer.out_features).transpose(0, 1)                          # [S, B*..., out]
    return y.reshape(-1, *case, layer.out_features)


class _Fixed(_Mode):
    """Stored weight sets (stacked draws, or the means with S = 1)."""

    def __init__(self, weight: torch.Tensor, bias: torch.Tensor) -> None:
        self.w, self.b = weight.detach().float(), bias.detach().float()
        self.S = int(self.w.shape[0])
        # stored in the layout the matmul reads, so the graph holds no per-call transpose of S weight sets
        self.w_t = self.w.transpose(1, 2).contiguous() if self.w.dim() == 3 else None

    def weights(self, layer: VariationalLayer) -> tuple[torch.Tensor, torch.Tensor]:
        return self.w, self.b

    def run(self, layer: VariationalLayer, x: torch.Tensor) -> torch.Tensor:
        if self.entering:
            return self.run_plain(layer, x)
        if isinstance(layer, VariationalLinear) and self.w_t is not None:
            return _linear_draws(layer, x, self.w_t, self.b, self.S)
        return apply_draws(layer, x, self.w, self.b, self.S)

    def run_plain(self, layer: VariationalLayer, x: torch.Tensor) -> torch.Tensor:
        """The S stored sets on a draw-free batch [B, ...] (export/shared.py calls it where draws enter)."""
        if not hasattr(self, "_cat"):   # built once, stored as the graph's constant in the layout it reads
            if isinstance(layer, VariationalLinear):
                w_cat = self.w_t.permute(1, 0, 2).reshape(layer.in_features, -1).contiguous()
            else:
                w_cat = self.w.flatten(0, 1).contiguous()
            self._cat = (w_cat, self.b.flatten().contiguous())
        return _plain_draws(layer, x, *self._cat, self.S)


class _Fresh(_Mode):
    """Fresh weights per call from fed normals: w = mu + sigma * eps (gaussian) or
    mu + sigma * (eps / ||eps||) * r (radial, Farquhar et al. 2020, eq. 2), as ``VariationalLayer.draw``."""

    def __init__(self, feed: Feed, index: int, layer: VariationalLayer, S: int) -> None:
        self.feed, self.S, self.radial = feed, S, layer.posterior == "radial"
        stem = f"normals.L{index}"
        self.names = (f"{stem}.weight", f"{stem}.bias", f"{stem}.radius")
        specs = [NoiseInput(self.names[0], (S, *layer.weight_mu.shape)), NoiseInput(self.names[1], (S, layer.bias_mu.numel()))]
        if self.radial:
            specs.append(NoiseInput(self.names[2], (S, 2)))
        self.noise = tuple(specs)
        with torch.no_grad():
            self.mu = (layer.weight_mu.detach().clone(), layer.bias_mu.detach().clone())
            self.sigma = (layer.weight_sigma.detach().clone(), layer.bias_sigma.detach().clone())

    def weights(self, layer: VariationalLayer) -> tuple[torch.Tensor, torch.Tensor]:
        out = []
        for part in (0, 1):
            eps = self.feed[self.names[part]]
            if self.radial:
                flat = eps.flatten(1)
                r = self.feed[self.names[2]][:, part:part + 1]
                eps = (flat / torch.linalg.vector_norm(flat, dim=1, keepdim=True) * r).reshape(eps.shape)
            out.append(self.mu[part] + self.sigma[part] * eps)
        return out[0], out[1]


    def run(self, layer: VariationalLayer, x: torch.Tensor) -> torch.Tensor:
        if self.entering:
            return self.run_plain(layer, x)
        return super().run(layer, x)

    def run_plain(self, layer: VariationalLayer, x: torch.Tensor) -> torch.Tensor:
        """This call's S weight sets on a draw-free batch [B, ...], side by side in one matmul/conv."""
        w, b = self.weights(layer)
        w_cat = w.permute(2, 0, 1).reshape(w.shape[2], -1) if isinstance(layer, VariationalLinear) else w.flatten(0, 1)
        return _plain_draws(layer, x, w_cat, b.flatten(), self.S)


class _Single(_Mode):
    """One weight set on an ordinary batch (the torch reference)."""

    def __init__(self, weight: torch.Tensor, bias: torch.Tensor) -> None:
        self.w, self.b = weight, bias

    def run(self, layer: VariationalLayer, x: torch.Tensor) -> torch.Tensor:
        return layer.forward_with(x, self.w, self.b)


class DropoutDraws(nn.Module):
    """Stands in for an ``nn.Dropout``/``nn.Dropout2d``: mask s on the rows of draw s.

    ``masks`` [S, 1, *mask shape] (stacked), or fed ``uniforms.D{j}`` (sampler);
    ``single`` set by the reference: one mask on an ordinary batch."""

    def __init__(self, p: float, S: int, mask_shape: tuple[int, ...], feed: Feed, name: str,
                 masks: torch.Tensor | None) -> None:
        super().__init__()
        self.p, self.S, self.feed, self.name = float(p), S, feed, name
        self.mask_shape, self.masks = mask_shape, masks
        self.single: torch.Tensor | None = None
        self.noise = () if masks is not None else (NoiseInput(name, (S, 1, *mask_shape)),)

    def all_masks(self) -> torch.Tensor:
        if self.masks is not None:
            return self.masks
        return (self.feed[self.name] > self.p).to(torch.float32) / (1.0 - self.p)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if self.single is not None:
            return x * self.single[0]
        return (x.unflatten(0, (self.S, -1)) * self.all_masks()).flatten(0, 1)


# -- the network ----------------------------------------------------------------------------
class DrawNetwork(nn.Module):
    """A user's module (or list of modules) running S draws per pass: ``forward(x, *noise)`` with
    x float32[B, *input_shape] (standardised) returns float32[S, B, K].

    ``noise`` lists the inputs after ``x`` in order. The user's module is deep-copied and put
    in eval mode; the original is left alone. ``shared`` (default): the draw-free part runs once
    per call (export/shared.py; ``computation`` says how the graph computes, ``fell_back`` if the
    forward could not be shared); False: the whole network once per draw. ``flip_rank``: the
    flip graph's base rank (export/flip.py; ``FULL_RANK`` for a full-rank base).

    Example::

        net = DrawNetwork(model, "sampler", 32, seed=0, input_shape=(1, 8, 8), task="classification")
        feed = draw_noise(net.noise, np.random.default_rng(0))
        draws = net(x, *[torch.from_numpy(feed[n.name]) for n in net.noise])   # [32, B, 10]
    """

    def __init__(self, model: nn.Module | Sequence[nn.Module], kind: str, draws: int, *, seed: int,
                 input_shape: Sequence[int], task: str = "classification", shared: bool = True,
                 flip_rank: int | None = None) -> None:
        super().__init__()
        if kind not in DRAW_KINDS:
            raise GraphBuildError(f"kind must be one of {', '.join(DRAW_KINDS)}; got '{kind}'", field="kind")
        self.kind, self.task, self.feed, self.seed = kind, task, Feed(), int(seed)
        self.flip_rank = flip_rank  # the flip graph's base rank (export/flip.py); None: its default
        self.input_shape = tuple(int(d) for d in input_shape)
        self.ensemble = isinstance(model, (list, tuple, nn.ModuleList))
        members = [_as_module(m, i) for i, m in enumerate(model)] if self.ensemble else [_as_module(model, None)]
        if self.ensemble and len(members) < 2:
            raise GraphBuildError(f"a deep ensemble needs at least 2 members; got {len(members)}", field="model")
        # one deepcopy of all members, so a module they share (a frozen backbone) stays one object
        self.members = nn.ModuleList(m.eval() for m in copy.deepcopy(members))
        for m in self.members:  # adaptive pools the ONNX exporter can write after draws (export/pooling.py)
            fixed_window_pools(m)
        self.layers = [lay for m in self.members for lay in m.modules() if isinstance(lay, VariationalLayer)]
        self.family = self._family()
        if int(draws) < 1:
            raise GraphBuildError(f"draws must be a positive integer; got {draws}", field="draws")
        self.member_layers = [[lay for lay in m.modules() if isinstance(lay, VariationalLayer)]
                              for m in self.members]
        self.per_member = (max(1, int(draws) // len(self.members))
                           if self.ensemble and self.layers and kind != "means" else 1)
        self.S = (1 if kind == "means" else len(self.members) * self.per_member if self.ensemble
                  else int(draws))
        self.dropouts: list[DropoutDraws] = []
        if self.ensemble:
            if kind not in ("stacked", "means"):
                raise GraphBuildError(f"a deep ensemble has fixed draws per member: export it as 'stacked'; "
                                      f"got '{kind}'", field="kind")
            self._set_member_modes(kind, int(seed))
        else:
            self._set_modes(kind, int(seed))
        self.noise: tuple[NoiseInput, ...] = tuple(
            n for part in [*(lay._draw_mode for lay in self.layers), *self.dropouts] for n in part.noise)
        self.eval()
        self._plan: SharedPlan | None = None
        self.computation = "one pass (the posterior means)" if self.S == 1 and not self.ensemble else ""
        """How the graph computes (the manifest's ``graphs.<kind>.computation``): shared, or per
        draw with the reason the shared forward was not used."""
        self.fell_back = False
        if shared and not self.computation:
            self._share()
        elif not self.computation:
            self.computation = "per draw: shared computation switched off"
        local = [name for m in self.members for name, lay in m.named_modules()
                 if type(getattr(lay, "_draw_mode", None)).__name__ == "LocalDraws"]
        if local:
            self.computation += f"; local reparameterisation (draws made in the outputs) at {', '.join(local)}"

    # -- construction ---------------------------------------------------------------------
    def _family(self) -> str:
        if self.ensemble:
            return "ensemble"
        families = {lay.posterior for lay in self.layers}
        if len(families) > 1:
            raise GraphBuildError(f"the model mixes posterior families {sorted(families)}; demur exports one "
                                  "family per model", field="model")
        if families:
            return families.pop()
        if any(isinstance(m, _DROPOUTS) for m in self.members[0].modules()):
            return "mc_dropout"
        raise GraphBuildError(
            "the model has no variational layers and no dropout, so every draw would be the same network: use "
            "demur's VariationalLinear/VariationalConv2d, nn.Dropout (MC dropout), or pass a list of modules "
            "(a deep ensemble)", field="model")

    def member_families(self) -> list[str]:
        """The posterior families inside an ensemble's variational members (empty: plain members)."""
        return sorted({lay.posterior for lay in self.layers})

    def _set_member_modes(self, kind: str, seed: int) -> None:
        """Each member's ``per_member`` stored draws from its own posterior (one generator, seeded,
        member after member); the means graph runs every member at its posterior means."""
        gen = torch.Generator().manual_seed(seed)
        for member, layers in zip(self.members, self.member_layers):
            sets = sample_network(member, self.per_member, gen) if layers and kind == "stacked" else None
            for i, lay in enumerate(layers):
                lay._draw_mode = (_Fixed(sets[i]["weight"], sets[i]["bias"]) if sets is not None
                                  else _Fixed(lay.weight_mu[None], lay.bias_mu[None]))

    def _set_modes(self, kind: str, seed: int) -> None:
        from demur.export.flip import FlipDraws
        from demur.export.local import LocalDraws, local_eligible

        S, model = self.S, self.members[0]
        if kind == "stacked" and self.layers:
            sets = sample_network(model, S, torch.Generator().manual_seed(seed))
        local = local_eligible(model, self.input_shape) if kind in ("sampler", "flip") and self.layers else set()
        for i, lay in enumerate(self.layers):
            if id(lay) in local:
                assert isinstance(lay, VariationalLinear)
                lay._draw_mode = LocalDraws(lay, S, feed=self.feed, index=i)
            elif kind == "means":
                lay._draw_mode = _Fixed(lay.weight_mu[None], lay.bias_mu[None])
            elif kind == "stacked":
                lay._draw_mode = _Fixed(sets[i]["weight"], sets[i]["bias"])
            elif kind == "sampler":
                lay._draw_mode = _Fresh(self.feed, i, lay, S)
            else:
                lay._draw_mode = (FlipDraws(self.feed, i, lay, S) if self.flip_rank is None
                                  else FlipDraws(self.feed, i, lay, S, rank=self.flip_rank))
        if self.family != "mc_dropout" or kind == "means":
            return  # dropout in a variational network (or in the means graph) stays off: eval mode
        if kind == "flip":
            raise GraphBuildError("the flip graph perturbs variational layers; this model has none (MC dropout): "
                                  "export it as 'sampler' (fresh masks per call) or 'stacked'", field="kind")
        shapes = _dropout_input_shapes(model, self.input_shape)
        masks_gen = torch.Generator().manual_seed(seed + 1)
        for j, (parent, attr, drop) in enumerate(_dropout_slots(model)):
            shape = shapes[drop]
            mask_shape = shape if isinstance(drop, nn.Dropout) else (shape[0], *[1] * (len(shape) - 1))
            if not 0.0 <= drop.p < 1.0:
                raise GraphBuildError(f"dropout {attr} has p = {drop.p}; MC dropout needs 0 <= p < 1", field="model")
            masks = None
            if kind == "stacked":
                masks = (torch.rand((S, 1, *mask_shape), generator=masks_gen) >= drop.p).float() / (1.0 - drop.p)
            sub = DropoutDraws(drop.p, S, mask_shape, self.feed, f"uniforms.D{j}", masks)
            setattr(parent, attr, sub)
            self.dropouts.append(sub)

    def _is_source(self, module: nn.Module) -> bool:
        """Does ``module`` make S > 1 draws (a variational layer or MC dropout in this graph)?"""
        if isinstance(module, DropoutDraws):
            return module.S > 1
        mode = getattr(module, "_draw_mode", None)
        return isinstance(module, VariationalLayer) and mode is not None and mode.S > 1

    def _share(self) -> None:
        """Plan the shared computation (export/shared.py) and check it against the per-draw forward
        in torch on two random cases and random noise; on any refusal run per draw and say why."""
        try:
            self._plan = plan_shared(list(self.members), self._is_source)
            gen = torch.Generator().manual_seed(0)
            x = torch.randn((2, *self.input_shape), generator=gen)
            noise = [torch.from_numpy(v) for v in draw_noise(self.noise, np.random.default_rng(0)).values()]
            with torch.no_grad():
                got = self(x, *noise)
                plan, self._plan = self._plan, None
                want = self(x, *noise)
                self._plan = plan
            rel = float(((got - want).abs() / want.abs().clamp_min(1.0)).max()) if want.numel() else 0.0
            if got.shape != want.shape or not rel <= SHARED_TOLERANCE:
                raise NotShareable(f"the shared forward differs from the per-draw forward (largest relative "
                                   f"difference {rel:.3g}); the forward may mix the cases of a batch")
            self.computation = plan.describe()
            if self.kind == "stacked":
                self._localise_entries(plan)
        except NotShareable as exc:
            self.fall_back(str(exc))
        except Exception as exc:  # the user's forward raised on the shared path: today's path still works
            first = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
            self.fall_back(f"the shared forward raised {type(exc).__name__}: {first}")

    @property
    def shared(self) -> bool:
        """Does the forward run with shared computation (export/shared.py)?"""
        return self._plan is not None

    def fall_back(self, reason: str) -> None:
        """Run the whole network once per draw from now on, and say why (``computation``)."""
        self._plan, self.fell_back = None, True
        self.computation = f"per draw (the whole network runs S times): {reason}"

    def _localise_entries(self, plan: SharedPlan) -> None:
        """Stacked: output noise instead of S weight sets where draws enter a dense layer (export/local.py)."""
        from demur.export.local import localise_entries

        localise_entries(self.members, plan.entry_layers, self.input_shape, self.seed)

    def train(self, mode: bool = True) -> DrawNetwork:
        """Always eval: batch norm must use its running statistics (per row, so draws never mix),
        and ``torch.onnx.export`` restores the mode it found after exporting."""
        return super().train(False)

    # -- running ----------------------------------------------------------------------------
    def forward(self, x: torch.Tensor, *noise: torch.Tensor) -> torch.Tensor:
        self.feed.values = {spec.name: value for spec, value in zip(self.noise, noise)}
        if self._plan is not None:
            fan = self.per_member if self.ensemble else self.S
            ys = self._plan.run(x, fan)
            for y in ys:
                _check_output(y)
            out = torch.cat([y.reshape(fan, -1, *static_shape(y.shape[1:])) for y in ys])
            return _ensemble_mean(out, self.task) if self.ensemble and self.kind == "means" else out
        if self.ensemble:
            P = self.per_member
            xs = x if P == 1 else x.repeat(P, *[1] * (x.dim() - 1))                 # [P*B, ...], draw-major
            outs = []
            for member in self.members:
                y = member(xs)
                _check_output(y)
                outs.append(y.reshape(P, -1, int(y.shape[-1])))  # int sizes: one constant-shape Reshape
            out = torch.cat(outs)                                                   # [M*P, B, K]
            return _ensemble_mean(out, self.task) if self.kind == "means" else out
        xs = x if self.S == 1 else x.repeat(self.S, *[1] * (x.dim() - 1))   # [S*B, ...], draw-major
        y = self.members[0](xs)
        _check_output(y)
        return y.reshape(self.S, -1, *static_shape(y.shape[1:]))

    def parameter_count(self) -> int:
        """Variational parameters (weights + biases, each with a mu and a sigma), else all parameters."""
        if self.layers and not self.ensemble:
            return int(sum(lay.weight_mu.numel() + lay.bias_mu.numel() for lay in self.layers))
        return int(sum(p.numel() for p in self.members.parameters()))


def _as_module(m: Any, index: int | None) -> nn.Module:
    if not isinstance(m, nn.Module):
        where = "model" if index is None else f"model[{index}]"
        raise GraphBuildError(f"{where} must be a torch.nn.Module; got {type(m).__name__}", field=where)
    return m


def _check_output(y: Any) -> None:
    if not isinstance(y, torch.Tensor) or y.dim() != 2:
        got = f"shape {list(y.shape)}" if isinstance(y, torch.Tensor) else type(y).__name__
        raise GraphBuildError(f"the model must return one tensor [B, K] per batch; got {got}", field="model")


def _ensemble_mean(out: torch.Tensor, task: str) -> torch.Tensor:
    """[M, B, K] -> [1, B, K]: log of the mean softmax (classification) or the moment-matched
    (mean, log-variance) of the members' Gaussians (regression)."""
    M = out.shape[0]
    if task == "classification":
        return (torch.logsumexp(torch.log_softmax(out, dim=-1), dim=0) - math.log(M))[None]
    mean, var = out[..., 0], out[..., 1].exp()
    mu = mean.mean(0)
    total = (var + mean.square()).mean(0) - mu.square()
    return torch.stack([mu, torch.log(total.clamp_min(1e-30))], dim=-1)[None]


def _dropout_slots(model: nn.Module) -> list[tuple[nn.Module, str, nn.Module]]:
    """(parent, attribute, dropout module) for every dropout layer, in module order."""
    slots = []
    for parent in model.modules():
        for attr, child in parent.named_children():
            if isinstance(child, _DROPOUTS):
                slots.append((parent, attr, child))
            elif isinstance(child, nn.modules.dropout._DropoutNd):
                raise GraphBuildError(f"{type(child).__name__} has no MC-dropout form in demur (nn.Dropout and "
                                      "nn.Dropout2d do)", field="model")
    return slots


def _dropout_input_shapes(model: nn.Module, input_shape: tuple[int, ...]) -> dict[nn.Module, tuple[int, ...]]:
    """Each dropout's input shape per case, recorded by one eval pass on two zero cases."""
    shapes: dict[nn.Module, tuple[int, ...]] = {}

    def record(mod: nn.Module, args: tuple[Any, ...]) -> None:  # a pre-hook's return value would replace args
        shapes.setdefault(mod, tuple(args[0].shape[1:]))

    hooks = [m.register_forward_pre_hook(record) for m in model.modules() if isinstance(m, _DROPOUTS)]
    try:
        with torch.no_grad():
            model(torch.zeros((2, *input_shape)))
    except Exception as exc:  # whatever the user's forward raises on the declared shape
        raise GraphBuildError(f"the model does not accept inputs of shape [B, {', '.join(map(str, input_shape))}] "
                              f"(inputs.shape): {type(exc).__name__}: {exc}", field="inputs.shape") from exc
    finally:
        for h in hooks:
            h.remove()
    return shapes


@torch.no_grad()
def reference_draws(net: DrawNetwork, x: torch.Tensor, noise: dict[str, np.ndarray]) -> torch.Tensor:
    """The torch reference float32[S, B, K]: the user's module once per draw on ``x`` [B, ...]
    with that draw's plain weights and mask, the same draws the graph makes from ``noise``."""
    net.feed.values = {k: torch.from_numpy(v) for k, v in noise.items()}
    if net.ensemble:
        out = torch.stack([y for member, layers in zip(net.members, net.member_layers)
                           for y in _member_draws(member, layers, net.per_member, x)])
        return _ensemble_mean(out, net.task) if net.kind == "means" else out
    modes = [lay._draw_mode for lay in net.layers]
    singles = [mode.per_draw(lay) for mode, lay in zip(modes, net.layers)]
    masks = [d.all_masks() for d in net.dropouts]
    outs = []
    try:
        for s in range(net.S):
            for lay, one in zip(net.layers, singles):
                lay._draw_mode = one[s]
            for drop, m in zip(net.dropouts, masks):
                drop.single = m[s]
            outs.append(net.members[0](x))
    finally:
        for lay, mode in zip(net.layers, modes):
            lay._draw_mode = mode
        for drop in net.dropouts:
            drop.single = None
    return torch.stack(outs)


def _member_draws(member: nn.Module, layers: list[VariationalLayer], P: int, x: torch.Tensor) -> list[torch.Tensor]:
    """One ensemble member run once per stored draw with that draw's plain weights: P x [B, K]."""
    modes = [lay._draw_mode for lay in layers]
    singles = [mode.per_draw(lay) for mode, lay in zip(modes, layers)]
    outs = []
    try:
        for p in range(P):
            for lay, one in zip(layers, singles):
                lay._draw_mode = one[p]
            outs.append(member(x))
    finally:
        for lay, mode in zip(layers, modes):
            lay._draw_mode = mode
    return outs
