"""Variational Linear and Conv2d layers: a distribution over every weight.

Each layer holds, for its weight and its bias, a mean ``*_mu`` and an
unconstrained ``*_rho``; the scale is a positive function of rho, so it stays
positive without clipping. ``sigma_param`` says which:

``"softplus"``  sigma = softplus(rho) (the layers' default; checkpoints written
                before ``sigma_param`` existed use it).
``"log"``       sigma = exp(rho): rho is log sigma. Why: Adam moves a parameter
                by about its step size per step whatever the gradient's size, so
                with softplus in its linear range (sigma above ~1, where every
                radial sigma lives: sigma = spread * sqrt(d)) sigma moves by an
                absolute ~1e-3 per step, and a radial sigma of 3 hardly moves in
                a thousand steps: the trained spread is the initial one. On log
                sigma each step is a *relative* change, the same for a sigma of
                0.01 or of 5, so the ELBO, not the initialisation, sets the
                spread (tests/export/test_training.py trains from two initial
                spreads and checks that they meet).

Two posterior families share these parameters:

``"gaussian"``  mean-field: w = mu + sigma * eps, eps ~ N(0, I) elementwise.

``"radial"``    w = mu + sigma * (eps / ||eps||) * r, with eps ~ N(0, I) over the
                whole parameter tensor and r ~ N(0, 1) one scalar per draw
                (Farquhar, Osborne & Gal, "Radial Bayesian Neural Networks:
                Beyond Discrete Support in Large-Scale Bayesian Deep
                Learning", AISTATS 2020, eq. 2). The direction is uniform on
                the unit sphere and the radius is |r|, so the perturbation
                does not concentrate on the thin shell of radius sqrt(d) that
                a d-dimensional Gaussian lives on.

Initial scale: ``init_sigma`` sets sigma itself (same value for every
tensor and both families). ``init_spread``, when given, sets instead each
weight's initial posterior standard deviation, which is what a draw really
perturbs: for ``"gaussian"`` that is sigma; for ``"radial"`` one coordinate
of the unit direction has variance 1/d for a d-element tensor and E[r^2] = 1,
so each weight's spread is sigma / sqrt(d) and the layer starts at
sigma = init_spread * sqrt(d) (per tensor: weight and bias separately). With
the same ``init_sigma`` a 64x256 radial weight would otherwise start 128
times quieter per weight than a Gaussian one. ``demur train`` uses
``init_spread`` (see export/training.py for the measured default); the
parameters and the checkpoint are the same either way.

The prior is N(0, prior_scale^2) on every parameter, unless ``set_prior`` gave
the layer a prior of its own per parameter, N(m, s^2) elementwise (variational
continual learning makes the previous posterior the next prior:
``demur.export.continual``). That prior lives in non-persistent buffers: it
shapes training only and is not part of the state_dict or the bundle. ``kl()`` is the
Gaussian-to-Gaussian KL in closed form; for the radial posterior it is the
paper's estimate (section 3.1): the entropy term in closed form up to an
additive constant that does not depend on the parameters (-sum log sigma),
plus the cross-entropy to the prior by a one-draw Monte Carlo estimate.

Drop them into any torch model::

    layer = VariationalLinear(64, 10, posterior="radial", prior_scale=1.0)
    logits = layer(x)                    # one fresh draw, reparameterised
    loss = nll(logits, y) + layer.kl() / n_train
    draws = layer.draw(32)               # {"weight": [32, 10, 64], "bias": [32, 10]}

``build_model`` assembles the two demo architectures; any module built with
these layers exports (export/draws.py). ``sample_network`` gives the stacked
draws; ``forward_draws`` runs an ``nn.Sequential`` on them (tests).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any, Literal

import torch
import torch.nn.functional as F
from torch import nn

from demur.export.errors import LayerConfigError

__all__ = [
    "ARCHITECTURES",
    "POSTERIORS",
    "ResidualBlock",
    "SIGMA_PARAMS",
    "VariationalConv2d",
    "VariationalLayer",
    "VariationalLinear",
    "build_model",
    "forward_draws",
    "inverse_softplus",
    "plain_model",
    "sample_network",
    "total_kl",
    "variational_layers",
]

POSTERIORS = ("radial", "gaussian")
"""Posterior families every variational layer supports."""

SIGMA_PARAMS = ("softplus", "log")
"""How ``*_rho`` maps to sigma: softplus(rho), or exp(rho) (module docstring)."""

ARCHITECTURES = ("mlp", "conv")
"""Model kinds ``build_model`` knows."""

Posterior = Literal["radial", "gaussian"]
SigmaParam = Literal["softplus", "log"]
Draw = dict[str, torch.Tensor]

_HALF_LOG_2PI = 0.5 * math.log(2.0 * math.pi)


def inverse_softplus(sigma: float) -> float:
    """rho such that softplus(rho) == sigma (sigma > 0), stable for small sigma."""
    if sigma <= 0:
        raise LayerConfigError(f"init_sigma must be > 0; got {sigma}", field="init_sigma")
    return sigma + math.log(-math.expm1(-sigma))


class VariationalLayer(nn.Module):
    """Shared machinery: parameters, sampling, KL. Subclasses define the op.

    Parameters (all float32): ``weight_mu``/``weight_rho`` shaped like the
    deterministic layer's weight, ``bias_mu``/``bias_rho`` shaped [out].
    """

    weight_mu: nn.Parameter
    weight_rho: nn.Parameter
    bias_mu: nn.Parameter
    bias_rho: nn.Parameter

    def __init__(
        self,
        weight_shape: tuple[int, ...],
        out_features: int,
        fan_in: int,
        *,
        posterior: Posterior = "radial",
        prior_scale: float = 1.0,
        init_sigma: float = 1e-3,
        init_spread: float | None = None,
        sigma_param: SigmaParam = "softplus",
    ) -> None:
        super().__init__()
        if sigma_param not in SIGMA_PARAMS:
            raise LayerConfigError(
                f"sigma_param must be one of {list(SIGMA_PARAMS)}; got {sigma_param!r}", field="sigma_param"
            )
        self.sigma_param: SigmaParam = sigma_param
        if posterior not in POSTERIORS:
            raise LayerConfigError(
                f"posterior must be one of {list(POSTERIORS)}; got {posterior!r}", field="posterior"
            )
        if not (prior_scale > 0 and math.isfinite(prior_scale)):
            raise LayerConfigError(f"prior_scale must be a positive number; got {prior_scale}", field="prior_scale")
        self.posterior: Posterior = posterior
        self.prior_scale = float(prior_scale)
        self.init_sigma = float(init_sigma)
        # Means start like torch's own Linear/Conv2d (uniform, +-1/sqrt(fan_in));
        # sigma from init_sigma, or from init_spread (see the module docstring).
        bound = 1.0 / math.sqrt(fan_in)
        self.init_spread = None if init_spread is None else float(init_spread)
        inverse_softplus(self.init_sigma)  # validates init_sigma even when init_spread decides
        self.weight_mu = nn.Parameter(torch.empty(weight_shape).uniform_(-bound, bound))
        self.weight_rho = nn.Parameter(torch.full(weight_shape, self._initial_rho(math.prod(weight_shape))))
        self.bias_mu = nn.Parameter(torch.empty(out_features).uniform_(-bound, bound))
        self.bias_rho = nn.Parameter(torch.full((out_features,), self._initial_rho(out_features)))
        # A prior per parameter (set_prior); None: N(0, prior_scale^2). Not persistent.
        for name in ("weight_prior_mu", "weight_prior_sigma", "bias_prior_mu", "bias_prior_sigma"):
            self.register_buffer(name, None, persistent=False)

    def _initial_rho(self, d: int) -> float:
        """rho giving the initial sigma of a d-element tensor (see ``init_spread``)."""
        if self.init_spread is None:
            return self._rho_of(self.init_sigma)
        if not (self.init_spread > 0 and math.isfinite(self.init_spread)):
            raise LayerConfigError(f"init_spread must be a positive number; got {self.init_spread}",
                                   field="init_spread")
        scale = math.sqrt(d) if self.posterior == "radial" else 1.0
        return self._rho_of(self.init_spread * scale)

    def _rho_of(self, sigma: float) -> float:
        return math.log(sigma) if self.sigma_param == "log" else inverse_softplus(sigma)

    # -- distribution ---------------------------------------------------------
    def _sigma(self, rho: torch.Tensor) -> torch.Tensor:
        return torch.exp(rho) if self.sigma_param == "log" else F.softplus(rho)

    @property
    def weight_sigma(self) -> torch.Tensor:
        return self._sigma(self.weight_rho)

    @property
    def bias_sigma(self) -> torch.Tensor:
        return self._sigma(self.bias_rho)

    def spread(self) -> dict[str, torch.Tensor]:
        """Each parameter's posterior standard deviation (detached): sigma for the gaussian
        family, sigma / sqrt(d) for the radial one (a d-element tensor: one coordinate of the
        unit direction has variance 1/d and E[r^2] = 1). {"weight": [*w.shape], "bias": [out]}."""
        with torch.no_grad():
            out = {}
            for name, sigma in (("weight", self.weight_sigma), ("bias", self.bias_sigma)):
                scale = math.sqrt(sigma.numel()) if self.posterior == "radial" else 1.0
                out[name] = sigma.detach().clone() / scale
            return out

    def set_prior(self, weight_mu: torch.Tensor, weight_sigma: torch.Tensor,
                  bias_mu: torch.Tensor, bias_sigma: torch.Tensor) -> None:
        """Make the prior N(mu, sigma^2) per parameter (shapes of ``weight_mu`` / ``bias_mu``;
        sigma > 0). Used by ``demur.export.continual.posterior_as_prior``."""
        pairs = (("weight", weight_mu, weight_sigma, self.weight_mu), ("bias", bias_mu, bias_sigma, self.bias_mu))
        for name, mu, sigma, like in pairs:
            mu = torch.as_tensor(mu, dtype=like.dtype).detach().clone()
            sigma = torch.as_tensor(sigma, dtype=like.dtype).detach().clone()
            if mu.shape != like.shape or sigma.shape != like.shape:
                raise LayerConfigError(
                    f"the {name} prior must have shape {list(like.shape)}; got mean {list(mu.shape)}, "
                    f"sd {list(sigma.shape)}", field=f"{name}_prior")
            if not bool(torch.isfinite(mu).all()) or not bool((sigma > 0).all() & torch.isfinite(sigma).all()):
                raise LayerConfigError(f"the {name} prior needs finite means and sds > 0", field=f"{name}_prior")
            setattr(self, f"{name}_prior_mu", mu)
            setattr(self, f"{name}_prior_sigma", sigma)

    def _priors(self) -> tuple[tuple[Any, Any], tuple[Any, Any]]:
        """((mean, sd) of the weight prior, (mean, sd) of the bias prior): tensors, or (0, prior_scale)."""
        if self.weight_prior_mu is None:
            return (0.0, self.prior_scale), (0.0, self.prior_scale)
        return (self.weight_prior_mu, self.weight_prior_sigma), (self.bias_prior_mu, self.bias_prior_sigma)

    def _noise(self, S: int, shape: torch.Size, generator: torch.Generator | None) -> torch.Tensor:
        """Standardised perturbation [S, *shape]: Gaussian, or radial per tensor and draw."""
        eps = torch.randn((S, *shape), generator=generator, dtype=self.weight_mu.dtype)
        if self.posterior == "gaussian":
            return eps
        flat = eps.reshape(S, -1)
        direction = flat / flat.norm(dim=1, keepdim=True)
        r = torch.randn((S, 1), generator=generator, dtype=self.weight_mu.dtype)
        return (direction * r).reshape(S, *shape)

    def draw(self, S: int, generator: torch.Generator | None = None) -> Draw:
        """S weight sets: {"weight": [S, *weight.shape], "bias": [S, out]}.

        Differentiable in mu and rho (reparameterisation); wrap in
        ``torch.no_grad()`` when only the values are wanted.
        """
        if S < 1:
            raise LayerConfigError(f"number of draws must be >= 1; got {S}", field="draws")
        w = self.weight_mu + self.weight_sigma * self._noise(S, self.weight_mu.shape, generator)
        b = self.bias_mu + self.bias_sigma * self._noise(S, self.bias_mu.shape, generator)
        return {"weight": w, "bias": b}

    _draw_mode: Any = None
    """Set by ``demur.export.draws.DrawNetwork`` on its private copy: how S draws run at once."""

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        """One fresh draw shared by the batch (training, reparameterised); in a
        ``DrawNetwork``, S draws over a draw-carrying batch [S*B, ...]."""
        if self._draw_mode is not None:
            return self._draw_mode.run(self, x)
        d = self.draw(1)
        return self.forward_with(x, d["weight"][0], d["bias"][0])

    def forward_mean(self, x: torch.Tensor) -> torch.Tensor:
        """The deterministic network of the means (the "means" graph)."""
        return self.forward_with(x, self.weight_mu, self.bias_mu)

    def forward_with(self, x: torch.Tensor, weight: torch.Tensor, bias: torch.Tensor) -> torch.Tensor:
        raise NotImplementedError

    # -- KL to the prior ------------------------------------------------------
    def kl(self) -> torch.Tensor:
        """KL(q || p) in nats, summed over weight and bias (a scalar tensor).

        Prior N(m, p^2) per parameter (m = 0, p = prior_scale unless ``set_prior``).
        gaussian: closed form, sum of log(p/sigma) + (sigma^2 + (mu - m)^2) / (2 p^2) - 1/2.
        radial: -sum log sigma (the entropy term, up to a parameter-free
        constant) + (-log p(w)) at one fresh draw w (the cross-entropy term by
        Monte Carlo), Farquhar et al. 2020, section 3.1.
        """
        total = self.weight_mu.new_zeros(())
        priors = self._priors()
        if self.posterior == "gaussian":
            for (mu, sigma), (m, p) in zip(((self.weight_mu, self.weight_sigma), (self.bias_mu, self.bias_sigma)),
                                           priors):
                p = torch.as_tensor(p, dtype=mu.dtype)
                total = total + (
                    torch.log(p) - torch.log(sigma) + (sigma.square() + (mu - m).square()) / (2 * p * p) - 0.5
                ).sum()
            return total
        d = self.draw(1)
        for (sigma, w), (m, p) in zip(((self.weight_sigma, d["weight"]), (self.bias_sigma, d["bias"])), priors):
            p = torch.as_tensor(p, dtype=sigma.dtype)
            neg_entropy = -torch.log(sigma).sum()
            cross_entropy = ((w - m).square() / (2 * p * p)).sum() + (torch.log(p) + _HALF_LOG_2PI).expand_as(
                w[0]).sum()
            total = total + neg_entropy + cross_entropy
        return total


class VariationalLinear(VariationalLayer):
    """y = x W^T + b with W, b drawn from the posterior. x: [B, in], y: [B, out]."""

    def __init__(
        self,
        in_features: int,
        out_features: int,
        *,
        posterior: Posterior = "radial",
        prior_scale: float = 1.0,
        init_sigma: float = 1e-3,
        init_spread: float | None = None,
        sigma_param: SigmaParam = "softplus",
    ) -> None:
        if in_features < 1 or out_features < 1:
            raise LayerConfigError(
                f"features must be >= 1; got in={in_features}, out={out_features}", field="features"
            )
        super().__init__(
            (out_features, in_features), out_features, in_features,
            posterior=posterior, prior_scale=prior_scale, init_sigma=init_sigma,
            init_spread=init_spread, sigma_param=sigma_param,
        )
        self.in_features = int(in_features)
        self.out_features = int(out_features)

    def forward_with(self, x: torch.Tensor, weight: torch.Tensor, bias: torch.Tensor) -> torch.Tensor:
        """x: [B, in]; weight: [out, in]; bias: [out] -> [B, out]."""
        return F.linear(x, weight, bias)

    def extra_repr(self) -> str:
        return f"{self.in_features}, {self.out_features}, posterior={self.posterior}, prior_scale={self.prior_scale}"


class VariationalConv2d(VariationalLayer):
    """2-D convolution (NCHW, square kernel, no dilation/groups) with drawn weights.

    x: [B, in_c, H, W] -> [B, out_c, H', W'] with
    H' = floor((H + 2 * padding - kernel_size) / stride) + 1.
    """

    def __init__(
        self,
        in_channels: int,
        out_channels: int,
        kernel_size: int,
        *,
        stride: int = 1,
        padding: int = 0,
        posterior: Posterior = "radial",
        prior_scale: float = 1.0,
        init_sigma: float = 1e-3,
        init_spread: float | None = None,
        sigma_param: SigmaParam = "softplus",
    ) -> None:
        if min(in_channels, out_channels, kernel_size, stride) < 1 or padding < 0:
            raise LayerConfigError(
                f"conv needs positive channels/kernel/stride and padding >= 0; got in={in_channels}, "
                f"out={out_channels}, kernel={kernel_size}, stride={stride}, padding={padding}",
                field="conv",
            )
        k = int(kernel_size)
        super().__init__(
            (out_channels, in_channels, k, k), out_channels, in_channels * k * k,
            posterior=posterior, prior_scale=prior_scale, init_sigma=init_sigma,
            init_spread=init_spread, sigma_param=sigma_param,
        )
        self.in_channels = int(in_channels)
        self.out_channels = int(out_channels)
        self.kernel_size = k
        self.stride = int(stride)
        self.padding = int(padding)

    def forward_with(self, x: torch.Tensor, weight: torch.Tensor, bias: torch.Tensor) -> torch.Tensor:
        """x: [B, in_c, H, W]; weight: [out_c, in_c, k, k]; bias: [out_c]."""
        return F.conv2d(x, weight, bias, stride=self.stride, padding=self.padding)

    def output_size(self, size: int) -> int:
        """Spatial output length for an input length ``size``."""
        return (size + 2 * self.padding - self.kernel_size) // self.stride + 1

    def extra_repr(self) -> str:
        return (
            f"{self.in_channels}, {self.out_channels}, kernel_size={self.kernel_size}, stride={self.stride}, "
            f"padding={self.padding}, posterior={self.posterior}, prior_scale={self.prior_scale}"
        )


# -- whole networks -----------------------------------------------------------
class ResidualBlock(nn.Module):
    """``x -> GELU(x + BatchNorm(VariationalConv2d(x)))``, channels kept (3x3, padding 1): the
    residual block of the conv nets ``demur bench`` measures (export/bench/conv.py) and of the
    own-model tests. ``layer`` options go to the convolution (default: ``init_spread`` 0.02,
    the training default). sample_requests/own_model.py keeps a standalone copy, since a user
    copies that file alone."""

    def __init__(self, channels: int, posterior: str = "radial", **layer: Any) -> None:
        super().__init__()
        self.conv = VariationalConv2d(channels, channels, 3, padding=1, posterior=posterior,  # type: ignore[arg-type]
                                      **(layer or {"init_spread": 0.02}))
        self.bn = nn.BatchNorm2d(channels)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return F.gelu(x + self.bn(self.conv(x)))


def build_model(
    kind: str,
    input_shape: Sequence[int],
    outputs: int,
    posterior: Posterior,
    prior_scale: float = 1.0,
    hidden: Sequence[int] = (256, 256),
    channels: Sequence[int] = (16, 32),
    init_sigma: float = 1e-3,
    init_spread: float | None = None,
    sigma_param: SigmaParam = "softplus",
    input_sigma_param: SigmaParam | None = None,
) -> nn.Sequential:
    """The demo architectures of ``demur train``.

    ``"mlp"``: Flatten, then VariationalLinear + ReLU per ``hidden`` width, then
    a VariationalLinear to ``outputs``. Works for any ``input_shape``.

    ``"conv"``: for image inputs [C, H, W] (digits: [1, 8, 8]): a 3x3 conv
    (padding 1) to ``channels[0]``, then one 3x3 stride-2 conv (padding 1) per
    further entry of ``channels``, ReLU after each, Flatten, VariationalLinear
    to ``outputs``. Digits: [1,8,8] -> [16,8,8] -> [32,4,4] -> 512 -> 10.

    ``init_sigma`` / ``init_spread`` / ``sigma_param`` go to every layer (module docstring);
    ``input_sigma_param``, when given, replaces ``sigma_param`` in the first variational layer
    only (the one that sees the inputs; ``demur train --input-sigma-param``, export/training.py).
    """
    built: list[int] = []

    def kw() -> dict[str, Any]:
        first = not built
        built.append(1)
        return {"posterior": posterior, "prior_scale": prior_scale, "init_sigma": init_sigma,
                "init_spread": init_spread,
                "sigma_param": input_sigma_param if first and input_sigma_param is not None else sigma_param}

    return _assemble(
        kind, input_shape, outputs, hidden, channels,
        linear=lambda a, b: VariationalLinear(a, b, **kw()),
        conv=lambda a, b, stride: VariationalConv2d(a, b, 3, stride=stride, padding=1, **kw()),
    )


def plain_model(
    kind: str,
    input_shape: Sequence[int],
    outputs: int,
    hidden: Sequence[int] = (256, 256),
    channels: Sequence[int] = (16, 32),
) -> nn.Sequential:
    """The deterministic twin of ``build_model``: the same layers and widths with plain
    ``nn.Linear`` / ``nn.Conv2d`` (torch's default initialisation), for the baselines of
    ``demur evaluate`` ("what does the posterior buy over the same network without one")."""
    return _assemble(
        kind, input_shape, outputs, hidden, channels,
        linear=lambda a, b: nn.Linear(a, b),
        conv=lambda a, b, stride: nn.Conv2d(a, b, 3, stride=stride, padding=1),
    )


def _assemble(kind: str, input_shape: Sequence[int], outputs: int, hidden: Sequence[int],
              channels: Sequence[int], *, linear: Any, conv: Any) -> nn.Sequential:
    """The demo architectures' geometry, with the layer constructors given."""
    shape = tuple(int(d) for d in input_shape)
    if outputs < 1:
        raise LayerConfigError(f"outputs must be >= 1; got {outputs}", field="outputs")
    if kind == "mlp":
        layers: list[nn.Module] = [nn.Flatten()]
        width = math.prod(shape)
        for h in hidden:
            layers += [linear(width, int(h)), nn.ReLU()]
            width = int(h)
        layers.append(linear(width, outputs))
        return nn.Sequential(*layers)
    if kind == "conv":
        if len(shape) != 3:
            raise LayerConfigError(
                f"the conv net needs input_shape [C, H, W]; got {list(shape)}", field="input_shape"
            )
        if not channels:
            raise LayerConfigError("the conv net needs at least one channel count", field="channels")
        c, h, w = shape
        layers = []
        for i, out_c in enumerate(channels):
            stride = 1 if i == 0 else 2
            layers += [conv(c, int(out_c), stride), nn.ReLU()]
            h, w = (h + 2 - 3) // stride + 1, (w + 2 - 3) // stride + 1
            c = int(out_c)
        layers += [nn.Flatten(), linear(c * h * w, outputs)]
        return nn.Sequential(*layers)
    raise LayerConfigError(f"arch must be one of {list(ARCHITECTURES)}; got {kind!r}", field="arch")


def variational_layers(model: nn.Module) -> list[VariationalLayer]:
    """The variational layers of ``model`` in module (registration) order."""
    return [m for m in model.modules() if isinstance(m, VariationalLayer)]


def total_kl(model: nn.Module) -> torch.Tensor:
    """Sum of every variational layer's ``kl()`` (nats, scalar tensor)."""
    layers = variational_layers(model)
    if not layers:
        raise LayerConfigError("model has no variational layers", field="model")
    return torch.stack([layer.kl() for layer in layers]).sum()


@torch.no_grad()
def sample_network(model: nn.Module, S: int, generator: torch.Generator | None = None) -> list[Draw]:
    """S weight sets for the whole network: one ``draw`` dict per variational layer, in order.

    Draws are detached. With the same seeded ``generator`` the result repeats.
    """
    return [layer.draw(S, generator) for layer in variational_layers(model)]


@torch.no_grad()
def forward_draws(model: nn.Sequential, x: torch.Tensor, draws: Sequence[Draw]) -> torch.Tensor:
    """The torch reference output for given draws: float32[S, B, K].

    ``x``: [B, *input_shape] already standardised; ``draws`` from
    ``sample_network`` (one dict per variational layer, each with S sets).
    Only ``nn.Sequential`` chains of variational layers and parameter-free
    modules; ``demur.export.draws.reference_draws`` is the reference for any module.
    """
    layers = variational_layers(model)
    if len(draws) != len(layers):
        raise LayerConfigError(
            f"need one draw dict per variational layer ({len(layers)}); got {len(draws)}", field="draws"
        )
    S = int(draws[0]["weight"].shape[0])
    outs = []
    for s in range(S):
        h, i = x, 0
        for module in model:
            if isinstance(module, VariationalLayer):
                h = module.forward_with(h, draws[i]["weight"][s], draws[i]["bias"][s])
                i += 1
            else:
                h = module(h)
        outs.append(h)
    return torch.stack(outs)
