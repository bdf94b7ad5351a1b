"""The "flip" draws: fresh weight draws on every call at close to stacked-draws cost.

(Dense layers that see one vector per case do not use this module in a flip graph: they draw
their outputs by local reparameterisation, export/local.py, exact per case and cheaper than a
base of one normal per weight. Convolutions, and dense layers on sequences, use Flipout.)

Where draws enter a convolution (its input is draw-free, a [B, ...] batch: export/shared.py),
the layer builds its S weight sets ``W_s = mu + D * (c_s a_s^T)`` from the call's base and signs
(``BUILT_WEIGHTS_MAX``) and runs one convolution of the batch with the S sets side by side, as
stacked draws do, instead of repeating the batch S times through the two convolutions of the
identity below. The law is the same draw for draw (these are the weights ``FlipDraws.weights``
gives the reference). Measured (S = 32, B = 1, one onnxruntime thread, flip over stacked, engine
runs side by side): the 2k-parameter conv net of ``demur bench`` 2.4x -> 1.5-2.1x, the 86k-parameter
one 1.85x either way; the day's full ``demur bench`` run gave 2.8x and 2.0x (README, "Performance").
Built weights on draw-carrying layers too (a grouped convolution) made the 86k-parameter net
slower (2.0x): building S x 9,216 weights costs more than the second convolution at 4x4 pixels.

Why: stacked draws are fast but replay the same S weight sets forever and
store S copies of the weights; the sampler draws S fresh weight tensors per
call (S x the parameter count in fed normals). Flipout draws fresh
perturbations per call but never materialises a weight tensor per draw.

How (Flipout, Wen, Vicol, Ba, Tran & Grosse, ICLR 2018, eq. 4). For a linear
layer with posterior mean ``mu`` [out, in] and a base perturbation ``D``
[out, in], draw s gets random sign vectors ``a_s`` [in] and ``c_s`` [out] and
uses the weight ``W_s = mu + D * (c_s a_s^T)``. Its output is::

    y_s = x_s @ mu^T + ((x_s * a_s) @ D^T) * c_s + b_s

two matmuls over all S draws at once (rows of the draw-carrying batch,
export/draws.py), one weight matrix each. The bias draw ``b_s = b_mu + d * c_s``
reuses the output signs. A convolution is linear in its weight, so the same
identity holds per channel (Wen et al. 2018, section 3, convolutional
layers): ``a_s`` signs the input channels, ``c_s`` the output channels, and
``W_s[o, i, :, :] = mu[o, i] + D[o, i] * c_s[o] * a_s[i]``::

    y_s = conv(x_s, mu) + conv(x_s * a_s, D) * c_s + b_s

Why each draw keeps the base's law. ``c_s, a_s`` are uniform signs
independent of the base, and ``D * (c a^T)`` is ``D`` with rows and columns
re-signed (for a conv, columns are the ``in * k * k`` kernel entries and one
input-channel sign re-signs ``k * k`` of them): the base below is invariant
under such re-signing (the signs are absorbed into its own uniform signs), so
each draw's weights follow the base's law exactly:

* gaussian posterior: ``D = sigma * eps`` with each ``eps_ij ~ N(0, 1)``, so
  every weight is N(mu, sigma^2);
* radial posterior (Farquhar et al., AISTATS 2020, eq. 2):
  ``w = mu + sigma * (eps / ||eps||) * r``; sign flips keep ``||eps||``, so
  ``||(w_s - mu) / sigma|| = |r_s|``, the half-normal law the radial posterior
  prescribes. The radius ``r ~ N(0, 1)`` is one scalar per tensor per draw,
  fresh per draw, for the weight and the bias separately.

Draws within one call are pairwise uncorrelated (E[c_s c_t] = 0 for s != t)
but share the magnitudes ``|D|``: they are not independent, which Flipout
accepts. The signs are per draw, shared by the cases of a request (a draw is
one sampled network), as the other graph kinds do.

The base, fresh per call (default): full rank, ``eps`` [out, cols] of iid
N(0, 1) fed by the engine (``rank=FULL_RANK``), Flipout's own base: every
weight of every draw is exactly N(mu, sigma^2) (gaussian), and the only
approximation left is that draws within a call share ``|D|``. Cost: one
normal per parameter per call (not S), and one extra matmul per layer.

Measured on TRAINED networks (why full rank is the default). Digits,
64-256-256-10 MLPs trained with ``demur.export.training.train`` defaults
(seed 0), 200 test digits, 1000 calls of 32 draws per graph: mean mutual
information of each call's 32 draws against the sampler graph's exact
independent draws (relative bias, standard error from the calls' spread),
and a two-sample KS test per case and class on one draw per call (1000
independent logits each side, 2000 tests, level 0.01; the same against a
second sampler run is the null)::

                      MI bias (se)        KS rejections   null: MI bias, KS
    gaussian rank 16  +7.1% (0.4%)        1.3%            -0.0% (0.3%), 2.0%
    gaussian rank 64  +1.9% (0.3%)        1.5%
    gaussian full     -0.1% (0.3%)        1.1%
    radial   rank 16  +6.5% (1.1%)        1.0%            -1.3% (1.0%), 1.4%
    radial   full     -0.4% (0.9%)        1.1%

Per-weight marginals are exact either way (the KS rates sit at the null's);
the low-rank base's joint law inflates the disagreement between draws of a
call. Cost measured side by side (untrained bench MLP, S = 32, one
onnxruntime thread, a loaded 2-core machine): stacked 4.4 ms, rank-16 flip
3.5 ms, full-rank flip 8.9 ms at B = 1 (2.0x stacked); 37, 61 and 66 ms at
B = 64. For a large deterministic backbone with a variational head the
head's normals are small beside the backbone.

The rank-M option (``rank=16`` ...): a rank-M sign matrix. Per layer,
with the weight viewed as a matrix [out, cols] (cols = in, or in * k * k),
uniform signs ``U`` [M, out] and ``V`` [M, cols], a direction ``g`` uniform
on the unit sphere of R^M (M normals, normalised) and independent radii
``chi_k ~ chi(M)`` along the longer side (rows of ``U^T`` when out >= cols,
else of ``V^T``)::

    eps_ij = chi_i * sum_m U_mi V_mj g_m / sqrt(M)      (chi on rows here)

Exact marginal: ``chi_i * g`` is N(0, I_M) (an isotropic Gaussian is an
independent chi radius times a uniform direction), and given the signs
``sum_m U_mi V_mj z_m / sqrt(M)`` of z ~ N(0, I_M) is N(0, 1). So every
weight is exactly N(0, 1) before sigma; two weights are uncorrelated. Why the
radii rather than plain normals shared by the layer (also exact): those scale
the whole layer's perturbation by ``||g|| / sqrt(M)`` each call, and the
mutual information of one request then varied by 36% of its mean from call
to call, against 4% for independent draws; with the radii, 8% (64-256-256-10
gaussian MLP). ``chi(M)`` is ``sqrt(-2 sum of M/2 log u)`` (a sum of
independent chi-square(2) = -2 ln u terms), so M must be even.
What is approximate: the JOINT law. Each call's ``eps`` is a rank-M matrix
(the posterior's is full rank), weights of one layer are dependent beyond
second moments, and the radial direction ``eps / ||eps||`` is only close to
uniform on the sphere. Measured effect on predictions (untrained
64-256-256-10 MLPs with wide sigmas, 200 bundled digits, 192 calls of 32
draws against 6144 independent draws): mean mutual information of 32-draw
sets gaussian -0.8 +- 0.6%, radial -3.8 +- 1.5% (a full-rank fresh base:
-0.4% and -9%). M = 8 biased the gaussian MI by -2.5%; M = 32 matched M = 16
at a higher cost. Stored: mu and sigma, 2x the parameters. Biases use fresh
iid normals (``out`` per layer).

Noise inputs per variational layer i (filled by serve/adapters/engine.py per
call; the law is the name's part before the first dot). Full rank::

    signs.flip.L{i}  float32[S, in_c + out]                a_s, c_s
    normals.L{i}     float32[out * cols + out (+ 2S radial)]  eps, bias eps, radial radii

rank M::

    signs.flip.L{i}  float32[S, in_c + out]      a_s, c_s
    signs.base.L{i}  float32[cols + out, M]      V^T, U^T
    normals.L{i}     float32[M + out (+ 2S radial)]  g, bias eps, radial radii (weight, bias)
    uniforms.L{i}    float32[max(out, cols), M/2]    chi radii

Example::

    net = DrawNetwork(model, "flip", 32, seed=0, input_shape=(1, 8, 8))   # uses FlipDraws per layer
"""

from __future__ import annotations

import math

import torch
import torch.nn.functional as F

from demur.export.draws import Feed, NoiseInput, _Mode, _plain_draws, static_shape
from demur.export.errors import GraphBuildError
from demur.export.layers import VariationalConv2d, VariationalLayer

__all__ = ["BUILT_WEIGHTS_MAX", "DEFAULT_RANK", "FULL_RANK", "LOW_RANK", "FlipDraws"]

FULL_RANK = 0
"""``rank`` value for a full-rank base: every base entry an iid N(0, 1) fed per call."""

DEFAULT_RANK = FULL_RANK
"""The flip graph's base by default: full rank (module docstring: the rank-16 base biased the mutual
information of trained networks by +6.5-7.1%)."""

LOW_RANK = 16
"""M of the cheaper rank-M sign base (``rank=LOW_RANK``); biased on trained networks (module docstring)."""


BUILT_WEIGHTS_MAX = 1 << 22
"""Where draws enter, a flip convolution builds its S weight sets in the graph (module docstring)
when S x its weights is at most this many numbers (16 MB of float32 per call); a larger one keeps
Flipout's two convolutions, which never hold more than the base."""


class FlipDraws(_Mode):
    """One variational layer's Flipout draws over a draw-carrying batch [S*B, ...] (module docstring)."""

    def __init__(self, feed: Feed, index: int, layer: VariationalLayer, S: int, rank: int = DEFAULT_RANK) -> None:
        if rank != FULL_RANK and (rank < 2 or rank % 2):
            raise GraphBuildError(f"rank must be an even integer >= 2 (its chi radii are sums of rank/2 "
                                  f"chi-square(2) terms), or {FULL_RANK} for a full-rank base; got {rank}",
                                  field="rank")
        self.feed, self.S, self.M = feed, int(S), int(rank)
        self.conv = isinstance(layer, VariationalConv2d)
        self.radial = layer.posterior == "radial"
        shape = tuple(layer.weight_mu.shape)
        self.out, self.in_c = int(shape[0]), int(shape[1])
        self.cols = math.prod(shape[1:])
        self.names = {k: f"{k}.L{index}" for k in ("signs.flip", "signs.base", "normals", "uniforms")}
        self.k = self.out * self.cols if self.M == FULL_RANK else self.M   # normals before the bias's
        n_normals = self.k + self.out + (2 * self.S if self.radial else 0)
        self.noise = (
            NoiseInput(self.names["signs.flip"], (self.S, self.in_c + self.out)),
            NoiseInput(self.names["normals"], (n_normals,)),
        ) if self.M == FULL_RANK else (
            NoiseInput(self.names["signs.flip"], (self.S, self.in_c + self.out)),
            NoiseInput(self.names["signs.base"], (self.cols + self.out, self.M)),
            NoiseInput(self.names["normals"], (n_normals,)),
            NoiseInput(self.names["uniforms"], (max(self.out, self.cols), self.M // 2)),
        )
        with torch.no_grad():
            self.mu_w, self.mu_b = layer.weight_mu.detach().clone(), layer.bias_mu.detach().clone()
            self.sigma_w, self.sigma_b = layer.weight_sigma.detach().clone(), layer.bias_sigma.detach().clone()
        self.shape = shape
        built = self.conv and self.S * self.out * self.cols <= BUILT_WEIGHTS_MAX
        # export/shared.py hands a draw-free batch straight to a mode whose run_plain is not None
        self.run_plain = self._run_entering if built else None

    def _base(self) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor, torch.Tensor]:
        """(D [*w], d_b [out], r_w [S], r_b [S]): the call's base with sigma folded in; radii 1 for gaussian."""
        M, out, cols, k = self.M, self.out, self.cols, self.k
        normals = self.feed[self.names["normals"]]
        if M == FULL_RANK:
            eps = normals[:k].reshape(out, cols)                                  # iid N(0, 1), fresh per call
        else:
            base = self.feed[self.names["signs.base"]]
            v_t, u_t = base[:cols], base[cols:]                                  # [cols, M], [out, M]
            g = normals[:M]
            g = g / torch.linalg.vector_norm(g)
            chi = torch.sqrt(-2.0 * torch.log(self.feed[self.names["uniforms"]]).sum(dim=1))  # [max(out, cols)]
            if out >= cols:
                u_t = u_t * chi[:out, None]
            else:
                v_t = v_t * chi[:cols, None]
            eps = torch.matmul(u_t * g, v_t.transpose(0, 1)) / math.sqrt(M)      # [out, cols]
        eps_b = normals[k:k + out]
        if not self.radial:
            one = torch.ones(self.S)
            return self.sigma_w * eps.reshape(self.shape), self.sigma_b * eps_b, one, one
        radii = normals[k + out:]
        r_w = radii[:self.S] / torch.linalg.vector_norm(eps)    # dividing S radii, not out * cols entries
        r_b = radii[self.S:]
        d_b = self.sigma_b * eps_b / torch.linalg.vector_norm(eps_b)
        return self.sigma_w * eps.reshape(self.shape), d_b, r_w, r_b

    def _signs(self) -> tuple[torch.Tensor, torch.Tensor]:
        flip = self.feed[self.names["signs.flip"]]
        return flip[:, :self.in_c], flip[:, self.in_c:]                          # [S, in_c], [S, out]

    def weights(self, layer: VariationalLayer) -> tuple[torch.Tensor, torch.Tensor]:
        """The weights each draw uses, [S, *w] and [S, out] (the reference and tests)."""
        d_w, d_b, r_w, r_b = self._base()
        a, c = self._signs()
        S, out, cols = self.S, self.out, self.cols
        # one batched outer product (c_s r_s) a_s^T over the weight's columns, then one multiply and one
        # add over S x the weights: elementwise ops whose inner dimension is a whole row, not a 3x3 kernel
        a_cols = a[:, :, None].expand(S, self.in_c, cols // self.in_c).reshape(S, 1, cols)
        outer = torch.matmul((c * r_w[:, None]).reshape(S, out, 1), a_cols)                # [S, out, cols]
        w = self.mu_w.reshape(out, cols) + d_w.reshape(out, cols) * outer
        return w.reshape(S, *self.shape), self.mu_b + d_b * c * r_b[:, None]

    def _run_entering(self, layer: VariationalLayer, x: torch.Tensor) -> torch.Tensor:
        """A draw-free batch [B, ...] -> [S*B, ...]: the call's S weight sets built, side by side in
        one convolution (module docstring)."""
        w, b = self.weights(layer)
        return _plain_draws(layer, x, w.flatten(0, 1), b.flatten(), self.S)

    def run(self, layer: VariationalLayer, x: torch.Tensor) -> torch.Tensor:
        if self.entering:   # set by export/shared.py only while run_plain is not None
            return self._run_entering(layer, x)
        d_w, d_b, r_w, r_b = self._base()
        a, c = self._signs()
        S = self.S
        case = static_shape(x.shape[1:])
        xs = x.reshape(S, -1, *case)                                             # [S, B, ...]
        if self.conv:
            assert isinstance(layer, VariationalConv2d)
            mean = F.conv2d(x, self.mu_w, self.mu_b, stride=layer.stride, padding=layer.padding)
            signed = (xs * a.reshape(S, 1, self.in_c, 1, 1)).reshape(-1, *case)
            pert = F.conv2d(signed, d_w, None, stride=layer.stride, padding=layer.padding)
            out_case = static_shape(pert.shape[1:])
            pert = pert.reshape(S, -1, *out_case) * (c * r_w[:, None]).reshape(S, 1, self.out, 1, 1)
            pert = pert + (d_b * c * r_b[:, None]).reshape(S, 1, self.out, 1, 1)
            return mean + pert.reshape(-1, *out_case)
        ones = [1] * (xs.dim() - 2)
        mean = F.linear(x, self.mu_w, self.mu_b)
        pert = F.linear(xs * a.reshape(S, *ones, self.in_c), d_w)                # [S, B, ..., out]
        pert = pert * (c * r_w[:, None]).reshape(S, *ones, self.out) + (d_b * c * r_b[:, None]).reshape(
            S, *ones, self.out)
        return mean + pert.reshape(-1, *case[:-1], self.out)
