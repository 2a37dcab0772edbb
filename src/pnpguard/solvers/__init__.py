"""Guarded PnP solvers with a fixed-point residual monitor."""

from ._algorithms import admm, douglas_rachford, forward_backward, reconstruct
from ._monitor import Flag, Policy
from ._options import RunOptions
from ._plots import plot_run
from ._result import IterationState, Reconstruction

__all__ = [
    "Flag",
    "IterationState",
    "Policy",
    "Reconstruction",
    "RunOptions",
    "admm",
    "douglas_rachford",
    "forward_backward",
    "plot_run",
    "reconstruct",
]
