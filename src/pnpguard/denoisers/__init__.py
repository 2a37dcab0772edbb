"""Denoisers: the user's own (functions, torch modules) and classical ones with known facts."""

from ._base import Denoiser, DenoiserError
from ._facts import FACT_KINDS, Fact
from ._relaxed import relaxed
from ._wrap import as_denoiser

__all__ = [
    "FACT_KINDS",
    "Denoiser",
    "DenoiserError",
    "Fact",
    "as_denoiser",
    "relaxed",
]
