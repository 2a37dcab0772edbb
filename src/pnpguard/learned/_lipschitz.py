r"""Spectral norms of convolution layers, exact and certified for every image size.

A 2-D convolution with a ``(c_out, c_in, k_h, k_w)`` kernel acting circularly
on ``H x W`` images is block-diagonalised by the 2-D DFT: at frequency
:math:`\omega = (2\pi u/H, 2\pi v/W)` it multiplies the ``c_in`` input
coefficients by the ``c_out x c_in`` matrix

.. math:: K(\omega) = \sum_{t} W_t \, e^{-i \langle t, \omega \rangle},

so its singular values are the union over the ``H W`` frequencies of the
singular values of :math:`K(\omega)` (Sedghi, Gupta & Long 2019). The norm
therefore depends on the image size, and the norm at one size does not bound
the norm at another.

A bound valid for every size and for zero padding
-------------------------------------------------
Every circular size samples the torus, and a zero-padded convolution on
``H x W`` is the circular one on ``(H + k_h - 1) x (W + k_w - 1)`` applied to a
zero-embedded image and cropped, so ``sup_omega ||K(omega)||_2`` bounds all of
them. For a unit vector :math:`v`, :math:`p_v(\omega) = \|K(\omega) v\|^2` is a
non-negative real trigonometric polynomial of degree :math:`n_j = k_j - 1` in
each variable. Bernstein's inequality :math:`\|p'\|_\infty \le n \|p\|_\infty`
for a real trigonometric polynomial of degree :math:`n` (applied twice), and
:math:`p' = 0` at a maximiser, give by Taylor's theorem, for a grid of
:math:`M` equispaced points whose nearest point is at most :math:`\pi / M`
away, :math:`\max_\text{grid} p \ge (1 - n^2 \pi^2 / (2 M^2)) \max p`. Applying
this along each axis in turn (each one-dimensional slice through a maximiser
is again such a polynomial),

.. math::

   \sup_\omega \|K(\omega)\|_2 \le
   \frac{\max_{\text{grid } M_h \times M_w} \|K(\omega)\|_2}
        {\sqrt{c_h c_w}}, \qquad c_j = 1 - \frac{n_j^2 \pi^2}{2 M_j^2}.

This is our derivation from Bernstein's inequality; for 3x3 kernels on a
128 x 128 grid the factor is :math:`1/c = 1.0012` (1.0048 on 64 x 64). The grid maximum is the exact
circular norm at size ``M_h x M_w``, computed from the DFT.

References
----------
.. [1] H. Sedghi, V. Gupta and P. M. Long, "The singular values of
   convolutional layers", ICLR 2019. arXiv:1805.10408
.. [2] S. Bernstein's inequality for trigonometric polynomials (sharp constant
   by M. Riesz, 1914); see A. Zygmund, *Trigonometric Series*, 3rd ed.,
   Cambridge University Press, 2002, vol. II, ch. X (location from memory).
"""

from __future__ import annotations

import math

import torch
import torch.nn.functional as F
from torch import nn

from .._validation import image_shape

#: Frequency grid (per axis) of the certified bound.
BOUND_GRID = 128
#: Image side of the power iteration that estimates the bound during training.
TRAINING_GRID = 64


def _check_weight(weight: torch.Tensor) -> None:
    if not isinstance(weight, torch.Tensor) or weight.ndim != 4:
        got = tuple(weight.shape) if isinstance(weight, torch.Tensor) else type(weight).__name__
        raise ValueError(f"`weight` must be a (c_out, c_in, k_h, k_w) tensor, got {got}")
    if weight.is_complex() or not weight.is_floating_point():
        raise TypeError(f"`weight` must be a real floating tensor, got dtype {weight.dtype}")


def frequency_matrices(weight: torch.Tensor, size: tuple[int, int]) -> torch.Tensor:
    """The matrices ``K(omega)`` of a circular convolution at the DFT frequencies.

    Parameters
    ----------
    weight : torch.Tensor
        ``(c_out, c_in, k_h, k_w)`` kernel.
    size : tuple of int
        ``(H, W)``, the image size of the circular convolution. Any size is
        allowed; taps that wrap around (``H < k_h``) add up, as they do in the
        convolution itself.

    Returns
    -------
    torch.Tensor
        Complex ``(H, W // 2 + 1, c_out, c_in)``: the frequencies ``(u, v)``
        with ``0 <= v <= W // 2``. The others are complex conjugates of these
        (``K(-omega) = conj K(omega)`` for a real kernel) and have the same
        singular values.
    """
    _check_weight(weight)
    h, w = image_shape(size, "size")
    kh, kw = weight.shape[-2:]
    real = torch.float64 if weight.dtype == torch.float64 else torch.float32
    # Phases exp(-2 pi i u t / H); taps t >= H wrap around automatically.
    u = torch.arange(h, dtype=real, device=weight.device)
    v = torch.arange(w // 2 + 1, dtype=real, device=weight.device)
    phase_h = torch.polar(
        torch.ones(h, kh, dtype=real, device=weight.device),
        -2 * math.pi * torch.outer(u, torch.arange(kh, dtype=real, device=weight.device)) / h,
    )
    phase_w = torch.polar(
        torch.ones(w // 2 + 1, kw, dtype=real, device=weight.device),
        -2 * math.pi * torch.outer(v, torch.arange(kw, dtype=real, device=weight.device)) / w,
    )
    return torch.einsum("ua,vb,oiab->uvoi", phase_h, phase_w, weight.to(phase_h.dtype))


def circular_conv_norm(weight: torch.Tensor, size: tuple[int, int]) -> float:
    """Exact spectral norm of the circular convolution with ``weight`` on ``size`` images.

    Parameters
    ----------
    weight : torch.Tensor
        ``(c_out, c_in, k_h, k_w)`` kernel (cross-correlation convention of
        :func:`torch.nn.functional.conv2d`; the norm is the same for either
        convention).
    size : tuple of int
        ``(H, W)``.

    Returns
    -------
    float
        ``max_omega ||K(omega)||_2`` over the ``H x W`` DFT frequencies,
        computed in double precision.

    Notes
    -----
    Sedghi, Gupta & Long (2019): the singular values of the circular
    convolution are the union of those of the ``K(omega)``.
    """
    matrices = frequency_matrices(weight.detach().double(), size)
    return float(torch.linalg.matrix_norm(matrices, ord=2).max())


def grid_factor(kernel_size: tuple[int, int], grid: int = BOUND_GRID) -> float:
    """The factor ``1 / sqrt(c_h c_w)`` of the all-sizes bound (module Notes)."""
    factor = 1.0
    for k in kernel_size:
        c = 1.0 - (k - 1) ** 2 * math.pi**2 / (2.0 * grid**2)
        if c <= 0:
            raise ValueError(
                f"`grid` = {grid} is too coarse for kernel size {k}; need grid > {(k - 1) * math.pi / math.sqrt(2):.2f}"
            )
        factor /= math.sqrt(c)
    return factor


def conv_norm_bound(weight: torch.Tensor, grid: int = BOUND_GRID) -> float:
    """Upper bound on the norm of the convolution with ``weight`` at every image size.

    Valid for circular convolutions of every size and for zero-padded
    convolutions (any padding width); see the module Notes for the proof.

    Parameters
    ----------
    weight : torch.Tensor
        ``(c_out, c_in, k_h, k_w)`` kernel.
    grid : int, optional
        Frequencies per axis at which the exact norm is evaluated.

    Returns
    -------
    float
        ``circular_conv_norm(weight, (grid, grid)) * grid_factor(kernel size, grid)``.
    """
    _check_weight(weight)
    return circular_conv_norm(weight, (grid, grid)) * grid_factor(tuple(weight.shape[-2:]), grid)


def circular_conv(x: torch.Tensor, weight: torch.Tensor) -> torch.Tensor:
    """Circular (periodic) convolution of ``(B, c_in, H, W)`` images, odd kernels."""
    kh, kw = weight.shape[-2:]
    padded = F.pad(x, (kw // 2, kw // 2, kh // 2, kh // 2), mode="circular")
    return F.conv2d(padded, weight)


def circular_conv_adjoint(y: torch.Tensor, weight: torch.Tensor) -> torch.Tensor:
    """Adjoint of :func:`circular_conv`: flipped kernel, channels swapped."""
    return circular_conv(y, weight.flip(-2, -1).transpose(0, 1))


class SpectralNormaliser(nn.Module):
    """Parametrisation ``W -> W / max(1, bound(W))`` used while training.

    ``bound(W)`` is the all-sizes bound of :func:`conv_norm_bound`, with the
    exact ``BOUND_GRID x BOUND_GRID`` circular norm replaced by a cheaper
    power-iteration estimate of the ``size x size`` circular norm (one step per
    training call on a vector kept between calls, as in common spectral
    normalisation practice). The estimate can undershoot, so after training
    the weights are rescaled with the exact bound (:func:`normalise_exactly`);
    only the exact bound is ever claimed.

    Parameters
    ----------
    c_in : int
        Input channels of the kernel.
    kernel_size : tuple of int
        ``(k_h, k_w)``, both odd.
    size : int, optional
        Image side of the power iteration.
    seed : int, optional
        Seed of the initial power-iteration vector.
    """

    def __init__(self, c_in: int, kernel_size: tuple[int, int], size: int = TRAINING_GRID, seed: int = 0):
        super().__init__()
        if any(k % 2 == 0 for k in kernel_size):
            raise ValueError(f"`kernel_size` must be odd, got {kernel_size!r}")
        self.factor = grid_factor(tuple(kernel_size), BOUND_GRID)
        generator = torch.Generator().manual_seed(seed)
        vector = torch.randn(1, c_in, size, size, generator=generator)
        self.register_buffer("vector", vector / vector.norm(), persistent=False)

    def iterate(self, weight: torch.Tensor, count: int = 1) -> None:
        """Advance the power iteration on ``W^T W`` by ``count`` steps."""
        with torch.no_grad():
            vector = self.vector
            for _ in range(count):
                vector = circular_conv_adjoint(circular_conv(vector, weight), weight)
                vector = vector / vector.norm().clamp_min(1e-30)
                # Components off the top singular vector decay geometrically;
                # zero them before they become subnormal (slow on CPUs).
                vector = torch.where(vector.abs() < 1e-20, 0.0, vector)
            self.vector.copy_(vector)

    def forward(self, weight: torch.Tensor) -> torch.Tensor:
        if self.training:
            self.iterate(weight.detach())
        estimate = circular_conv(self.vector, weight).norm() * self.factor
        return weight / torch.clamp(estimate, min=1.0)


def normalise_exactly(weight: torch.Tensor, grid: int = BOUND_GRID) -> torch.Tensor:
    """Return ``weight`` scaled down (if needed) so that its exact bound is at most 1.

    The bound is recomputed from the stored (rounded) values after scaling and
    the scaling is repeated with a small margin until it holds.
    """
    result = weight.detach().clone()
    while True:
        bound = conv_norm_bound(result, grid)
        if bound <= 1.0:
            return result
        result = (result.double() / (bound * (1.0 + 1e-6))).to(weight.dtype)
