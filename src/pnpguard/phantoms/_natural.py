"""Open natural images bundled with scikit-image, as float64 grey images in [0, 1]."""

from __future__ import annotations

import numpy as np
import skimage.color
import skimage.data
import skimage.transform

from .._validation import choice
from ._grid import check_shape

# Images whose files ship inside the scikit-image package (no download), by loader name.
# Colour photographs are converted to grey with skimage.color.rgb2gray.
_GREY = ("brick", "camera", "cell", "coins", "grass", "gravel", "moon", "page", "text")
_COLOUR = ("astronaut", "chelsea", "coffee")


def natural_image_names() -> tuple[str, ...]:
    """Names accepted by :func:`natural_image`, sorted.

    Returns
    -------
    tuple of str
        ``astronaut, brick, camera, cell, chelsea, coffee, coins, grass, gravel,
        moon, page, text``: the scikit-image sample images whose files are
        bundled with the package (``astronaut``, ``chelsea`` and ``coffee`` are
        colour photographs converted to grey).
    """
    return tuple(sorted(_GREY + _COLOUR))


def natural_image(name: str, shape: int | tuple[int, int] | None = None) -> np.ndarray:
    """A scikit-image sample image as a float64 grey image in ``[0, 1]``.

    Parameters
    ----------
    name : str
        One of :func:`natural_image_names`.
    shape : int or (int, int), optional
        Requested size. The largest centred crop with the requested aspect
        ratio is taken and resized with ``skimage.transform.resize`` (linear
        interpolation, Gaussian anti-aliasing when shrinking). Default: the
        native size.

    Returns
    -------
    numpy.ndarray
        float64 array in ``[0, 1]``: 8-bit images are divided by 255, colour
        images converted with ``skimage.color.rgb2gray``.

    Raises
    ------
    ValueError
        If ``name`` is unknown (the message lists the valid names).

    Notes
    -----
    Nothing is downloaded: the files are part of the installed scikit-image.

    Examples
    --------
    >>> natural_image("camera", 64).shape
    (64, 64)
    """
    choice(name, "name", natural_image_names())
    raw = getattr(skimage.data, name)()
    if name in _COLOUR:
        image = skimage.color.rgb2gray(raw).astype(np.float64)
    else:
        image = raw.astype(np.float64) / 255.0
    if shape is None:
        return image
    height, width = check_shape(shape)
    rows, cols = image.shape
    # Largest centred crop with aspect ratio height / width.
    crop_rows = min(rows, round(cols * height / width))
    crop_cols = min(cols, round(rows * width / height))
    top, left = (rows - crop_rows) // 2, (cols - crop_cols) // 2
    image = image[top:top + crop_rows, left:left + crop_cols]
    if image.shape == (height, width):
        return image.copy()
    return skimage.transform.resize(image, (height, width), order=1, mode="reflect",
                                    anti_aliasing=height < crop_rows or width < crop_cols)
