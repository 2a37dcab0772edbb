"""The result of a PnP run, whatever the algorithm."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .._arrays import ArrayLike
from ..check import CheckReport
from ..guarantee import Guarantee
from ._monitor import Flag

NO_GUARANTEE = "NO GUARANTEE: unguarded run, the denoiser and parameters were not checked"


@dataclass(frozen=True)
class IterationState:
    """What a callback receives after each iteration.

    Attributes
    ----------
    iteration : int
        Number of iterations done so far (1 after the first).
    x : torch.Tensor
        Current image estimate (do not write into it).
    governing : torch.Tensor
        Current governing variable (``x`` for forward-backward, ``z`` for
        Douglas-Rachford, ``w = x + u`` for ADMM).
    residual : float
        Fixed-point residual ``||T v - v||`` of the variable just updated.
    relative_residual : float
        ``||T v - v|| / ||v||``.
    """

    iteration: int
    x: object
    governing: object
    residual: float
    relative_residual: float


@dataclass(frozen=True)
class Reconstruction:
    """Outcome of :func:`pnpguard.forward_backward`, :func:`pnpguard.douglas_rachford`
    or :func:`pnpguard.admm`.

    Attributes
    ----------
    x : numpy.ndarray or torch.Tensor
        The reconstruction, of the data's kind, dtype and device.
    algorithm : str
    converged : bool
        True when the relative fixed-point residual fell below ``tol``.
    iterations : int
        Iterations performed.
    message : str
        Why the run ended.
    residuals : numpy.ndarray
        ``||T v_k - v_k||`` per iteration.
    relative_residuals : numpy.ndarray
        ``||T v_k - v_k|| / ||v_k||`` per iteration.
    metrics : dict of str to numpy.ndarray
        ``"psnr"`` and ``"ssim"`` per iteration when a reference was given.
    flags : tuple of Flag
        Problems the monitor saw, with iteration numbers and witnesses (the
        printout summarises them: a count per kind, the first and the last).
    step, relaxation : float
        Parameters used at the end (a back-off lowers the relaxation).
    report : CheckReport or None
        The denoiser check (None for unguarded runs without a report).
    guarantee : Guarantee or None
        The guarantee used; None for unguarded runs.
    seconds : float
        Wall time of the iterations.
    check_seconds : float
        Wall time of the denoiser check done by this call (0 if reused or none).
    back_offs : int
        Relaxation halvings done by the monitor's back-off policy.
    notes : tuple of str
        Anything else about the run.
    objectives : numpy.ndarray
        For descent schemes (the potential route), ``F(x_k) = f(x_k) + g(x_k)``
        for ``k = 0 ... iterations``; empty otherwise.
    accelerated : int
        Accelerated (Anderson) steps accepted by the safeguard (0 for plain runs).
    safeguarded : int
        Accelerated candidates the safeguard rejected; each cost one evaluation
        of the iteration map beyond ``iterations``.
    """

    x: ArrayLike
    algorithm: str
    converged: bool
    iterations: int
    message: str
    residuals: np.ndarray
    relative_residuals: np.ndarray
    metrics: dict[str, np.ndarray]
    flags: tuple[Flag, ...]
    step: float
    relaxation: float
    report: CheckReport | None
    guarantee: Guarantee | None
    seconds: float
    check_seconds: float
    back_offs: int = 0
    notes: tuple[str, ...] = field(default=())
    objectives: np.ndarray = field(default_factory=lambda: np.zeros(0))
    accelerated: int = 0
    safeguarded: int = 0

    @property
    def guaranteed(self) -> bool:
        """True when a guarantee covered the run's final parameters."""
        return self.guarantee is not None

    def __str__(self) -> str:
        final = self.relative_residuals[-1] if len(self.relative_residuals) else math.nan
        lines = [
            f"{self.algorithm}: {'converged' if self.converged else 'not converged'} after "
            f"{self.iterations} iterations ({self.message})",
            f"  relative residual  {final:.3e}",
            f"  step               {self.step:.6g}, relaxation {self.relaxation:.6g}",
            f"  time               {self.seconds:.2f} s iterating"
            + (f", {self.check_seconds:.2f} s checking" if self.check_seconds else ""),
        ]
        if self.guarantee is None:
            lines.append(f"  guarantee          {NO_GUARANTEE}")
        else:
            lines.append(
                f"  guarantee          {self.guarantee.status.upper()} ({self.guarantee.route} route; "
                f"{self.guarantee.theorem})"
            )
        for name, values in self.metrics.items():
            lines.append(f"  {name:<19}{values[-1]:.4f} (final)")
        if self.objectives.size:
            lines.append(f"  objective F        {self.objectives[0]:.8g} -> {self.objectives[-1]:.8g}")
        lines += _flag_lines(self.flags)
        lines += [f"  note               {note}" for note in self.notes]
        return "\n".join(lines)


def _flag_lines(flags: tuple[Flag, ...]) -> list[str]:
    """A count per kind with its first and last flag (the full list stays in ``.flags``)."""
    if not flags:
        return ["  monitor            no flags"]
    lines = []
    for kind in dict.fromkeys(flag.kind for flag in flags):
        same = [flag for flag in flags if flag.kind == kind]
        lines.append(f"  flags              {kind}: {len(same)}")
        shown = same if len(same) <= 2 else [same[0], same[-1]]
        for label, flag in zip(("first" if len(same) > 1 else "only", "last"), shown):
            witness = "" if flag.witness is None else " (witness pair in .flags)"
            lines.append(f"    {label:<5}            iteration {flag.iteration}, {flag.action}: {flag.message}{witness}")
    return lines
