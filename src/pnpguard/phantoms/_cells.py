"""Synthetic fluorescence-microscopy frame of cells (the lab's deblurring test image)."""

from __future__ import annotations

import math

import numpy as np
from scipy.special import expit, ndtr

from .._validation import positive_int
from ._fields import SmoothField
from ._grid import (
    check_seed,
    check_shape,
    extent,
    pixel_box,
    pixel_centres,
    pixel_size,
    render,
)

_STEP = 1e-3  # spacing of the points that trace a filament, in phantom units
_SPLAT_CHUNK = 2048  # Gaussian footprints handled at once (bounds memory)
_TRUNCATE = 8.0  # half-width of a footprint in standard deviations


class _Blob:
    """A star-shaped region: an ellipse whose radius is modulated by a few harmonics."""

    def __init__(self, rng: np.random.Generator, x0: float, y0: float, radius: float,
                 roughness: float):
        self.x0, self.y0, self.radius = x0, y0, radius
        self.stretch = math.sqrt(rng.uniform(1.0, 1.6))
        self.angle = rng.uniform(0.0, math.pi)
        self.orders = np.arange(2, 6)
        self.amplitude = rng.uniform(0.0, roughness, self.orders.size) / self.orders
        self.phase = rng.uniform(0.0, 2.0 * math.pi, self.orders.size)

    @property
    def reach(self) -> float:
        """Radius of a disk about the centre that holds the whole blob."""
        return self.radius * self.stretch * (1.0 + self.amplitude.sum()) * 1.1

    @property
    def render_reach(self) -> float:
        """Radius beyond which the soft edge of the body is below 1e-6 (excess > 0.3)."""
        return self.radius * self.stretch * (1.0 + self.amplitude.sum() + 0.3)

    def excess(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Normalised radial distance beyond the boundary (< 0 inside, > 0 outside)."""
        c, s = math.cos(self.angle), math.sin(self.angle)
        dx, dy = x - self.x0, y - self.y0
        u = (dx * c + dy * s) / (self.radius * self.stretch)
        v = (-dx * s + dy * c) * self.stretch / self.radius
        rho, theta = np.hypot(u, v), np.arctan2(v, u)
        boundary = 1.0 + sum(a * np.cos(k * theta + p)
                             for a, k, p in zip(self.amplitude, self.orders, self.phase))
        return rho - boundary


class _Cell:
    def __init__(self, rng: np.random.Generator, x0: float, y0: float, radius: float):
        self.body = _Blob(rng, x0, y0, radius, roughness=0.25)
        shift = rng.uniform(0.0, 0.2 * radius)
        direction = rng.uniform(0.0, 2.0 * math.pi)
        self.nucleus = _Blob(rng, x0 + shift * math.cos(direction),
                             y0 + shift * math.sin(direction),
                             radius * rng.uniform(0.35, 0.5), roughness=0.1)
        self.cytoplasm_level = rng.uniform(0.15, 0.3)
        self.nucleus_level = rng.uniform(0.35, 0.55)
        self.coarse = SmoothField(rng, 3.0, 8.0)
        self.fine = SmoothField(rng, 15.0, 30.0)
        self.chromatin = SmoothField(rng, 20.0, 40.0)

    def __call__(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        body = expit(-self.body.excess(x, y) / 0.02)
        nucleus = expit(-self.nucleus.excess(x, y) / 0.04)
        cytoplasm = self.cytoplasm_level * (
            1.0 + 0.25 * np.tanh(self.coarse(x, y)) + 0.15 * np.tanh(self.fine(x, y)))
        chromatin = self.nucleus_level * (1.0 + 0.3 * np.tanh(self.chromatin(x, y)))
        return body * ((1.0 - nucleus) * cytoplasm + nucleus * chromatin)

    def filament(self, rng: np.random.Generator) -> np.ndarray:
        """Points ``(n, 2)`` of a smooth random curve from near the nucleus towards the edge."""
        start_angle = rng.uniform(0.0, 2.0 * math.pi)
        start = np.array([self.nucleus.x0, self.nucleus.y0]) + rng.uniform(0.2, 1.0) * (
            self.nucleus.radius * np.array([math.cos(start_angle), math.sin(start_angle)]))
        length = self.body.reach * rng.uniform(0.6, 1.6)
        s = np.arange(0.0, length, _STEP)
        # Curvature (radians per unit length): a few random slow oscillations.
        curvature = sum(rng.uniform(-8.0, 8.0) * np.sin(2.0 * math.pi * s / rng.uniform(0.1, 0.6)
                                                        + rng.uniform(0.0, 2.0 * math.pi))
                        for _ in range(3))
        heading = start_angle + rng.uniform(-0.6, 0.6) + np.cumsum(curvature) * _STEP
        points = start + np.cumsum(np.stack([np.cos(heading), np.sin(heading)], axis=1) * _STEP,
                                   axis=0)
        outside = self.body.excess(points[:, 0], points[:, 1]) > -0.05
        stop = int(np.argmax(outside)) if outside.any() else len(points)
        return points[:stop]

    def puncta(self, rng: np.random.Generator, count: int) -> np.ndarray:
        """``count`` points ``(count, 2)`` drawn uniformly inside the cell body."""
        reach = self.body.reach
        found = np.empty((0, 2))
        while len(found) < count:
            trial = rng.uniform(-reach, reach, (4 * count, 2)) + [self.body.x0, self.body.y0]
            found = np.vstack([found, trial[self.body.excess(trial[:, 0], trial[:, 1]) < -0.1]])
        return found[:count]


def _splat(image: np.ndarray, points: np.ndarray, sigma: np.ndarray, mass: np.ndarray) -> None:
    """Add isotropic Gaussians (given total mass) to ``image``, averaged exactly over pixels.

    The pixel mean of a Gaussian is separable: the product of two differences
    of the normal CDF at the pixel edges, divided by the pixel area. Each
    Gaussian is truncated to a window of +-8 standard deviations (mass left
    out: about 1e-15 of its total).
    """
    height, width = image.shape
    h = pixel_size(image.shape)
    reach = _TRUNCATE * sigma
    size = int(math.ceil(2.0 * reach.max() / h)) + 2
    kx, ky = min(width, size), min(height, size)
    col0 = np.clip(np.floor((points[:, 0] - reach) / h + width / 2.0), 0, width - kx).astype(int)
    row0 = np.clip(np.floor(height / 2.0 - (points[:, 1] + reach) / h), 0, height - ky).astype(int)
    flat = np.zeros(height * width)
    for start in range(0, len(points), _SPLAT_CHUNK):
        part = slice(start, start + _SPLAT_CHUNK)
        cols = col0[part, None] + np.arange(kx)
        rows = row0[part, None] + np.arange(ky)
        px, py, s = points[part, 0, None], points[part, 1, None], sigma[part, None]
        left = (cols - width / 2.0) * h
        top = (height / 2.0 - rows) * h
        wx = ndtr((left + h - px) / s) - ndtr((left - px) / s)
        wy = ndtr((top - py) / s) - ndtr((top - h - py) / s)
        weight = (mass[part, None, None] / h**2) * wy[:, :, None] * wx[:, None, :]
        index = rows[:, :, None] * width + cols[:, None, :]
        flat += np.bincount(index.ravel(), weights=weight.ravel(), minlength=flat.size)
    image += flat.reshape(height, width)


def cells(shape: int | tuple[int, int] = 256, *, seed: int | np.random.Generator = 0,
          count: int = 6, supersample: int = 2) -> np.ndarray:
    """Synthetic fluorescence-microscopy frame of cells on a dark background.

    Each cell is a smooth irregular blob (cytoplasm with coarse and fine
    texture) holding a brighter textured nucleus, fine curved filaments running
    from near the nucleus towards the cell edge, and small bright puncta
    (vesicles). Overlapping cells add their fluorescence. The background is a
    faint smooth autofluorescence.

    Parameters
    ----------
    shape : int or (int, int), optional
        Image size. The scene is defined in phantom coordinates (the shorter
        side spans ``[-1, 1]``, y up, rows downwards), so for square images the
        same seed draws the same cells at any resolution.
    seed : int or numpy.random.Generator, optional
        Seed of the generator; the same seed gives the same image.
    count : int, optional
        Number of cells (radii 0.16 to 0.28 phantom units; cells may be cut
        by the image border).
    supersample : int, optional
        Sub-pixel samples per axis for the cell bodies. Filaments and puncta
        are Gaussians whose pixel means are computed exactly.

    Returns
    -------
    numpy.ndarray
        float64 array of shape ``(H, W)`` in ``[0, 1]``, scaled so that its
        maximum is 1.

    Raises
    ------
    ValueError
        If ``count`` cells do not fit without heavy overlap.

    Notes
    -----
    Filaments are curves with random smoothly varying curvature, drawn as
    lines with a Gaussian cross-section of standard deviation 0.002 to 0.004
    phantom units (0.25 to 0.5 pixel at 256 x 256): finer than the blur of a
    typical widefield microscope, which is what a deblurring method must
    restore. The levels are illustrative, not calibrated to any stain.

    Examples
    --------
    >>> frame = cells(64, seed=2)
    >>> frame.shape, float(frame.max())
    ((64, 64), 1.0)
    """
    shape = check_shape(shape)
    rng = check_seed(seed)
    count = positive_int(count, "count")
    supersample = positive_int(supersample, "supersample")
    half_x, half_y = extent(shape)

    x, y = pixel_centres(shape)
    background = SmoothField(rng, 0.3, 1.0)
    image = 0.03 + 0.015 * np.tanh(background(x[None, :], y[:, None]))

    population: list[_Cell] = []
    for _ in range(count):
        for _ in range(500):
            cell = _Cell(rng, rng.uniform(-half_x, half_x), rng.uniform(-half_y, half_y),
                         rng.uniform(0.16, 0.28))
            if all(math.hypot(cell.body.x0 - o.body.x0, cell.body.y0 - o.body.y0)
                   >= 0.8 * (cell.body.reach + o.body.reach) for o in population):
                population.append(cell)
                break
        else:
            raise ValueError(f"could not place {count} cells in a {shape} frame; ask for fewer")

    points, sigma, mass = [], [], []
    for cell in population:
        reach = cell.body.render_reach
        box = pixel_box(shape, cell.body.x0 - reach, cell.body.x0 + reach,
                        cell.body.y0 - reach, cell.body.y0 + reach)
        if box is not None:
            image[box] += render(cell, shape, supersample, box)
        for _ in range(rng.integers(4, 11)):
            line = cell.filament(rng)
            width = rng.uniform(0.002, 0.004)
            peak = rng.uniform(0.2, 0.45)
            # A line of density lam per unit length and Gaussian profile sigma has
            # peak lam / (sqrt(2 pi) sigma); each traced point carries lam * step.
            points.append(line)
            sigma.append(np.full(len(line), width))
            mass.append(np.full(len(line), peak * math.sqrt(2.0 * math.pi) * width * _STEP))
        n_puncta = int(rng.integers(8, 25))
        spot = rng.uniform(0.003, 0.007, n_puncta)
        points.append(cell.puncta(rng, n_puncta))
        sigma.append(spot)
        mass.append(rng.uniform(0.15, 0.45, n_puncta) * 2.0 * math.pi * spot**2)
    _splat(image, np.concatenate(points), np.concatenate(sigma), np.concatenate(mass))
    return image / image.max()
