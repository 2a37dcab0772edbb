"""Forward models: linear operators with exact adjoints and norm information."""

from ._base import LinearOperator, NormBound, power_iteration
from ._convolution import Convolution
from ._decimation import Decimation
from ._mask import PixelMask, dead_lines_mask, random_pixel_mask, scratch_mask
from ._projection import ParallelProjection, filtered_backprojection
from ._psf import disk_psf, gaussian_psf, motion_psf
from ._user import FunctionOperator, MatrixOperator, adjoint_mismatch, as_operator

__all__ = [
    "Convolution",
    "Decimation",
    "FunctionOperator",
    "LinearOperator",
    "MatrixOperator",
    "NormBound",
    "ParallelProjection",
    "PixelMask",
    "adjoint_mismatch",
    "as_operator",
    "dead_lines_mask",
    "disk_psf",
    "filtered_backprojection",
    "gaussian_psf",
    "motion_psf",
    "power_iteration",
    "random_pixel_mask",
    "scratch_mask",
]
