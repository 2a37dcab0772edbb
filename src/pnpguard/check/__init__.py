"""Averagedness check: prove or estimate a denoiser's constants."""

from ._check import DEFAULT_BUDGET, check_denoiser
from ._report import CheckReport, Witness
from ._smoothness import DEFAULT_SMOOTHNESS_BUDGET, SmoothnessEstimate, estimate_smoothness
from ._structure import claimed_constants

__all__ = [
    "DEFAULT_BUDGET",
    "DEFAULT_SMOOTHNESS_BUDGET",
    "CheckReport",
    "SmoothnessEstimate",
    "Witness",
    "check_denoiser",
    "claimed_constants",
    "estimate_smoothness",
]
