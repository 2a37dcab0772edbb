"""Resolution target: a Siemens-star sector pattern."""

from __future__ import annotations

import numpy as np

from .._validation import choice, int_at_least, number_in, positive_int
from ._grid import check_shape, render

_PROFILES = ("binary", "sine")


def siemens_star(shape: int | tuple[int, int] = 256, *, spokes: int = 36, radius: float = 0.9,
                 profile: str = "binary", supersample: int = 8) -> np.ndarray:
    """Anti-aliased Siemens star: ``spokes`` bright sectors alternating with dark ones.

    Parameters
    ----------
    shape : int or (int, int), optional
        Image size; the star is centred and the shorter side spans ``[-1, 1]``.
    spokes : int, optional
        Number of bright sectors (angular periods), >= 2.
    radius : float, optional
        Radius of the star in phantom units, in ``(0, 1]``.
    profile : {"binary", "sine"}, optional
        ``"binary"``: level 1 where ``sin(spokes * theta) > 0``, else 0.
        ``"sine"``: level ``(1 + sin(spokes * theta)) / 2``.
    supersample : int, optional
        Sub-pixel samples per axis for anti-aliasing.

    Returns
    -------
    numpy.ndarray
        float64 array of shape ``(H, W)`` in ``[0, 1]``; outside the star the
        level is 0.5, so the star's rim is visible against both sector levels.

    Notes
    -----
    At distance ``r`` (phantom units) from the centre one angular period spans
    the arc ``2 pi r / spokes``, i.e. ``2 pi r / (spokes h)`` pixels for a pixel
    size ``h = 2 / min(H, W)``. The smallest radius at which a reconstruction
    still separates the sectors therefore measures its resolved period; near
    the centre the pattern is finer than the pixel grid and the pixel means
    tend to 0.5.

    Examples
    --------
    >>> star = siemens_star(64, spokes=8)
    >>> star.shape, float(star[0, 0])
    ((64, 64), 0.5)
    """
    shape = check_shape(shape)
    spokes = int_at_least(spokes, "spokes", 2)
    radius = number_in(radius, "radius", 0.0, 1.0, low_open=True)
    choice(profile, "profile", _PROFILES)
    supersample = positive_int(supersample, "supersample")

    def level(x: np.ndarray, y: np.ndarray) -> np.ndarray:
        wave = np.sin(spokes * np.arctan2(y, x))
        inside = np.where(wave > 0, 1.0, 0.0) if profile == "binary" else 0.5 * (1.0 + wave)
        return np.where(np.hypot(x, y) <= radius, inside, 0.5)

    return render(level, shape, supersample)

