"""Pixel grid of the phantom coordinate system, rendering and argument checks.

Every generated phantom is a function of continuous coordinates ``(x, y)``
with the y axis pointing up. An image of shape ``(H, W)`` has square pixels of
side ``h = 2 / min(H, W)`` centred on the origin, so the shorter image side
spans exactly ``[-1, 1]`` and a square image covers the square ``[-1, 1]^2``.
Rows run downwards: row 0 is the top (largest ``y``), column 0 the left
(smallest ``x``). Pixel ``(i, j)`` has its centre at

    x_j = (j + 1/2 - W/2) h,    y_i = (H/2 - i - 1/2) h.

A pixel value is the mean of the continuous function over the pixel,
estimated on a ``supersample x supersample`` grid of sub-pixel centres.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import numpy as np

from .._validation import image_shape, is_integer, nonnegative_int

# Sub-pixel evaluations per rendering chunk: bounds temporary memory (common practice).
_CHUNK_POINTS = 1 << 21


def check_shape(shape: Any) -> tuple[int, int]:
    """Validate an image size given as ``n`` (square) or ``(H, W)`` (see :func:`image_shape`)."""
    return image_shape((shape, shape) if is_integer(shape) else shape, "shape")


def check_seed(seed: Any) -> np.random.Generator:
    """Turn a non-negative int (or a numpy Generator) into a Generator."""
    if isinstance(seed, np.random.Generator):
        return seed
    return np.random.default_rng(nonnegative_int(seed, "seed"))


def pixel_size(shape: tuple[int, int]) -> float:
    """Side ``h`` of a pixel in phantom coordinates."""
    return 2.0 / min(shape)


def extent(shape: tuple[int, int]) -> tuple[float, float]:
    """Half-width and half-height ``(X, Y)`` of the image: it covers ``[-X, X] x [-Y, Y]``."""
    h = pixel_size(shape)
    return shape[1] * h / 2.0, shape[0] * h / 2.0


def pixel_centres(shape: tuple[int, int]) -> tuple[np.ndarray, np.ndarray]:
    """Centres ``(x of each column, y of each row)`` in phantom coordinates."""
    h = pixel_size(shape)
    x = (np.arange(shape[1]) + 0.5 - shape[1] / 2.0) * h
    y = (shape[0] / 2.0 - np.arange(shape[0]) - 0.5) * h
    return x, y


def pixel_box(shape: tuple[int, int], xmin: float, xmax: float, ymin: float,
              ymax: float) -> tuple[slice, slice] | None:
    """Rows and columns of the pixels meeting a rectangle (None when it misses the image)."""
    h = pixel_size(shape)
    c0 = max(0, math.floor(xmin / h + shape[1] / 2.0))
    c1 = min(shape[1], math.floor(xmax / h + shape[1] / 2.0) + 1)
    r0 = max(0, math.floor(shape[0] / 2.0 - ymax / h))
    r1 = min(shape[0], math.floor(shape[0] / 2.0 - ymin / h) + 1)
    if c0 >= c1 or r0 >= r1:
        return None
    return slice(r0, r1), slice(c0, c1)


def render(func: Callable[[np.ndarray, np.ndarray], np.ndarray], shape: tuple[int, int],
           supersample: int, box: tuple[slice, slice] | None = None) -> np.ndarray:
    """Pixel means of ``func(x, y)`` over the image, or over ``box`` only.

    ``func`` receives broadcastable coordinate arrays (``x`` of shape
    ``(1, n)``, ``y`` of shape ``(m, 1)``) and returns an ``(m, n)`` array.
    """
    rows, cols = box if box is not None else (slice(0, shape[0]), slice(0, shape[1]))
    h = pixel_size(shape)
    s = supersample
    offsets = (np.arange(s) + 0.5) / s - 0.5  # sub-pixel centres, in pixels
    x = ((np.arange(cols.start, cols.stop)[:, None] + 0.5 - shape[1] / 2.0) + offsets).ravel() * h
    row_index = np.arange(rows.start, rows.stop)
    out = np.empty((len(row_index), cols.stop - cols.start))
    step = max(1, _CHUNK_POINTS // (x.size * s))
    for start in range(0, len(row_index), step):
        chunk = row_index[start:start + step]
        y = ((shape[0] / 2.0 - chunk[:, None] - 0.5) - offsets).ravel() * h
        values = np.broadcast_to(func(x[None, :], y[:, None]), (y.size, x.size))
        out[start:start + len(chunk)] = values.reshape(len(chunk), s, -1, s).mean(axis=(1, 3))
    return out
