"""Ellipse phantoms: the Shepp-Logan head, random ellipses, a porous disk.

Images are rendered with anti-aliasing; ellipse tables also have exact line
integrals (:func:`ellipse_projection`) for testing tomographic projectors.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np

from .._validation import choice, nonnegative_int, number, number_in, positive_int, positive_number
from ._grid import (
    check_seed,
    check_shape,
    extent,
    pixel_box,
    render,
)

_VARIANTS = ("modified", "original")


@dataclass(frozen=True)
class Ellipse:
    """A filled ellipse of constant density, in phantom coordinates.

    The set of points is ``(u / a)^2 + (v / b)^2 <= 1`` where ``(u, v)`` are
    the coordinates of ``(x - x0, y - y0)`` rotated by ``-tilt``, i.e. the
    ellipse's ``a`` axis makes the angle ``tilt`` (degrees, counter-clockwise,
    y axis up) with the x axis.

    Attributes
    ----------
    x0, y0 : float
        Centre.
    a, b : float
        Semi-axes (> 0) along the ellipse's own x and y directions.
    tilt : float
        Rotation in degrees, counter-clockwise.
    intensity : float
        Density added inside the ellipse (may be negative).
    """

    x0: float
    y0: float
    a: float
    b: float
    tilt: float = 0.0
    intensity: float = 1.0

    def __post_init__(self) -> None:
        for name in ("x0", "y0", "tilt", "intensity"):
            number(getattr(self, name), name)
        for name in ("a", "b"):
            positive_number(getattr(self, name), name)

    @property
    def half_extent(self) -> tuple[float, float]:
        """Half-width and half-height of the axis-aligned bounding box."""
        c, s = math.cos(math.radians(self.tilt)), math.sin(math.radians(self.tilt))
        return (math.hypot(self.a * c, self.b * s), math.hypot(self.a * s, self.b * c))

    def contains(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Boolean membership of the points ``(x, y)`` (broadcast)."""
        c, s = math.cos(math.radians(self.tilt)), math.sin(math.radians(self.tilt))
        dx, dy = x - self.x0, y - self.y0
        u = (dx * c + dy * s) / self.a
        v = (-dx * s + dy * c) / self.b
        return u * u + v * v <= 1.0


# Shepp & Logan (1974), Table 1, as centre (x0, y0), semi-axes (a, b), tilt, density.
# Their ellipses c and d are listed with their major axis at 72 and 108 degrees from
# the x axis; with the semi-axes written as (a, b) = (minor, major) this is a tilt of
# -18 and +18 degrees.
_SHEPP_LOGAN_GEOMETRY = (
    (0.0, 0.0, 0.69, 0.92, 0.0),
    (0.0, -0.0184, 0.6624, 0.874, 0.0),
    (0.22, 0.0, 0.11, 0.31, -18.0),
    (-0.22, 0.0, 0.16, 0.41, 18.0),
    (0.0, 0.35, 0.21, 0.25, 0.0),
    (0.0, 0.1, 0.046, 0.046, 0.0),
    (0.0, -0.1, 0.046, 0.046, 0.0),
    (-0.08, -0.605, 0.046, 0.023, 0.0),
    (0.0, -0.605, 0.023, 0.023, 0.0),
    (0.06, -0.605, 0.023, 0.046, 0.0),
)
_SHEPP_LOGAN_DENSITY = {
    # Shepp & Logan (1974), Table 1.
    "original": (2.0, -0.98, -0.02, -0.02, 0.01, 0.01, 0.01, 0.01, 0.01, 0.01),
    # Higher-contrast densities (P. Toft, PhD thesis, DTU 1996), from memory; they
    # agree with the levels of skimage.data.shepp_logan_phantom (checked in the tests).
    "modified": (1.0, -0.8, -0.2, -0.2, 0.1, 0.1, 0.1, 0.1, 0.1, 0.1),
}


def shepp_logan_ellipses(*, variant: str = "modified") -> tuple[Ellipse, ...]:
    """The ten ellipses of the Shepp-Logan head phantom.

    Parameters
    ----------
    variant : {"modified", "original"}
        ``"original"``: the published densities (skull 2.0, brain 1.02, fine
        structures 1.0 to 1.04). ``"modified"``: the higher-contrast densities
        (skull 1.0, brain 0.2, ventricles 0.0, fine structures 0.3 to 0.4), so the
        image lies in ``[0, 1]``.

    Returns
    -------
    tuple of Ellipse
        In the published order (skull, brain, right and left ventricle, ...).

    Notes
    -----
    The geometry is that of Shepp & Logan's Table 1 in the square
    ``[-1, 1]^2``. The modified densities are quoted from memory of Toft's
    thesis; they reproduce the grey levels of scikit-image's bundled phantom.

    References
    ----------
    .. [1] L. A. Shepp and B. F. Logan, "The Fourier reconstruction of a head
       section", IEEE Trans. Nucl. Sci. 21(3), 21-43, 1974.
       doi:10.1109/TNS.1974.6499235
    .. [2] P. Toft, "The Radon transform: theory and implementation", PhD
       thesis, Technical University of Denmark, 1996.

    Examples
    --------
    >>> table = shepp_logan_ellipses(variant="original")
    >>> len(table), table[0].intensity
    (10, 2.0)
    """
    choice(variant, "variant", _VARIANTS)
    return tuple(
        Ellipse(*geometry, intensity=density)
        for geometry, density in zip(_SHEPP_LOGAN_GEOMETRY, _SHEPP_LOGAN_DENSITY[variant])
    )


def _check_ellipses(ellipses: Iterable[Ellipse]) -> tuple[Ellipse, ...]:
    table = tuple(ellipses)
    for k, e in enumerate(table):
        if not isinstance(e, Ellipse):
            raise TypeError(f"`ellipses[{k}]` must be an Ellipse, got {type(e).__name__}")
    return table


def _coverage(ellipse: Ellipse, shape: tuple[int, int],
              supersample: int) -> tuple[tuple[slice, slice], np.ndarray] | None:
    hx, hy = ellipse.half_extent
    box = pixel_box(shape, ellipse.x0 - hx, ellipse.x0 + hx, ellipse.y0 - hy, ellipse.y0 + hy)
    if box is None:
        return None
    return box, render(lambda x, y: ellipse.contains(x, y).astype(np.float64), shape,
                       supersample, box)


def render_ellipses(ellipses: Iterable[Ellipse], shape: int | tuple[int, int], *,
                    supersample: int = 4) -> np.ndarray:
    """Anti-aliased image of a sum of constant-density ellipses.

    Parameters
    ----------
    ellipses : iterable of Ellipse
        Densities add where ellipses overlap.
    shape : int or (int, int)
        Image size ``(H, W)`` (an int means square). The shorter side spans
        ``[-1, 1]``; y points up and rows run downwards (see Notes).
    supersample : int, optional
        Each pixel is the mean over ``supersample^2`` sub-pixel points; 1 gives
        point sampling at pixel centres.

    Returns
    -------
    numpy.ndarray
        float64 array of shape ``(H, W)``.

    Notes
    -----
    Pixel ``(i, j)`` of an ``(H, W)`` image with pixel size ``h = 2 / min(H, W)``
    is centred at ``x = (j + 1/2 - W/2) h``, ``y = (H/2 - i - 1/2) h``. Its value
    approximates ``(1 / h^2) * integral over the pixel of sum_k rho_k 1[E_k]``,
    so ``image.sum() * h**2`` approximates the total mass ``sum_k rho_k pi a_k b_k``.
    """
    shape = check_shape(shape)
    supersample = positive_int(supersample, "supersample")
    image = np.zeros(shape)
    for e in _check_ellipses(ellipses):
        found = _coverage(e, shape, supersample)
        if found is not None:
            box, cover = found
            image[box] += e.intensity * cover
    return image


def shepp_logan(shape: int | tuple[int, int] = 256, *, variant: str = "modified",
                supersample: int = 4) -> np.ndarray:
    """Anti-aliased Shepp-Logan head phantom.

    Parameters
    ----------
    shape : int or (int, int), optional
        Image size; the head fills the square ``[-1, 1]^2`` spanned by the
        shorter side (rows downwards, y up: the small ellipses at
        ``y = -0.605`` are near the bottom).
    variant : {"modified", "original"}, optional
        Densities, see :func:`shepp_logan_ellipses`. The modified phantom lies
        in ``[0, 1]``; the original one in ``[0, 2]``.
    supersample : int, optional
        Sub-pixel samples per axis for anti-aliasing.

    Returns
    -------
    numpy.ndarray
        float64 array of shape ``(H, W)``.

    Notes
    -----
    Sums of the table densities are formed in floating point, so a pixel that
    should be 0 can come out as about -1e-16; values are clipped to the exact
    range of the phantom (``[0, 1]`` or ``[0, 2]``), which changes nothing else.

    References
    ----------
    .. [1] L. A. Shepp and B. F. Logan, IEEE Trans. Nucl. Sci. 21(3), 21-43,
       1974. doi:10.1109/TNS.1974.6499235

    Examples
    --------
    >>> image = shepp_logan(64)
    >>> image.shape, float(image.max())
    ((64, 64), 1.0)
    """
    table = shepp_logan_ellipses(variant=variant)
    image = render_ellipses(table, shape, supersample=supersample)
    return np.clip(image, 0.0, table[0].intensity)


def ellipse_projection(ellipses: Iterable[Ellipse], angles_deg: Sequence[float] | np.ndarray,
                       offsets: Sequence[float] | np.ndarray) -> np.ndarray:
    """Exact line integrals (parallel-beam projections) of an ellipse phantom.

    Parameters
    ----------
    ellipses : iterable of Ellipse
        The phantom (densities add).
    angles_deg : array_like
        Projection angles ``phi`` in degrees, counter-clockwise from the x axis.
    offsets : array_like
        Signed distances ``t`` of the lines from the origin, in phantom units.

    Returns
    -------
    numpy.ndarray
        float64 array of shape ``(len(angles_deg), len(offsets))``:
        ``p[k, m]`` is the integral of the phantom along the line
        ``x cos(phi_k) + y sin(phi_k) = t_m`` with respect to arc length.

    Notes
    -----
    For a centred ellipse ``x^2/A^2 + y^2/B^2 <= 1`` of density ``rho``
    (Kak & Slaney, ch. 3)

    .. math:: p(\\phi, t) = \\frac{2 \\rho A B}{a^2(\\phi)} \\sqrt{a^2(\\phi) - t^2},
              \\quad |t| \\le a(\\phi), \\quad
              a^2(\\phi) = A^2 \\cos^2\\phi + B^2 \\sin^2\\phi,

    and zero otherwise. A tilted and shifted ellipse gives
    ``p0(phi - tilt, t - x0 cos(phi) - y0 sin(phi))``. ``phi = 0`` integrates
    along vertical lines (``t = x``), ``phi = 90`` along horizontal lines
    (``t = y``). A projector that sums pixel values times path length in
    pixels over an image with pixel size ``h`` returns ``p / h``.

    References
    ----------
    .. [1] A. C. Kak and M. Slaney, Principles of Computerized Tomographic
       Imaging, IEEE Press, 1988, ch. 3.

    Examples
    --------
    >>> disk = [Ellipse(0.0, 0.0, 0.5, 0.5, intensity=1.0)]
    >>> round(float(ellipse_projection(disk, [30.0], [0.0])[0, 0]), 12)
    1.0
    """
    table = _check_ellipses(ellipses)
    phi = np.radians(_check_vector(angles_deg, "angles_deg"))[:, None]
    t = _check_vector(offsets, "offsets")[None, :]
    out = np.zeros((phi.shape[0], t.shape[1]))
    for e in table:
        local = phi - math.radians(e.tilt)
        a2 = (e.a * np.cos(local)) ** 2 + (e.b * np.sin(local)) ** 2
        shift = t - e.x0 * np.cos(phi) - e.y0 * np.sin(phi)
        chord = np.sqrt(np.clip(a2 - shift**2, 0.0, None))
        out += 2.0 * e.intensity * e.a * e.b / a2 * chord
    return out


def _check_vector(values: Sequence[float] | np.ndarray, name: str) -> np.ndarray:
    array = np.atleast_1d(np.asarray(values))
    if array.ndim != 1 or array.dtype.kind not in "iuf":
        raise ValueError(f"`{name}` must be a 1-D array of real numbers, got {values!r}")
    array = array.astype(np.float64)
    if not np.isfinite(array).all():
        raise ValueError(f"`{name}` must be finite")
    return array


def random_ellipses(shape: int | tuple[int, int] = 256, *, seed: int | np.random.Generator = 0,
                    count: int = 12, supersample: int = 4) -> np.ndarray:
    """Piecewise-constant image of overlapping random ellipses on a black background.

    Ellipses are painted one over the other (a later ellipse hides the earlier
    ones), each with a grey level drawn uniformly from ``[0.1, 1]``, centre
    uniform over the image, semi-axes in ``[0.05, 0.45]`` and uniform tilt.

    Parameters
    ----------
    shape : int or (int, int), optional
        Image size.
    seed : int or numpy.random.Generator, optional
        Seed of the generator; the same seed gives the same image.
    count : int, optional
        Number of ellipses.
    supersample : int, optional
        Sub-pixel samples per axis for anti-aliasing (edge pixels blend the
        levels by covered area).

    Returns
    -------
    numpy.ndarray
        float64 array of shape ``(H, W)`` in ``[0, 1]``.

    Examples
    --------
    >>> image = random_ellipses(32, seed=3)
    >>> bool((image >= 0).all() and (image <= 1).all())
    True
    """
    shape = check_shape(shape)
    rng = check_seed(seed)
    count = positive_int(count, "count")
    supersample = positive_int(supersample, "supersample")
    half_x, half_y = extent(shape)
    image = np.zeros(shape)
    for _ in range(count):
        ellipse = Ellipse(
            rng.uniform(-half_x, half_x), rng.uniform(-half_y, half_y),
            rng.uniform(0.05, 0.45), rng.uniform(0.05, 0.45), rng.uniform(0.0, 180.0),
            rng.uniform(0.1, 1.0),
        )
        found = _coverage(ellipse, shape, supersample)
        if found is not None:
            box, cover = found
            image[box] += cover * (ellipse.intensity - image[box])
    return image


def porous_disk_ellipses(*, seed: int | np.random.Generator = 0, holes: int = 40,
                         inclusions: int = 8, radius: float = 0.85,
                         level: float = 0.5) -> tuple[Ellipse, ...]:
    """Ellipse table of a porous test object: a disk with small holes and inclusions.

    Parameters
    ----------
    seed : int or numpy.random.Generator, optional
        Seed of the generator.
    holes, inclusions : int, optional
        Numbers of empty pores (density 0) and dense grains (density 1).
    radius : float, optional
        Radius of the disk, in ``(0, 1]``.
    level : float, optional
        Density of the disk material, in ``(0, 1)``.

    Returns
    -------
    tuple of Ellipse
        The disk first, then features with densities ``-level`` (holes) and
        ``1 - level`` (inclusions), so that the sum of the table has density 0
        in a hole and 1 in an inclusion. Features are small ellipses (semi-axes
        log-uniform in ``[0.012, 0.07]``, aspect ratio ``>= 0.6``) that do not
        touch each other (centre distance >= sum of major semi-axes + 0.02) and
        stay 0.03 inside the disk edge.

    Raises
    ------
    ValueError
        If the features cannot all be placed (too many for the disk).

    Notes
    -----
    Because features never overlap, :func:`ellipse_projection` of this table
    gives the exact sinogram of :func:`porous_disk`.
    """
    rng = check_seed(seed)
    holes = nonnegative_int(holes, "holes")
    inclusions = nonnegative_int(inclusions, "inclusions")
    radius = number_in(radius, "radius", 0.0, 1.0, low_open=True)
    # level < 1 keeps the inclusions (1 - level) denser than the matrix.
    level = number_in(level, "level", 0.0, 1.0, low_open=True, high_open=True)
    n = holes + inclusions
    sizes = np.sort(np.exp(rng.uniform(math.log(0.012), math.log(0.07), n)))[::-1]
    densities = rng.permutation(np.r_[np.full(holes, -level), np.full(inclusions, 1.0 - level)])
    placed: list[tuple[float, float, float]] = []
    features = []
    for major, density in zip(sizes, densities):
        for _ in range(2000):
            r = (radius - 0.03 - major) * math.sqrt(rng.uniform())
            angle = rng.uniform(0.0, 2.0 * math.pi)
            x, y = r * math.cos(angle), r * math.sin(angle)
            if all(math.hypot(x - px, y - py) >= major + pr + 0.02 for px, py, pr in placed):
                break
        else:
            raise ValueError(
                f"could not place {n} non-touching features in a disk of radius {radius}; "
                "ask for fewer `holes` / `inclusions` or a larger `radius`"
            )
        placed.append((x, y, major))
        minor = major * rng.uniform(0.6, 1.0)
        features.append(Ellipse(x, y, major, minor, rng.uniform(0.0, 180.0), density))
    return (Ellipse(0.0, 0.0, radius, radius, 0.0, level), *features)


def porous_disk(shape: int | tuple[int, int] = 256, *, seed: int | np.random.Generator = 0,
                holes: int = 40, inclusions: int = 8, radius: float = 0.85,
                level: float = 0.5, supersample: int = 4) -> np.ndarray:
    """Porous test object for sparse-view tomography, rendered with anti-aliasing.

    A disk of density ``level`` with small empty pores and a few dense grains;
    see :func:`porous_disk_ellipses` for the parameters and the exact sinogram.

    Returns
    -------
    numpy.ndarray
        float64 array of shape ``(H, W)`` in ``[0, 1]``.

    Examples
    --------
    >>> image = porous_disk(64, seed=1)
    >>> image.shape, float(image[32, 2])
    ((64, 64), 0.0)
    """
    table = porous_disk_ellipses(seed=seed, holes=holes, inclusions=inclusions,
                                 radius=radius, level=level)
    image = render_ellipses(table, shape, supersample=supersample)
    return np.clip(image, 0.0, 1.0)
