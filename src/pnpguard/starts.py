"""Warm starts: first iterates closer to the answer than ``A^T y / ||A||^2``.

With a large null space (inpainting) the default start is the zero-filled
image, and a denoiser at the small strength that suits the observed pixels
barely moves the missing ones: a run from there needs many iterations or
stalls far from a good image. Starting from an interpolation of the observed
pixels is common practice. The convergence guarantee of a run covers the
iteration from whatever ``x0`` it is given: a warm start changes where the
run starts, not the theorem (for a contraction, not even the limit; for the
descent route, possibly which critical point is reached).
"""

from __future__ import annotations

import numpy as np
import scipy.interpolate
import torch

from ._arrays import ArrayLike, from_tensor
from ._validation import choice
from .fidelity import LeastSquares
from .operators import PixelMask

#: Interpolation methods of :func:`interpolated_start` (:func:`scipy.interpolate.griddata`).
INTERPOLATIONS = ("cubic", "linear", "nearest")


def fill_missing(mask: np.ndarray, observed: np.ndarray, *, method: str = "linear") -> np.ndarray:
    """Fill the unobserved pixels of a 2-D image by scattered-data interpolation.

    Parameters
    ----------
    mask : numpy.ndarray
        Boolean ``(H, W)``: True where a pixel is observed.
    observed : numpy.ndarray
        ``(H, W)`` image whose observed pixels are used (the others are ignored).
    method : {"cubic", "linear", "nearest"}
        :func:`scipy.interpolate.griddata` method (Delaunay-based piecewise
        linear or Clough-Tocher cubic); pixels outside the convex hull of the
        observed ones take the nearest observed value.

    Returns
    -------
    numpy.ndarray
        float64 ``(H, W)``, equal to ``observed`` on the observed pixels.
    """
    choice(method, "method", INTERPOLATIONS)
    rows, cols = np.nonzero(mask)
    if rows.size == 0:
        raise ValueError("`mask` observes no pixel: nothing to interpolate from")
    points = np.column_stack([rows, cols]).astype(np.float64)
    values = np.asarray(observed, dtype=np.float64)[mask]
    grid = tuple(np.mgrid[: mask.shape[0], : mask.shape[1]].astype(np.float64))
    filled = scipy.interpolate.griddata(points, values, grid, method=method)
    outside = np.isnan(filled)
    if outside.any():
        nearest = scipy.interpolate.griddata(points, values, grid, method="nearest")
        filled[outside] = nearest[outside]
    return filled


def interpolated_start(fidelity: LeastSquares, *, method: str = "linear") -> ArrayLike:
    """A first iterate for inpainting: the data with its missing pixels interpolated.

    Parameters
    ----------
    fidelity : LeastSquares
        A data term whose operator is a :class:`~pnpguard.PixelMask`.
    method : {"cubic", "linear", "nearest"}
        See :func:`fill_missing`.

    Returns
    -------
    numpy.ndarray or torch.Tensor
        Of the data's kind, dtype and device and the unknown image's shape;
        pass it as ``x0`` to a solver.

    Raises
    ------
    TypeError
        If the operator is not a pixel mask (the default start
        ``A^T y / ||A||^2`` is then the solvers' choice).

    Examples
    --------
    >>> import numpy as np, pnpguard as pg
    >>> frame = pg.phantoms.cells(32, seed=0)
    >>> mask = pg.PixelMask(pg.random_pixel_mask(frame.shape, 0.6, seed=1))
    >>> fidelity = pg.LeastSquares(mask, mask(frame), sigma=0.01)
    >>> start = pg.interpolated_start(fidelity)
    >>> bool(np.abs(start - frame).mean() < np.abs(mask(frame) - frame).mean())
    True
    """
    if not isinstance(fidelity, LeastSquares):
        raise TypeError(f"`fidelity` must be a pnpguard LeastSquares, got {type(fidelity).__name__}")
    op = fidelity.op
    if not isinstance(op, PixelMask):
        raise TypeError(
            f"`fidelity` has a {type(op).__name__} operator; interpolated_start needs a PixelMask "
            "(other operators start from A^T y / ||A||^2, the solvers' default)"
        )
    data = fidelity.y.detach().cpu().double().numpy()
    flat = data.reshape(-1, *data.shape[-2:])
    filled = np.stack([fill_missing(op.mask, image, method=method) for image in flat]).reshape(data.shape)
    tensor = torch.from_numpy(filled).to(dtype=fidelity.y.dtype, device=fidelity.y.device)
    return from_tensor(tensor, fidelity.kind)
