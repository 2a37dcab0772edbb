"""Gaussian smoothing with a periodic boundary: a linear symmetric denoiser."""

from __future__ import annotations

import math

import numpy as np
import torch

from .._arrays import check_image_shape
from .._validation import image_shape, positive_number
from ..operators._base import Shape
from ._base import Denoiser
from ._facts import Fact

#: Samples of [0, pi] used to bound the kernel's frequency response from below.
_RESPONSE_SAMPLES = 16385
#: Subtracted from computed eigenvalue minima to cover floating-point rounding.
_ROUNDING_ALLOWANCE = 1e-14


def gaussian_taps(width: float, truncate: float) -> np.ndarray:
    """The 1-D sampled Gaussian of standard deviation ``width`` pixels, unit sum.

    Radius ``int(truncate * width + 0.5)`` taps on each side, exactly as
    :func:`scipy.ndimage.gaussian_filter` builds its kernel.
    """
    radius = int(truncate * width + 0.5)
    offsets = np.arange(-radius, radius + 1, dtype=np.float64)
    taps = np.exp(-0.5 * (offsets / width) ** 2)
    return taps / taps.sum()


def periodic_response(taps: np.ndarray, n: int) -> np.ndarray:
    """Eigenvalues of the ``n``-periodic convolution with symmetric ``taps``.

    The kernel is wrapped around a circle of ``n`` samples (taps beyond the
    period add up), so the result is the kernel's frequency response
    ``H(w) = t_0 + 2 sum_k t_k cos(k w)`` at ``w = 2 pi j / n``.
    """
    radius = taps.size // 2
    folded = np.zeros(n)
    np.add.at(folded, np.arange(-radius, radius + 1) % n, taps)
    return np.fft.fft(folded).real


def response_lower_bound(taps: np.ndarray) -> float:
    """A proven lower bound on ``min_w H(w)`` over all frequencies ``w``.

    ``H`` is sampled on a uniform grid of spacing ``d`` over ``[0, pi]``
    (``H`` is even and 2 pi-periodic); between samples ``H`` lies above its
    linear interpolant minus ``max |H''| d^2 / 8`` (error of linear
    interpolation), and ``|H''| <= 2 sum_k k^2 |t_k|``.
    """
    radius = taps.size // 2
    k = np.arange(1, radius + 1, dtype=np.float64)
    side = taps[radius + 1 :]
    grid = np.linspace(0.0, math.pi, _RESPONSE_SAMPLES)
    response = taps[radius] + 2.0 * np.cos(np.outer(grid, k)) @ side
    spacing = math.pi / (_RESPONSE_SAMPLES - 1)
    curvature = 2.0 * float(np.sum(k**2 * np.abs(side)))
    return float(response.min()) - curvature * spacing**2 / 8.0


class GaussianSmoothing(Denoiser):
    """Convolution with a sampled Gaussian, periodic boundary.

    ``D x = g * x`` (circular convolution) with ``g`` the separable sampled
    Gaussian of standard deviation ``width`` pixels truncated at
    ``truncate * width`` (the kernel of :func:`scipy.ndimage.gaussian_filter`,
    ``mode="wrap"``), computed with the FFT. Differentiable.

    Parameters
    ----------
    width : float
        Standard deviation of the Gaussian in pixels, > 0.
    shape : tuple of int, optional
        ``(H, W)`` of the images. When given, the spectrum fact is exact for
        that size and other sizes are rejected; when omitted, the fact holds
        for every image size (see Notes).
    sigma : float, optional
        The noise level the smoothing is meant for (recorded only; the
        smoothing is set by ``width``).
    truncate : float
        Truncation radius in standard deviations (scipy's default 4.0).
    name : str
        Name used in reports.

    Notes
    -----
    The periodic convolution with a symmetric kernel is a symmetric matrix
    diagonalised by the 2-D DFT; its eigenvalues are ``h(u, v) = H(u) H(v)``
    with ``H`` the 1-D frequency response at the DFT frequencies [1]_. The
    library records ``Fact("linear_symmetric", spectrum=(min h, max h))``,
    hence ``lipschitz = max |h|`` and ``theta = (1 - min h) / 2``.

    - With ``shape`` given: ``min h`` over that grid.
    - Without ``shape``: ``min h`` is bounded below by ``m^2`` when the bound
      ``m`` of :func:`response_lower_bound` on ``min_w H(w)`` is >= 0,
      otherwise by ``m``, which holds for every image size because the DFT
      samples ``H``.

    In both cases ``max h = H(0) = 1`` (unit sum, and ``|H| <= sum |t_k| = 1``),
    and the lower end is lowered by 1e-14 to cover floating-point rounding.

    References
    ----------
    .. [1] P. C. Hansen, J. G. Nagy and D. P. O'Leary, *Deblurring Images:
       Matrices, Spectra, and Filtering*, SIAM, 2006, ch. 4
       (FFT diagonalisation of periodic convolutions).

    Examples
    --------
    >>> den = GaussianSmoothing(1.0, shape=(32, 32))
    >>> fact = den.facts[0]
    >>> fact.kind, round(fact.spectrum[1], 12), fact.theta < 0.5
    ('linear_symmetric', 1.0, True)
    """

    def __init__(
        self,
        width: float,
        *,
        shape: Shape | None = None,
        sigma: float | None = None,
        truncate: float = 4.0,
        name: str = "gaussian",
    ):
        self.width = positive_number(width, "width")
        self.truncate = positive_number(truncate, "truncate")
        self.shape = None if shape is None else image_shape(shape, "shape")
        self._taps = gaussian_taps(self.width, self.truncate)
        self._transfers: dict[tuple, torch.Tensor] = {}
        super().__init__(
            name=name, sigma=sigma, differentiable=True, facts=(self._spectrum_fact(),)
        )

    def _spectrum_fact(self) -> Fact:
        if self.shape is not None:
            rows = periodic_response(self._taps, self.shape[0])
            cols = periodic_response(self._taps, self.shape[1])
            low = float(np.outer(rows, cols).min())
            how = f"exact for {self.shape[0]}x{self.shape[1]} images"
        else:
            bound = response_lower_bound(self._taps)
            low = bound**2 if bound >= 0 else bound
            how = "an enclosure valid for every image size"
        # max h = H(0) = sum of the taps = 1 exactly; the minimum less a rounding allowance
        spectrum = (low - _ROUNDING_ALLOWANCE, 1.0)
        return Fact.linear_symmetric(
            spectrum,
            "periodic convolution with a symmetric Gaussian kernel is diagonalised by the 2-D "
            f"DFT; spectrum = the kernel's DFT, {how} (Hansen, Nagy & O'Leary 2006, ch. 4)",
            verified=True,
        )

    def _transfer(self, t: torch.Tensor) -> torch.Tensor:
        height, width = t.shape[-2:]
        key = (height, width, t.dtype, t.device)
        if key not in self._transfers:
            rows = periodic_response(self._taps, height)
            cols = periodic_response(self._taps, width)[: width // 2 + 1]
            transfer = torch.from_numpy(np.outer(rows, cols))
            self._transfers[key] = transfer.to(dtype=t.dtype, device=t.device)
        return self._transfers[key]

    def _denoise(self, t: torch.Tensor) -> torch.Tensor:
        if self.shape is not None:
            check_image_shape(t, self.shape, "x", "image shape this smoothing was built for")
        spectrum = torch.fft.rfft2(t) * self._transfer(t)
        return torch.fft.irfft2(spectrum, s=tuple(t.shape[-2:]))
