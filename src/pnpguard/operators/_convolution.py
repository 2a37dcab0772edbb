"""Convolution with a point-spread function (periodic or zero boundary)."""

from __future__ import annotations

from typing import Any

import torch

from .._arrays import as_float_tensor
from .._validation import choice, image_shape
from ._base import LinearOperator, NormBound, Shape
from ._cache import TransferCache

_BOUNDARIES = ("periodic", "zero")
_OUTPUTS = ("full", "same")


def validate_psf(psf: Any, shape: Shape) -> torch.Tensor:
    """Check a point-spread function against an image shape; return float64 tensor."""
    kernel = as_float_tensor(psf, "psf")
    if kernel.ndim != 2:
        raise ValueError(f"`psf` must be a 2-D array, got shape {tuple(kernel.shape)}")
    if kernel.numel() == 0:
        raise ValueError("`psf` is empty")
    if kernel.shape[0] > shape[0] or kernel.shape[1] > shape[1]:
        raise ValueError(
            f"`psf` has shape {tuple(kernel.shape)}, larger than the image shape {tuple(shape)}"
        )
    total = float(kernel.sum())
    if not total > 0:
        raise ValueError(f"`psf` must have a positive sum, got {total:g}")
    return kernel


def periodic_transfer(kernel: torch.Tensor, shape: Shape) -> torch.Tensor:
    """``rfft2`` of ``kernel`` embedded in an image of ``shape`` with its centre
    (pixel ``(kh // 2, kw // 2)``) moved to the origin, in float64."""
    embedded = torch.zeros(shape, dtype=torch.float64)
    kh, kw = kernel.shape
    embedded[:kh, :kw] = kernel
    embedded = torch.roll(embedded, shifts=(-(kh // 2), -(kw // 2)), dims=(0, 1))
    return torch.fft.rfft2(embedded)


class Convolution(LinearOperator):
    """Convolution of an image with a point-spread function (PSF).

    ``y = psf * x`` with the PSF centred at pixel ``(kh // 2, kw // 2)``, as in
    :func:`scipy.ndimage.convolve`. The PSF is used exactly as given (it is
    *not* normalised; the PSF builders of this package return unit-sum PSFs).

    Parameters
    ----------
    psf : array_like
        2-D, finite, not larger than the image, with a positive sum.
    shape : tuple of int
        ``(H, W)`` of the images.
    boundary : {"periodic", "zero"}
        ``"periodic"``: the image wraps around; the operator is diagonalised by
        the 2-D DFT, so its norm ``max |FFT(psf)|`` and smallest singular value
        ``min |FFT(psf)|`` are exact and least-squares proximal steps are closed
        form. ``"zero"``: the image is zero outside its support.
    output : {"same", "full"}
        Only for ``boundary="zero"``: ``"full"`` returns the
        ``(H + kh - 1, W + kw - 1)`` linear convolution, ``"same"`` its centred
        ``(H, W)`` part, as :func:`scipy.signal.convolve2d`.

    Notes
    -----
    The zero-boundary norm is estimated by power iteration; its certified
    bound is ``sum |psf|`` (Young's inequality), which is tight for
    nonnegative PSFs in the full mode's infinite-image limit, or the
    Collatz-Wielandt bound when that is smaller.

    References
    ----------
    .. [1] P. C. Hansen, J. G. Nagy and D. P. O'Leary, *Deblurring Images:
       Matrices, Spectra, and Filtering*, SIAM, 2006, ch. 4 (boundary
       conditions and the FFT diagonalisation of periodic blurs).
    """

    def __init__(self, psf: Any, shape: Shape, boundary: str = "periodic", *, output: str = "same"):
        shape = image_shape(shape, "shape")
        choice(boundary, "boundary", _BOUNDARIES)
        choice(output, "output", _OUTPUTS)
        kernel = validate_psf(psf, shape)
        kh, kw = kernel.shape
        self.boundary = boundary
        self.output = output if boundary == "zero" else "same"
        self.psf = kernel.numpy().copy()
        if boundary == "periodic":
            out_shape = shape
            transfer = periodic_transfer(kernel, shape)
        else:
            self._padded = (shape[0] + kh - 1, shape[1] + kw - 1)
            out_shape = self._padded if output == "full" else shape
            transfer = torch.fft.rfft2(kernel, s=self._padded)
        super().__init__(shape, out_shape)
        self._transfer = TransferCache(transfer)
        self._offset = ((kh - 1) // 2, (kw - 1) // 2)

    # ---------------------------------------------------------------- apply
    def _forward(self, x: torch.Tensor) -> torch.Tensor:
        if self.boundary == "periodic":
            return torch.fft.irfft2(torch.fft.rfft2(x) * self._transfer.like(x), s=self.in_shape)
        full = torch.fft.irfft2(
            torch.fft.rfft2(x, s=self._padded) * self._transfer.like(x), s=self._padded
        )
        if self.output == "full":
            return full
        (r, c), (h, w) = self._offset, self.in_shape
        return full[..., r : r + h, c : c + w]

    def _adjoint(self, y: torch.Tensor) -> torch.Tensor:
        if self.boundary == "periodic":
            return torch.fft.irfft2(
                torch.fft.rfft2(y) * self._transfer.like(y).conj(), s=self.in_shape
            )
        if self.output == "same":
            (r, c), (h, w) = self._offset, self.in_shape
            full = y.new_zeros(y.shape[:-2] + self._padded)
            full[..., r : r + h, c : c + w] = y
        else:
            full = y
        correlated = torch.fft.irfft2(
            torch.fft.rfft2(full) * self._transfer.like(y).conj(), s=self._padded
        )
        h, w = self.in_shape
        return correlated[..., :h, :w]

    # ------------------------------------------------------------ structure
    @property
    def nonnegative(self) -> bool:
        return bool((self.psf >= 0).all())

    def _exact_norm(self) -> float | None:
        if self.boundary == "periodic":
            return float(self._transfer.master.abs().max())
        return None

    def smallest_singular_value(self) -> float | None:
        if self.boundary == "periodic":
            return float(self._transfer.master.abs().min())
        return None

    def _structural_bound(self) -> NormBound | None:
        return NormBound(float(abs(self.psf).sum()), True, "sum |psf| (Young's inequality)")

    def _solve_shifted_normal(self, v: torch.Tensor, t: float) -> torch.Tensor | None:
        if self.boundary != "periodic":
            return None
        gain = self._transfer.like(v).abs() ** 2
        return torch.fft.irfft2(torch.fft.rfft2(v) / (1.0 + t * gain), s=self.in_shape)

    def _describe(self) -> str:
        kh, kw = self.psf.shape
        mode = "periodic" if self.boundary == "periodic" else f"zero boundary, {self.output}"
        return f"psf {kh}x{kw}, {mode}"
