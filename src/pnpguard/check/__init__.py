"""Averagedness check: prove or estimate a denoiser's constants."""

from ._check import DEFAULT_BUDGET, check_denoiser
from ._report import CheckReport, Witness
from ._structure import claimed_constants

__all__ = ["DEFAULT_BUDGET", "CheckReport", "Witness", "check_denoiser", "claimed_constants"]
