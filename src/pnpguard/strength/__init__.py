"""Choosing a denoiser's strength without ground truth.

:func:`choose_strength` runs guarded reconstructions over a grid of strengths
and scores each by the discrepancy principle or Monte-Carlo SURE (generalised
SURE when the operator has a null space); refused strengths stay in the table. :func:`sweep_check` checks a denoiser
over a range of strengths: its constants, the verdict and each algorithm's
admissible step window, as a table, JSON and a figure.
"""

from ._choose import StrengthChoice, StrengthRow, choose_strength
from ._rules import DISCREPANCY_TAU, PROBE_SCALE, RULES
from ._sweep import StrengthSweep, SweepPoint, sweep_check

__all__ = [
    "DISCREPANCY_TAU",
    "PROBE_SCALE",
    "RULES",
    "StrengthChoice",
    "StrengthRow",
    "StrengthSweep",
    "SweepPoint",
    "choose_strength",
    "sweep_check",
]
