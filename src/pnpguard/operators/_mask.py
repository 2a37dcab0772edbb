"""Pixel-wise sampling (inpainting) operator and mask builders."""

from __future__ import annotations

from typing import Any

import numpy as np
import torch

from .._arrays import as_float_tensor
from .._validation import image_shape, nonnegative_int, number_in, positive_number
from ._base import LinearOperator, Shape
from ._cache import TransferCache


class PixelMask(LinearOperator):
    """Keep the observed pixels and zero the missing ones: ``y = m * x``.

    Parameters
    ----------
    mask : array_like
        ``(H, W)`` boolean or 0/1 array; True / 1 marks an observed pixel.

    Notes
    -----
    The operator is diagonal with entries in {0, 1}, hence self-adjoint with
    norm 1 (0 if nothing is observed) and smallest singular value 1 only when
    every pixel is observed. Missing pixels are returned as zeros, so the data
    has the image's shape.
    """

    def __init__(self, mask: Any):
        values = as_float_tensor(mask, "mask")
        if values.ndim != 2:
            raise ValueError(f"`mask` must be 2-D (H, W), got shape {tuple(values.shape)}")
        if not bool(((values == 0) | (values == 1)).all()):
            raise ValueError("`mask` must hold only 0/1 or False/True values")
        super().__init__(tuple(values.shape), tuple(values.shape))
        self.mask = values.numpy().astype(bool)
        self._weights = TransferCache(values)

    def _forward(self, x: torch.Tensor) -> torch.Tensor:
        return x * self._weights.like_real(x)

    _adjoint = _forward

    def _normal(self, x: torch.Tensor) -> torch.Tensor:
        return self._forward(x)

    @property
    def nonnegative(self) -> bool:
        return True

    def _exact_norm(self) -> float:
        return 1.0 if self.mask.any() else 0.0

    def smallest_singular_value(self) -> float:
        return 1.0 if self.mask.all() else 0.0

    def _solve_shifted_normal(self, v: torch.Tensor, t: float) -> torch.Tensor:
        return v / (1.0 + t * self._weights.like_real(v))

    def _describe(self) -> str:
        return f"{100.0 * self.mask.mean():.1f}% observed"


def random_pixel_mask(shape: Shape, missing: float, *, seed: int = 0) -> np.ndarray:
    """Boolean mask with a given fraction of pixels missing, chosen uniformly.

    Exactly ``round(missing * H * W)`` pixels are missing.

    Parameters
    ----------
    shape : tuple of int
        ``(H, W)``.
    missing : float
        Fraction of missing pixels in [0, 1).
    seed : int
        Seed of :func:`numpy.random.default_rng`.
    """
    shape = image_shape(shape, "shape")
    missing = number_in(missing, "missing", 0.0, 1.0, high_open=True)
    size = shape[0] * shape[1]
    rng = np.random.default_rng(seed)
    observed = np.ones(size, dtype=bool)
    observed[rng.choice(size, size=int(round(missing * size)), replace=False)] = False
    return observed.reshape(shape)


def dead_lines_mask(
    shape: Shape, *, rows: Any = (), columns: Any = ()
) -> np.ndarray:
    """Boolean mask with whole detector rows and/or columns missing.

    Parameters
    ----------
    shape : tuple of int
        ``(H, W)``.
    rows, columns : sequence of int
        Indices of the dead rows and columns.
    """
    shape = image_shape(shape, "shape")
    observed = np.ones(shape, dtype=bool)
    for name, indices, limit in (("rows", rows, shape[0]), ("columns", columns, shape[1])):
        indices = np.asarray(indices, dtype=int).ravel()
        if indices.size and (indices.min() < -limit or indices.max() >= limit):
            raise ValueError(f"`{name}` has indices outside 0..{limit - 1}: {indices.tolist()}")
        if name == "rows":
            observed[indices, :] = False
        else:
            observed[:, indices] = False
    return observed


def scratch_mask(shape: Shape, count: int, *, width: float = 1.5, seed: int = 0) -> np.ndarray:
    """Boolean mask with ``count`` random straight scratches missing.

    Each scratch is a segment between two random points on the image border
    region, of the given width in pixels.
    """
    shape = image_shape(shape, "shape")
    count = nonnegative_int(count, "count")
    width = positive_number(width, "width")
    rng = np.random.default_rng(seed)
    rows, cols = np.mgrid[: shape[0], : shape[1]].astype(float)
    observed = np.ones(shape, dtype=bool)
    for _ in range(int(count)):
        start = rng.uniform((0, 0), shape)
        end = rng.uniform((0, 0), shape)
        direction = end - start
        length = float(np.hypot(*direction)) or 1.0
        direction = direction / length
        offset_r, offset_c = rows - start[0], cols - start[1]
        along = np.clip(offset_r * direction[0] + offset_c * direction[1], 0.0, length)
        distance = np.hypot(offset_r - along * direction[0], offset_c - along * direction[1])
        observed &= distance > width / 2.0
    return observed
