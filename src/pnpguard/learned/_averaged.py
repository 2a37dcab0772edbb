r"""A convolutional denoiser that is theta-averaged by construction."""

from __future__ import annotations

import math
from dataclasses import dataclass
from itertools import pairwise

import torch
import torch.nn.functional as F
from torch import nn
from torch.nn.utils import parametrize

from .._validation import int_at_least
from ._lipschitz import (
    BOUND_GRID,
    SpectralNormaliser,
    conv_norm_bound,
    normalise_exactly,
)


def reflected_shrink(z: torch.Tensor, threshold: torch.Tensor, beta: torch.Tensor) -> torch.Tensor:
    r"""The activation ``z - beta * clip(z, -threshold, threshold)``, channel-wise.

    Its slope is 1 outside ``[-threshold, threshold]`` and ``1 - beta`` inside,
    so for ``0 <= beta <= 2`` it is 1-Lipschitz. ``beta = 1`` is soft
    thresholding (the proximal operator of ``threshold |.|``), ``beta = 2`` its
    reflection ``2 S - I``.

    Parameters
    ----------
    z : torch.Tensor
        ``(B, C, H, W)`` pre-activations.
    threshold, beta : torch.Tensor
        ``(B, C)``, ``threshold >= 0`` and ``0 <= beta <= 2``.
    """
    t = threshold[:, :, None, None]
    return z - beta[:, :, None, None] * torch.maximum(torch.minimum(z, t), -t)


def dct_filters(size: int = 3) -> torch.Tensor:
    """The ``size**2`` separable orthonormal DCT-II basis patches, ``(size**2, size, size)``."""
    n = torch.arange(size, dtype=torch.float64)
    basis = torch.stack(
        [torch.cos(math.pi * (n + 0.5) * k / size) * (math.sqrt(1 / size) if k == 0 else math.sqrt(2 / size)) for k in range(size)]
    )
    return torch.einsum("ka,lb->klab", basis, basis).reshape(size * size, size, size)


@dataclass(frozen=True)
class LayerBounds:
    """Per-layer norm bounds of the nonexpansive part, recomputed from the weights.

    Attributes
    ----------
    bounds : tuple of float
        Upper bound on the norm of each convolution at every image size
        (:func:`~pnpguard.learned.conv_norm_bound`).
    lipschitz : float
        Their product, an upper bound on the Lipschitz constant of ``N``.
    grid : int
        Frequency grid of the bound.
    """

    bounds: tuple[float, ...]
    lipschitz: float
    grid: int

    @property
    def nonexpansive(self) -> bool:
        """True when the product of the bounds is at most 1."""
        return self.lipschitz <= 1.0


class AveragedCNN(nn.Module):
    r"""Denoiser ``D = (1 - theta) I + theta N`` with ``N`` 1-Lipschitz by construction.

    ``N = P + (I - P) M (I - P)``, where ``P`` replaces an image by its mean
    (the orthogonal projection onto constant images) and
    ``M = a I + (1 - a) C``: ``C`` alternates 3x3 zero-padded convolutions and
    the 1-Lipschitz activation :func:`reflected_shrink`, and a small
    perceptron computes the skip weight ``a`` in ``(0, 1)`` and the
    activations' thresholds, slopes and biases from ``(sigma, theta)``. For
    fixed ``(sigma, theta)`` these are constants, so the Lipschitz constant of
    ``C`` as a function of the image is at most the product of the convolution
    norms. When that product is at most 1, ``C``, ``M`` and ``N`` are
    nonexpansive and ``D`` is theta-averaged.

    Parameters
    ----------
    depth : int
        Number of convolutions (at least 2).
    width : int
        Feature channels (at least 9).
    embedding : int
        Hidden units of the perceptron that maps ``(sigma, theta)`` to the
        activation parameters.
    theta_range : tuple of float
        Range of ``theta`` the network is trained for.

    Notes
    -----
    Definition: ``D`` is theta-averaged if ``D = (1 - theta) I + theta N`` with
    ``N`` nonexpansive (Combettes & Yamada 2015, Def. 1.1).

    ``M`` is nonexpansive when ``C`` is, as a convex combination of
    nonexpansive maps. The skip weight lets ``D`` approach the identity at low
    noise levels, which a stack of norm-bounded layers shared across levels
    cannot represent by itself; plug-and-play runs use weak denoisers often.

    Why ``N`` is nonexpansive when ``M`` is: ``P`` and ``I - P`` are orthogonal
    projections onto orthogonal subspaces, so for images ``x, y`` with
    ``d = x - y``,
    ``||N x - N y||^2 = ||P d||^2 + ||(I - P)(M (I - P) x - M (I - P) y)||^2
    <= ||P d||^2 + ||(I - P) d||^2 = ||d||^2``. The mean goes through ``N``
    (and ``D``) unchanged. Without ``P``, a product of norm-bounded layers
    tends to shrink intensities (a gain near 0.9 on clean images after
    training), which costs several dB on flat, bright frames.

    Why this activation: let ``A`` be a Parseval frame analysis (``A^T A = I``)
    and ``S`` soft thresholding, so that ``A^T S A`` is a classical shrinkage
    denoiser. On zero-mean images, the ``M`` that makes ``D = A^T S A`` is
    ``(A^T S A - (1 - theta) I) / theta = A^T phi A`` with
    ``phi(z) = z - clip(z) / theta``: :func:`reflected_shrink` with
    ``beta = 1 / theta``, which lies in ``[1, 2]`` for ``theta >= 1/2``. So
    the network can represent frame shrinkage exactly at every ``theta`` in
    the range, and it is initialised that way: the first layer is the 3x3 DCT
    frame scaled to be Parseval, the middle layers are identities, the last
    is the synthesis, and the thresholds start near 0 (``M`` close to
    ``0.96 I``). The perceptron makes ``beta`` and the thresholds depend on
    ``theta`` and ``sigma``; training refines everything.

    The norms are bounded for every image size and with zero padding by the
    all-sizes bound of :mod:`pnpguard.learned._lipschitz` (Sedghi, Gupta &
    Long 2019, with a Bernstein-inequality factor 1.0012 per layer, so a
    stack of identities already has a bound slightly above 1 and is scaled to
    ``1.0012**-depth``).

    References
    ----------
    .. [1] P. L. Combettes and I. Yamada, "Compositions and convex combinations
       of averaged nonexpansive operators", J. Math. Anal. Appl. 425 (2015)
       55-70. doi:10.1016/j.jmaa.2014.11.044
    .. [2] D. L. Donoho, "De-noising by soft-thresholding", IEEE Trans. Inf.
       Theory 41(3) (1995) 613-627. doi:10.1109/18.382009
    .. [3] H. Sedghi, V. Gupta and P. M. Long, "The singular values of
       convolutional layers", ICLR 2019.
    """

    def __init__(
        self,
        depth: int = 8,
        width: int = 32,
        embedding: int = 32,
        theta_range: tuple[float, float] = (0.5, 0.95),
    ) -> None:
        super().__init__()
        depth = int_at_least(depth, "depth", 2)
        width = int_at_least(width, "width", 9)  # the 3x3 DCT frame
        low, high = (float(t) for t in theta_range)
        if not 0.5 <= low <= high < 1.0:
            raise ValueError(f"`theta_range` must satisfy 0.5 <= low <= high < 1, got {theta_range!r}")
        self.depth, self.width, self.embedding = depth, width, embedding
        self.theta_range = (low, high)
        channels = [1] + [width] * (depth - 1) + [1]
        self.convs = nn.ModuleList(
            nn.Conv2d(c_in, c_out, 3, padding=1, bias=False) for c_in, c_out in pairwise(channels)
        )
        # Per hidden layer: bias, threshold and slope of each channel; then the
        # skip weight (an output bias would be removed by I - P: there is none).
        self.parameter_sizes = [3 * width] * (depth - 1) + [1]
        self.condition = nn.Sequential(
            nn.Linear(2, embedding), nn.SiLU(), nn.Linear(embedding, sum(self.parameter_sizes))
        )
        self._initialise_as_frame_shrinkage()

    def _initialise_as_frame_shrinkage(self) -> None:
        """Analysis by the Parseval 3x3 DCT frame, identities, synthesis (class Notes)."""
        frame = dct_filters(3).float() / 3.0  # sum_k |F_k(omega)|^2 = 1: Parseval
        # The other channels get 1% of the squared norm: enough to break the
        # symmetry, little enough to keep the gain of N close to 1.
        share = math.sqrt(0.99)
        with torch.no_grad():
            first = self.convs[0].weight
            extra = first[9:]
            extra *= math.sqrt(0.01) / max(conv_norm_bound(extra), 1e-12)
            first[:9, 0] = share * frame
            for conv in self.convs[1:-1]:
                conv.weight.zero_()
                conv.weight[torch.arange(self.width), torch.arange(self.width), 1, 1] = 1.0
            last = self.convs[-1].weight
            last.zero_()
            last[0, :9] = share * frame.flip(-2, -1)  # adjoint of the analysis
            out = self.condition[-1]
            out.weight.zero_()
            out.bias.zero_()
            for layer in range(self.depth - 1):
                start = 3 * self.width * layer
                out.bias[start + self.width : start + 2 * self.width] = -6.0  # threshold softplus(-6) ~ 0
                # slope beta = 2 sigmoid(0) = 1: soft thresholding

    def config(self) -> dict[str, object]:
        """Constructor arguments, stored with the weights."""
        return {
            "depth": self.depth,
            "width": self.width,
            "embedding": self.embedding,
            "theta_range": list(self.theta_range),
        }

    # ---------------------------------------------------------- structure
    def start_normalised_training(self, seed: int = 0) -> None:
        """Attach the spectral normaliser to every convolution (for training)."""
        for index, conv in enumerate(self.convs):
            normaliser = SpectralNormaliser(conv.in_channels, conv.kernel_size, seed=seed + index)
            normaliser.iterate(conv.weight.detach(), count=50)
            parametrize.register_parametrization(conv, "weight", normaliser)

    def finish_normalised_training(self) -> None:
        """Bake the normalised weights and rescale them with the exact bound."""
        for conv in self.convs:
            if parametrize.is_parametrized(conv, "weight"):
                parametrize.remove_parametrizations(conv, "weight", leave_parametrized=True)
            with torch.no_grad():
                conv.weight.copy_(normalise_exactly(conv.weight))

    def layer_bounds(self, grid: int = BOUND_GRID) -> LayerBounds:
        """Recompute the per-layer norm bounds from the current weights."""
        bounds = tuple(conv_norm_bound(conv.weight.detach(), grid) for conv in self.convs)
        product = 1.0
        for bound in bounds:
            product *= bound
        return LayerBounds(bounds, product, grid)

    # ------------------------------------------------------------ forward
    def nonexpansive_part(
        self,
        noisy: torch.Tensor,
        sigma: torch.Tensor | float,
        theta: torch.Tensor | float,
        gain: float = 1.0,
    ) -> torch.Tensor:
        """``N(y; sigma, theta) = P y + gain (I - P) M((I - P) y)`` for ``(B, 1, H, W)`` images ``y``.

        ``M(h) = a h + (1 - a) C(h)`` (class docstring).

        ``sigma`` and ``theta`` are scalars or one value per image (shape
        ``(B,)``). ``gain = 1`` (the default) gives the nonexpansive ``N``;
        a larger gain scales the mean-free part only.
        """
        batch = noisy.shape[0]
        sigma_t = torch.as_tensor(sigma, dtype=noisy.dtype, device=noisy.device).expand(batch)
        theta_t = torch.as_tensor(theta, dtype=noisy.dtype, device=noisy.device).expand(batch)
        settings = self.condition(torch.stack([sigma_t, theta_t], dim=1)).split(self.parameter_sizes, dim=1)
        mean = noisy.mean(dim=(-2, -1), keepdim=True)
        centred = noisy - mean
        h = centred
        for conv, setting in zip(self.convs[:-1], settings[:-1]):
            bias, threshold, slope = setting.chunk(3, dim=1)
            h = reflected_shrink(conv(h) + bias[:, :, None, None], F.softplus(threshold), 2 * torch.sigmoid(slope))
        skip = torch.sigmoid(settings[-1])[:, :, None, None]
        h = skip * centred + (1 - skip) * self.convs[-1](h)
        h = h - h.mean(dim=(-2, -1), keepdim=True)
        return mean + gain * h

    def forward(
        self,
        noisy: torch.Tensor,
        sigma: torch.Tensor | float,
        theta: torch.Tensor | float,
        gain: float = 1.0,
    ) -> torch.Tensor:
        """``(1 - theta) y + theta N(y)`` for ``(N, C, H, W)`` images, channel by channel.

        ``gain = 1`` (the default) gives the theta-averaged denoiser; a
        larger ``gain`` scales the mean-free part of ``N`` (see
        :meth:`nonexpansive_part` and :func:`~pnpguard.learned.averaged_cnn`).
        """
        n, c, h, w = noisy.shape
        flat = noisy.reshape(n * c, 1, h, w)
        sigma_t = torch.as_tensor(sigma, dtype=noisy.dtype, device=noisy.device)
        theta_t = torch.as_tensor(theta, dtype=noisy.dtype, device=noisy.device)
        if sigma_t.ndim == 1 and c > 1:
            sigma_t = sigma_t.repeat_interleave(c)
        if theta_t.ndim == 1 and c > 1:
            theta_t = theta_t.repeat_interleave(c)
        part = self.nonexpansive_part(flat, sigma_t, theta_t, gain)
        weight = theta_t.reshape(-1, 1, 1, 1) if theta_t.ndim == 1 else theta_t
        return ((1 - weight) * flat + weight * part).reshape(n, c, h, w)
