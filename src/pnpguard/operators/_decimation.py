"""Blur-then-decimate operator for super-resolution."""

from __future__ import annotations

from typing import Any

import numpy as np
import torch

from .._validation import image_shape, int_at_least
from ._base import LinearOperator, Shape
from ._cache import TransferCache
from ._convolution import periodic_transfer, validate_psf


class Decimation(LinearOperator):
    """Anti-alias blur followed by keeping every ``factor``-th pixel.

    ``y = S (b * x)`` where ``b * x`` is the periodic convolution with the PSF
    ``b`` (centred at ``(kh // 2, kw // 2)``) and ``S`` keeps the samples at
    rows and columns ``0, factor, 2 factor, ...``. The adjoint is zero-filling
    upsampling followed by the transposed (flipped) blur.

    Parameters
    ----------
    factor : int
        Integer decimation factor >= 2; ``H`` and ``W`` must be multiples of it.
    shape : tuple of int
        ``(H, W)`` of the high-resolution images.
    psf : array_like, optional
        Anti-alias PSF; default the ``factor x factor`` box average (detector
        binning: each low-resolution pixel is the mean of a block).

    Notes
    -----
    ``S B B^T S^T`` is a periodic convolution on the low-resolution grid whose
    transfer function is the mean of ``|FFT(b)|^2`` over the ``factor^2``
    aliased frequencies. This gives the exact norm (square root of its maximum)
    and a closed-form least-squares proximal step through the Woodbury identity
    ``(I + t U^T U)^{-1} = I - t U^T (I + t U U^T)^{-1} U``. The operator has a
    null space, so its smallest singular value is 0.

    References
    ----------
    .. [1] N. Zhao, Q. Wei, A. Basarab, N. Dobigeon, D. Kouame and
       J.-Y. Tourneret, "Fast single image super-resolution using a new
       analytical solution for l2-l2 problems", IEEE Trans. Image Process.
       25(8), 2016, doi:10.1109/TIP.2016.2567075.
    """

    def __init__(self, factor: int, shape: Shape, psf: Any = None):
        shape = image_shape(shape, "shape")
        factor = int_at_least(factor, "factor", 2)
        if shape[0] % factor or shape[1] % factor:
            raise ValueError(f"`shape` {shape} must be divisible by `factor` {factor}")
        kernel = validate_psf(np.full((factor, factor), 1.0 / factor**2) if psf is None else psf, shape)
        low = (shape[0] // factor, shape[1] // factor)
        super().__init__(shape, low)
        self.factor = factor
        self.psf = kernel.numpy().copy()
        transfer = periodic_transfer(kernel, shape)
        self._transfer = TransferCache(transfer)
        full_gain = torch.fft.fft2(torch.fft.irfft2(transfer, s=shape)).abs() ** 2
        alias_mean = full_gain.reshape(factor, low[0], factor, low[1]).mean(dim=(0, 2))
        self._alias_gain = TransferCache(alias_mean)

    def _blur(self, x: torch.Tensor, conjugate: bool) -> torch.Tensor:
        transfer = self._transfer.like(x)
        if conjugate:
            transfer = transfer.conj()
        return torch.fft.irfft2(torch.fft.rfft2(x) * transfer, s=self.in_shape)

    def _sample(self, x: torch.Tensor) -> torch.Tensor:
        return x[..., :: self.factor, :: self.factor]

    def _zero_fill(self, y: torch.Tensor) -> torch.Tensor:
        up = y.new_zeros(y.shape[:-2] + self.in_shape)
        up[..., :: self.factor, :: self.factor] = y
        return up

    def _forward(self, x: torch.Tensor) -> torch.Tensor:
        return self._sample(self._blur(x, conjugate=False))

    def _adjoint(self, y: torch.Tensor) -> torch.Tensor:
        return self._blur(self._zero_fill(y), conjugate=True)

    @property
    def nonnegative(self) -> bool:
        return bool((self.psf >= 0).all())

    def _exact_norm(self) -> float:
        return float(self._alias_gain.master.max().sqrt())

    def smallest_singular_value(self) -> float:
        return 0.0

    def _solve_shifted_normal(self, v: torch.Tensor, t: float) -> torch.Tensor:
        low = self._forward(v)
        gain = self._alias_gain.like_real(low)
        low = torch.fft.ifft2(torch.fft.fft2(low) / (1.0 + t * gain)).real
        return v - t * self._adjoint(low)

    def _describe(self) -> str:
        kh, kw = self.psf.shape
        return f"factor {self.factor}, psf {kh}x{kw}, periodic"
