"""Denoisers: the user's own (functions, torch modules) and classical ones with known facts."""

from ._base import Denoiser, DenoiserError
from ._facts import FACT_KINDS, Fact
from ._gaussian import GaussianSmoothing
from ._nlm import NonLocalMeans
from ._potential import GradientStepDenoiser, PotentialPoint, gradient_step_denoiser, with_potential
from ._relaxed import relaxed
from ._tv import TotalVariation
from ._wavelet import WaveletShrinkage
from ._wrap import as_denoiser

__all__ = [
    "FACT_KINDS",
    "Denoiser",
    "DenoiserError",
    "Fact",
    "GaussianSmoothing",
    "GradientStepDenoiser",
    "NonLocalMeans",
    "PotentialPoint",
    "TotalVariation",
    "WaveletShrinkage",
    "as_denoiser",
    "gradient_step_denoiser",
    "relaxed",
    "with_potential",
]
