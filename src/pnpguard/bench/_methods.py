"""The methods a suite runs: guarded PnP (algorithm x shipped denoiser) and baselines.

Running a method returns an :class:`Outcome`, whatever the method: the
reconstruction (or none, for a refusal), iteration history, and for PnP the
check report and the guarantee. A refusal by the guard is an outcome, not an
error.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .._validation import unknown_message
from ..check import CheckReport, check_denoiser
from ..guarantee import Guarantee, Refused
from ..solvers import reconstruct
from ..operators import PixelMask
from ..splitting import ALGORITHMS, algorithm
from ..starts import interpolated_start
from . import _baselines as bl
from ._registry import get_denoiser, shipped_denoisers
from ._tasks import USER_FAMILY, Problem

#: Iteration cap and relative tolerance of the first, stronger phase of an annealed descent run.
FIRST_PHASE_MAX_ITER = 50
FIRST_PHASE_TOL = 1e-3

#: Classical baselines: name -> (families it applies to, tuned parameter names).
BASELINES: dict[str, tuple[tuple[str, ...], tuple[str, ...]]] = {
    "tikhonov": (("deblurring", "inpainting", "super-resolution", "tomography", USER_FAMILY), ("weight",)),
    "tv-regularised": (("deblurring", "inpainting", "super-resolution", "tomography", USER_FAMILY), ("weight",)),
    "richardson-lucy": (("deblurring",), ("iterations",)),
    "interpolation": (("inpainting",), ("method",)),
    "bicubic": (("super-resolution",), ()),
    "fbp": (("tomography",), ("filter", "cutoff")),
}


@dataclass(frozen=True)
class Method:
    """A method of the suite.

    Attributes
    ----------
    name : str
        ``"<algorithm>/<denoiser>"`` for PnP (``"fb/wavelet"``), the baseline's
        name otherwise.
    kind : {"pnp", "baseline"}
    algorithm : str or None
        For PnP, the algorithm's short name (:data:`pnpguard.splitting.ALGORITHMS`:
        ``"fb"``, ``"dr"``, ``"admm"``).
    denoiser : str or None
        Registry name of the shipped denoiser for PnP.
    """

    name: str
    kind: str
    algorithm: str | None = None
    denoiser: str | None = None


def methods_for(family: str) -> tuple[Method, ...]:
    """Every method that applies to a task family: baselines first, then PnP."""
    baselines = tuple(
        Method(name, "baseline") for name, (families, _) in BASELINES.items() if family in families
    )
    pnp = tuple(
        Method(f"{record.short}/{entry.name}", "pnp", record.short, entry.name)
        for entry in shipped_denoisers()
        for record in ALGORITHMS.values()
    )
    return baselines + pnp


@dataclass(frozen=True)
class Outcome:
    """What one method produced on one problem.

    Attributes
    ----------
    status : {"ok", "refused"}
        ``"refused"``: the guard found no theorem covering the run.
    x : numpy.ndarray or None
        The reconstruction (None when refused).
    iterations : int
    converged : bool
    relative_residuals : numpy.ndarray
        Relative residuals per iteration, as in :class:`pnpguard.Reconstruction`:
        the relative fixed-point residual ``||T v - v|| / ||v||`` (PnP), or
        the baseline's own relative residual (see ``BaselineRun``).
    seconds : float
        Wall time of the method, including a denoiser check it ran.
    check_seconds : float
        Part of ``seconds`` spent building and checking the denoiser (0 when
        reused from another algorithm).
    parameters : dict
        The parameters used (tuned ones and, for PnP, step and relaxation).
    report : CheckReport or None
    guarantee : Guarantee or None
    refusal : Refused or None
    flags : tuple
        The monitor's flags (PnP).
    message : str
        Why the run ended.
    """

    status: str
    x: np.ndarray | None = field(repr=False)
    iterations: int
    converged: bool
    relative_residuals: np.ndarray = field(repr=False)
    seconds: float
    check_seconds: float
    parameters: dict[str, Any]
    report: CheckReport | None = None
    guarantee: Guarantee | None = None
    refusal: Refused | None = None
    flags: tuple = ()
    message: str = ""


def run_baseline(name: str, problem: Problem, parameters: dict[str, Any]) -> Outcome:
    """Run the classical baseline ``name`` with its tuned ``parameters``."""
    start = time.perf_counter()
    if name == "tikhonov":
        run = bl.tikhonov(problem, weight=parameters["weight"])
    elif name == "tv-regularised":
        run = bl.tv_reconstruction(problem, weight=parameters["weight"])
    elif name == "richardson-lucy":
        run = bl.richardson_lucy(problem, iterations=parameters["iterations"])
    elif name == "interpolation":
        run = bl.interpolation(problem, method=parameters["method"])
    elif name == "bicubic":
        run = bl.bicubic(problem)
    elif name == "fbp":
        run = bl.fbp(problem, filter=parameters["filter"], cutoff=parameters["cutoff"])
    else:
        raise ValueError(unknown_message("baseline", name, BASELINES))
    return Outcome(
        status="ok",
        x=run.x,
        iterations=run.iterations,
        converged=run.converged,
        relative_residuals=run.relative_residuals,
        seconds=time.perf_counter() - start,
        check_seconds=0.0,
        parameters=dict(parameters),
        message="converged" if run.converged else "reached the iteration cap",
    )


class DenoiserCache:
    """One denoiser and one check report per (shipped denoiser, strength) on one problem.

    The check samples around the problem's first iterate ``A^T y / ||A||^2``;
    the three algorithms reuse the denoiser and its report.
    """

    def __init__(self, problem: Problem, *, budget: int, seed: int):
        self.problem = problem
        self.budget = budget
        self.seed = seed
        self._entries: dict[tuple[str, float], tuple[Any, CheckReport, float]] = {}

    def get(self, name: str, strength: float) -> tuple[Any, CheckReport, float]:
        """The denoiser, its report and the seconds spent building and checking it now
        (0 when cached)."""
        key = (name, strength)
        if key in self._entries:
            denoiser, report, _ = self._entries[key]
            return denoiser, report, 0.0
        start = time.perf_counter()
        denoiser = get_denoiser(name).make(strength, self.problem.shape)
        report = check_denoiser(denoiser, self.problem.start(), budget=self.budget, seed=self.seed)
        seconds = time.perf_counter() - start
        self._entries[key] = (denoiser, report, seconds)
        return denoiser, report, seconds


def starts_interpolated(problem: Problem) -> bool:
    """Whether a PnP run starts from the interpolation of the missing pixels.

    Every PnP run on a pixel mask does (common practice in inpainting): a
    descent on a nonconvex objective (the potential route) from the
    zero-filled start barely moves the missing pixels, and the fixed-point
    schemes fill them only slowly from it (Douglas-Rachford with wavelet
    shrinkage on 50 % missing pixels at 64 x 64: 418 iterations to relative
    residual 1e-4 from the zero-filled start, 91 from the interpolated one).
    The guarantee covers the run from any start.
    """
    return isinstance(problem.op, PixelMask)


def run_pnp(
    method: Method,
    problem: Problem,
    strength: float,
    *,
    denoisers: DenoiserCache,
    max_iter: int,
    tol: float,
) -> Outcome:
    """Run a guarded PnP method at denoiser ``strength``; a refusal is an outcome.

    The step and relaxation are the guarantee's recommended values
    (:func:`pnpguard.admissible`).
    """
    start = time.perf_counter()
    denoiser, report, check_seconds = denoisers.get(method.denoiser, strength)
    parameters: dict[str, Any] = {"strength": strength}
    options: dict[str, Any] = {}
    first_phase = get_denoiser(method.denoiser).first_phase
    try:
        if starts_interpolated(problem):
            options["x0"] = interpolated_start(problem.fidelity)
            parameters["start"] = "interpolated"
        elif algorithm(method.algorithm).watches == "objective" and first_phase is not None and first_phase > strength:
            # Strength annealing (common practice): a short run at a larger strength finds the
            # basin; the guarantee covers the run at the tuned strength from its result.
            strong, strong_report, strong_seconds = denoisers.get(method.denoiser, first_phase)
            check_seconds += strong_seconds
            phase = reconstruct(
                method.algorithm, problem.fidelity, strong, report=strong_report,
                max_iter=FIRST_PHASE_MAX_ITER, tol=FIRST_PHASE_TOL,
            )
            options["x0"] = phase.x
            parameters["start"] = f"first phase at strength {first_phase:g} ({phase.iterations} iterations)"
        result = reconstruct(
            method.algorithm, problem.fidelity, denoiser, report=report, max_iter=max_iter, tol=tol, **options
        )
    except Refused as refusal:
        return Outcome(
            status="refused",
            x=None,
            iterations=0,
            converged=False,
            relative_residuals=np.zeros(0),
            seconds=time.perf_counter() - start,
            check_seconds=check_seconds,
            parameters=parameters,
            report=report,
            refusal=refusal,
            message="refused: " + "; ".join(refusal.reasons),
        )
    parameters.update(step=result.step, relaxation=result.relaxation)
    return Outcome(
        status="ok",
        x=np.asarray(result.x, dtype=np.float64),
        iterations=result.iterations,
        converged=result.converged,
        relative_residuals=np.asarray(result.relative_residuals),
        seconds=time.perf_counter() - start,
        check_seconds=check_seconds,
        parameters=parameters,
        report=report,
        guarantee=result.guarantee,
        flags=result.flags,
        message=result.message,
    )


def final_residual(outcome: Outcome) -> float:
    """The last relative residual, NaN when there is none."""
    return float(outcome.relative_residuals[-1]) if outcome.relative_residuals.size else math.nan
