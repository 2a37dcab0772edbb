"""The held-out evaluation behind the PSNR figures recorded with the shipped weights."""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np

from ..metrics import psnr
from ._data import HELD_OUT_IMAGES, bundled_image

#: Noise levels (on the 0-255 scale) of the recorded figures.
EVALUATION_LEVELS = (15, 25, 50)


def noisy_copy(image: np.ndarray, sigma: float, *, seed: int = 0) -> np.ndarray:
    """``image + sigma * n`` with ``n`` standard normal from ``default_rng(seed)`` (float32).

    The same ``n`` is used for every ``sigma``, so figures at different levels
    differ only by the level.
    """
    rng = np.random.default_rng(seed)
    noise = rng.standard_normal(image.shape).astype(np.float32)
    return (image + np.float32(sigma) * noise).astype(np.float32)


def held_out_table(
    denoise: Callable[[np.ndarray, float], np.ndarray],
    *,
    names: Sequence[str] = HELD_OUT_IMAGES,
    levels: Sequence[int] = EVALUATION_LEVELS,
    seed: int = 0,
) -> dict[str, dict[str, float]]:
    """PSNR (dB) of ``denoise(noisy, sigma)`` on held-out pictures at several levels.

    Parameters
    ----------
    denoise : callable
        ``denoise(noisy, sigma) -> estimate`` on 2-D float32 arrays in [0, 1]
        units, ``sigma = level / 255``.
    names : sequence of str, optional
        Bundled scikit-image pictures (default: the held-out set).
    levels : sequence of int, optional
        Noise levels on the 0-255 scale.
    seed : int, optional
        Seed of the noise (see :func:`noisy_copy`).

    Returns
    -------
    dict
        ``table[name][str(level)] = psnr`` (:func:`pnpguard.psnr`, data
        range 1; ``inf`` for an estimate equal to the clean picture).
    """
    table: dict[str, dict[str, float]] = {}
    for name in names:
        clean = bundled_image(name)
        table[name] = {}
        for level in levels:
            sigma = level / 255.0
            table[name][str(level)] = psnr(denoise(noisy_copy(clean, sigma, seed=seed), sigma), clean, data_range=1.0)
    return table
