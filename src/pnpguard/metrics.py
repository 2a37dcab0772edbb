"""Image-quality metrics against a reference: PSNR and SSIM.

Both take the estimate first and the reference second, accept numpy arrays or
torch tensors shaped ``(H, W)`` or ``(N, C, H, W)`` (float32 or float64, on any
device), compute in float64 with torch, and return a Python float for an
``(H, W)`` image or a float64 numpy array of length ``N`` (one value per image,
over all its channels) for a batch. The data range is always explicit: it is
the scale of the intensities and changes both metrics.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import torch

from ._arrays import ArrayLike, to_tensor
from ._validation import positive_number

# Wang, Bovik, Sheikh & Simoncelli (2004), section III-C: K1 = 0.01, K2 = 0.03 and an
# 11 x 11 circular-symmetric Gaussian window of standard deviation 1.5.
_K1, _K2 = 0.01, 0.03
_SIGMA = 1.5
_RADIUS = 5


def _check_pair(x: ArrayLike, reference: ArrayLike, data_range: Any) -> tuple[torch.Tensor,
                                                                              torch.Tensor, float]:
    est, _ = to_tensor(x, "x")
    ref, _ = to_tensor(reference, "reference")
    if est.shape != ref.shape:
        raise ValueError(
            f"`x` has shape {tuple(est.shape)} but `reference` has shape {tuple(ref.shape)}; "
            "they must be equal"
        )
    data_range = positive_number(data_range, "data_range")
    est = est.to(torch.float64)
    ref = ref.to(device=est.device, dtype=torch.float64)
    return est, ref, data_range


def _per_image(values: torch.Tensor, ndim: int) -> float | np.ndarray:
    """Python float for an (H, W) input, else a float64 numpy array of shape (N,)."""
    values = values.detach().cpu().numpy()
    return float(values.reshape(())) if ndim == 2 else values


def _psnr(
    estimate: torch.Tensor, reference: torch.Tensor, data_range: float, dims: tuple[int, ...] | None = None
) -> torch.Tensor:
    """PSNR in dB of two tensors of one shape, ``+inf`` where they are equal.

    The mean squared error runs over ``dims`` (every axis when None, one value
    for the whole tensor), in the tensors' dtype; callers pass float64.
    ``10 log10(R^2 / 0)`` is defined as ``+inf`` and computed without a
    division (no error, no warning).
    """
    squared = (estimate - reference) ** 2
    mse = squared.mean() if dims is None else squared.mean(dim=dims)
    return torch.where(mse > 0, 10.0 * torch.log10(data_range**2 / mse), torch.full_like(mse, math.inf))


def psnr(x: ArrayLike, reference: ArrayLike, *, data_range: float) -> float | np.ndarray:
    """Peak signal-to-noise ratio in decibels.

    Parameters
    ----------
    x : numpy.ndarray or torch.Tensor
        Estimate, shaped ``(H, W)`` or ``(N, C, H, W)``, float32 or float64.
    reference : numpy.ndarray or torch.Tensor
        Ground truth of the same shape.
    data_range : float
        Range ``R`` of the intensities (e.g. 1.0 for images in ``[0, 1]``),
        keyword-only and required, > 0.

    Returns
    -------
    float or numpy.ndarray
        A float for ``(H, W)`` inputs; for ``(N, C, H, W)`` a float64 array of
        length ``N``, the PSNR of each image over all its channels. ``inf``
        (no error, no warning) where the estimate equals the reference: the
        MSE is then 0 and :math:`R^2 / 0` is taken as :math:`+\\infty`.

    Raises
    ------
    TypeError
        If an input is not a float32/float64 array or tensor, or
        ``data_range`` is not a number.
    ValueError
        If the shapes differ, are not ``(H, W)`` or ``(N, C, H, W)``, an input
        has non-finite entries, or ``data_range`` is not positive and finite.

    Notes
    -----
    .. math:: \\mathrm{PSNR}(x, r) = 10 \\log_{10} \\frac{R^2}{\\mathrm{MSE}},
              \\qquad \\mathrm{MSE} = \\frac{1}{n} \\sum_i (x_i - r_i)^2,

    the mean running over the ``n`` pixels (and channels) of one image.
    The same definition as ``skimage.metrics.peak_signal_noise_ratio`` with
    its ``data_range`` argument.

    Examples
    --------
    >>> import numpy as np
    >>> reference = np.zeros((8, 8))
    >>> round(psnr(reference + 0.1, reference, data_range=1.0), 6)
    20.0
    """
    est, ref, data_range = _check_pair(x, reference, data_range)
    return _per_image(_psnr(est, ref, data_range, None if est.ndim == 2 else (1, 2, 3)), est.ndim)


def _gaussian_window(dtype: torch.dtype, device: torch.device) -> torch.Tensor:
    offsets = torch.arange(-_RADIUS, _RADIUS + 1, dtype=dtype, device=device)
    profile = torch.exp(-(offsets**2) / (2.0 * _SIGMA**2))
    return profile / profile.sum()


def _local_mean(images: torch.Tensor, window: torch.Tensor) -> torch.Tensor:
    """Separable Gaussian-weighted mean over every full 11 x 11 window ('valid' positions)."""
    n = window.numel()
    out = torch.nn.functional.conv2d(images, window.view(1, 1, n, 1))
    return torch.nn.functional.conv2d(out, window.view(1, 1, 1, n))


def ssim(x: ArrayLike, reference: ArrayLike, *, data_range: float) -> float | np.ndarray:
    """Structural similarity index (mean SSIM) with the published settings.

    Parameters
    ----------
    x : numpy.ndarray or torch.Tensor
        Estimate, shaped ``(H, W)`` or ``(N, C, H, W)`` with ``H, W >= 11``,
        float32 or float64, on any device (computed there, in float64).
    reference : numpy.ndarray or torch.Tensor
        Ground truth of the same shape.
    data_range : float
        Range ``R`` of the intensities, keyword-only and required, > 0.

    Returns
    -------
    float or numpy.ndarray
        A float in ``[-1, 1]`` for ``(H, W)`` inputs; for ``(N, C, H, W)`` a
        float64 array of length ``N``, each the mean of the SSIM map over all
        channels of one image. 1 where the estimate equals the reference.

    Raises
    ------
    TypeError
        If an input is not a float32/float64 array or tensor, or
        ``data_range`` is not a number.
    ValueError
        If the shapes differ or are not ``(H, W)`` / ``(N, C, H, W)``, an image
        is smaller than 11 x 11, an input has non-finite entries, or
        ``data_range`` is not positive and finite.

    Notes
    -----
    With Gaussian-weighted local means :math:`\\mu`, variances
    :math:`\\sigma^2` and covariance :math:`\\sigma_{xr}` (weights ``w`` of an
    11 x 11 window, standard deviation 1.5 pixels, normalised to sum 1; the
    population, not sample, covariance),

    .. math:: \\mathrm{SSIM} = \\frac{(2 \\mu_x \\mu_r + C_1)(2 \\sigma_{xr} + C_2)}
              {(\\mu_x^2 + \\mu_r^2 + C_1)(\\sigma_x^2 + \\sigma_r^2 + C_2)},
              \\quad C_1 = (K_1 R)^2,\\ C_2 = (K_2 R)^2,\\ K_1 = 0.01,\\ K_2 = 0.03,

    averaged over the window positions that lie entirely inside the image (so
    no boundary padding enters). This is the setting that
    ``skimage.metrics.structural_similarity`` documents as reproducing the
    paper (``gaussian_weights=True, sigma=1.5, use_sample_covariance=False``,
    ``data_range=R``); the result matches it to rounding.

    References
    ----------
    .. [1] Z. Wang, A. C. Bovik, H. R. Sheikh and E. P. Simoncelli, "Image
       quality assessment: from error visibility to structural similarity",
       IEEE Trans. Image Process. 13(4), 600-612, 2004.
       doi:10.1109/TIP.2003.819861

    Examples
    --------
    >>> import numpy as np
    >>> image = np.linspace(0.0, 1.0, 400).reshape(20, 20)
    >>> ssim(image, image, data_range=1.0)
    1.0
    """
    est, ref, data_range = _check_pair(x, reference, data_range)
    size = 2 * _RADIUS + 1
    if min(est.shape[-2:]) < size:
        raise ValueError(
            f"`x` has shape {tuple(est.shape)}; SSIM needs images of at least "
            f"{size} x {size} pixels (the Gaussian window)"
        )
    batch = est.reshape(-1, 1, *est.shape[-2:])
    truth = ref.reshape(-1, 1, *ref.shape[-2:])
    window = _gaussian_window(est.dtype, est.device)
    stacked = torch.cat([batch, truth, batch * batch, truth * truth, batch * truth], dim=1)
    means = _local_mean(stacked.reshape(-1, 1, *stacked.shape[-2:]), window)
    means = means.reshape(batch.shape[0], 5, *means.shape[-2:])
    mu_x, mu_r, m_xx, m_rr, m_xr = means.unbind(dim=1)
    var_x, var_r, cov = m_xx - mu_x**2, m_rr - mu_r**2, m_xr - mu_x * mu_r
    c1, c2 = (_K1 * data_range) ** 2, (_K2 * data_range) ** 2
    index_map = ((2.0 * mu_x * mu_r + c1) * (2.0 * cov + c2)) / (
        (mu_x**2 + mu_r**2 + c1) * (var_x + var_r + c2)
    )
    if est.ndim == 2:
        return _per_image(index_map.mean(), 2)
    return _per_image(index_map.reshape(est.shape[0], -1).mean(dim=1), 4)
