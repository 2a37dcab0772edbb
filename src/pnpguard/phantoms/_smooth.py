"""Piecewise-smooth images: smooth shading inside random regions with sharp borders."""

from __future__ import annotations

import math

import numpy as np

from .._validation import positive_int
from ._fields import SmoothField
from ._grid import check_seed, check_shape, extent, render


def piecewise_smooth(shape: int | tuple[int, int] = 256, *, seed: int | np.random.Generator = 0,
                     regions: int = 8, supersample: int = 4) -> np.ndarray:
    """Random regions with curved borders, each filled with its own smooth shading.

    The regions are the cells of a Voronoi partition of randomly warped
    coordinates (so the borders are smooth curves, not straight lines). Inside
    region ``k`` the level is

    .. math:: f_k(z) = c_k + 0.15 \\tanh(g_k \\cdot z - o_k)
              + 0.05 \\sin(2 \\pi\\, q_k \\cdot z + \\varphi_k),

    with ``c_k`` uniform in ``[0.2, 0.8]``, so ``f_k`` lies in ``[0, 1]``
    without clipping: a smooth ramp plus a gentle ripple, with jumps only at
    region borders.

    Parameters
    ----------
    shape : int or (int, int), optional
        Image size (shorter side spans ``[-1, 1]``, y up, rows downwards).
    seed : int or numpy.random.Generator, optional
        Seed of the generator; the same seed gives the same image.
    regions : int, optional
        Number of regions (Voronoi sites), >= 1.
    supersample : int, optional
        Sub-pixel samples per axis for anti-aliasing of the borders.

    Returns
    -------
    numpy.ndarray
        float64 array of shape ``(H, W)`` in ``[0, 1]``.

    Examples
    --------
    >>> image = piecewise_smooth(48, seed=5, regions=3)
    >>> image.shape, bool(0 <= image.min() and image.max() <= 1)
    ((48, 48), True)
    """
    shape = check_shape(shape)
    rng = check_seed(seed)
    regions = positive_int(regions, "regions")
    supersample = positive_int(supersample, "supersample")
    half_x, half_y = extent(shape)
    sites = rng.uniform((-half_x, -half_y), (half_x, half_y), (regions, 2))
    warp_x, warp_y = SmoothField(rng, 0.3, 1.2), SmoothField(rng, 0.3, 1.2)
    level = rng.uniform(0.2, 0.8, regions)
    ramp_angle = rng.uniform(0.0, 2.0 * math.pi, regions)
    ramp = rng.uniform(0.5, 3.0, regions)[:, None] * np.stack(
        [np.cos(ramp_angle), np.sin(ramp_angle)], axis=1)
    ramp_offset = rng.uniform(-1.0, 1.0, regions)
    ripple_angle = rng.uniform(0.0, 2.0 * math.pi, regions)
    ripple = rng.uniform(0.3, 1.5, regions)[:, None] * np.stack(
        [np.cos(ripple_angle), np.sin(ripple_angle)], axis=1)
    ripple_phase = rng.uniform(0.0, 2.0 * math.pi, regions)

    def value(x: np.ndarray, y: np.ndarray) -> np.ndarray:
        wx = x + 0.15 * np.tanh(warp_x(x, y))
        wy = y + 0.15 * np.tanh(warp_y(x, y))
        distance = [(wx - sx) ** 2 + (wy - sy) ** 2 for sx, sy in sites]
        k = np.argmin(distance, axis=0)
        shading = (
            level[k]
            + 0.15 * np.tanh(ramp[k, 0] * x + ramp[k, 1] * y - ramp_offset[k])
            + 0.05 * np.sin(2.0 * math.pi * (ripple[k, 0] * x + ripple[k, 1] * y) + ripple_phase[k])
        )
        return shading

    return render(value, shape, supersample)
