"""Point-spread-function builders (all normalised to unit sum, float64 numpy)."""

from __future__ import annotations

import math

import numpy as np

from .._validation import number, number_in, positive_int, positive_number


def _odd_size(size: int) -> int:
    size = positive_int(size, "size")
    if size % 2 == 0:
        raise ValueError(f"`size` must be a positive odd integer, got {size!r}")
    return size


def _normalise(psf: np.ndarray) -> np.ndarray:
    return psf / psf.sum()


def gaussian_psf(size: int, sigma: float) -> np.ndarray:
    """Sampled isotropic Gaussian point-spread function, normalised to unit sum.

    Parameters
    ----------
    size : int
        Odd side length of the square kernel; the centre is pixel ``size // 2``.
    sigma : float
        Standard deviation in pixels, > 0.

    Returns
    -------
    numpy.ndarray
        ``(size, size)`` float64 array summing to 1.

    Examples
    --------
    >>> psf = gaussian_psf(7, 1.5)
    >>> psf.shape, round(float(psf.sum()), 12)
    ((7, 7), 1.0)
    """
    size = _odd_size(size)
    sigma = positive_number(sigma, "sigma")
    offsets = np.arange(size) - size // 2
    profile = np.exp(-(offsets**2) / (2.0 * sigma**2))
    return _normalise(np.outer(profile, profile))


def disk_psf(radius: float, size: int | None = None) -> np.ndarray:
    """Uniform disk (defocus) point-spread function, normalised to unit sum.

    Each pixel's weight is the fraction of its area inside the disk, estimated
    on a 16 x 16 sub-pixel grid, so small radii are not all-or-nothing.

    Parameters
    ----------
    radius : float
        Disk radius in pixels, > 0.
    size : int, optional
        Odd side length; default ``2 * ceil(radius) + 1``.
    """
    radius = positive_number(radius, "radius")
    size = _odd_size(2 * math.ceil(radius) + 1 if size is None else size)
    sub = 16
    fine = (np.arange(size * sub) + 0.5) / sub - size / 2.0
    inside = (fine[:, None] ** 2 + fine[None, :] ** 2) <= radius**2
    coverage = inside.reshape(size, sub, size, sub).mean(axis=(1, 3))
    return _normalise(coverage)


def motion_psf(length: float, angle: float, size: int | None = None) -> np.ndarray:
    """Linear motion-blur point-spread function, normalised to unit sum.

    A segment of the given length through the kernel centre, at ``angle``
    degrees counter-clockwise from the horizontal axis (rows grow downwards),
    rasterised by sampling 64 points per pixel of length with bilinear weights.

    Parameters
    ----------
    length : float
        Length of the motion in pixels, >= 1.
    angle : float
        Direction in degrees.
    size : int, optional
        Odd side length; default the smallest odd size holding the segment.
    """
    length = number_in(length, "length", 1.0, math.inf)
    angle = number(angle, "angle")
    size = _odd_size(2 * math.ceil(length / 2.0) + 1 if size is None else size)
    centre = size // 2
    theta = math.radians(angle)
    steps = max(2, int(64 * length))
    t = np.linspace(-length / 2.0, length / 2.0, steps)
    cols = centre + t * math.cos(theta)
    rows = centre - t * math.sin(theta)
    psf = np.zeros((size, size))
    r0, c0 = np.floor(rows).astype(int), np.floor(cols).astype(int)
    fr, fc = rows - r0, cols - c0
    for dr, dc, weight in (
        (0, 0, (1 - fr) * (1 - fc)),
        (0, 1, (1 - fr) * fc),
        (1, 0, fr * (1 - fc)),
        (1, 1, fr * fc),
    ):
        rr, cc = r0 + dr, c0 + dc
        keep = (rr >= 0) & (rr < size) & (cc >= 0) & (cc < size)
        np.add.at(psf, (rr[keep], cc[keep]), weight[keep])
    return _normalise(psf)
