"""Synthetic phantoms and bundled natural images for testing reconstructions.

All images are float64 numpy arrays shaped ``(H, W)``. Generated phantoms are
functions of continuous coordinates: the shorter image side spans ``[-1, 1]``,
pixels are square, the y axis points up and rows run downwards (row 0 is the
top). Pixel values are means over the pixel (anti-aliased). Random phantoms
take a ``seed``.
"""

from ._cells import cells
from ._ellipses import (
    Ellipse,
    ellipse_projection,
    porous_disk,
    porous_disk_ellipses,
    random_ellipses,
    render_ellipses,
    shepp_logan,
    shepp_logan_ellipses,
)
from ._natural import natural_image, natural_image_names
from ._registry import make_phantom, phantom_names
from ._smooth import piecewise_smooth
from ._targets import siemens_star

__all__ = [
    "Ellipse",
    "cells",
    "ellipse_projection",
    "make_phantom",
    "natural_image",
    "natural_image_names",
    "phantom_names",
    "piecewise_smooth",
    "porous_disk",
    "porous_disk_ellipses",
    "random_ellipses",
    "render_ellipses",
    "shepp_logan",
    "shepp_logan_ellipses",
    "siemens_star",
]
