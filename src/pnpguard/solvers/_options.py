"""The options every guarded solver shares, in one frozen record validated once."""

from __future__ import annotations

import dataclasses
import inspect
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from .._arrays import ArrayLike
from .._validation import nonnegative_int, nonnegative_number, positive_int, positive_number, unknown_message
from ..check import DEFAULT_BUDGET, CheckReport
from ..guarantee import DEFAULT_MARGIN
from ._anderson import DEFAULT_MEMORY
from ._monitor import Policy
from ._result import IterationState

Callback = Callable[[IterationState], Any]


def _positive_or_none(value: Any, name: str) -> float | None:
    return None if value is None else positive_number(value, name)


@dataclass(frozen=True)
class RunOptions:
    """Keyword options shared by :func:`forward_backward`, :func:`douglas_rachford` and :func:`admm`.

    Parameters
    ----------
    step : float, optional
        The algorithm's parameter: the gradient step ``eta`` (forward-backward)
        or the prox parameter ``gamma`` of ``prox_{gamma f}`` (Douglas-Rachford,
        ADMM, where the penalty is ``1 / gamma``). Default: the recommended
        value of :func:`pnpguard.admissible` (``1/L`` for unguarded runs).
        When given on a guarded run it is checked against the admissible
        interval.
    relaxation : float, optional
        ``lam`` in ``v+ = v + lam (T v - v)``; default the recommended value
        (1 for unguarded runs); checked like ``step``.
    report : CheckReport, optional
        Reuse a check instead of running one (``check_denoiser`` on ``sample``).
    guard : bool, optional
        True (default): check, then refuse (raise :class:`pnpguard.Refused`)
        unless a theorem covers the run. False: run without any guarantee;
        the monitor still watches residuals, stalls and blow-ups, and the
        result says that no guarantee applied.
    x0 : array, optional
        Initial image; default ``A^T y / ||A||^2`` (one gradient step of length
        ``1/L`` from zero).
    max_iter : int, optional
        Iteration cap (default 300).
    tol : float, optional
        Stop when the relative fixed-point residual of the governing variable
        ``||T v_k - v_k|| / ||v_k|| <= tol`` (default 1e-4).
    callback : callable, optional
        Called with an :class:`IterationState` after every iteration,
        including the one that meets ``tol``; returning True stops the run
        cleanly.
    reference : array, optional
        Ground truth: PSNR and SSIM of the estimate are recorded per iteration.
    data_range : float, optional
        Intensity range for the metrics; default the reference's max - min.
    progress : bool, optional
        Show a tqdm progress bar (default False).
    policy : Policy, optional
        What the monitor does on each flag (default: stop on blow-up, warn otherwise).
    sample : array, optional
        Images for the denoiser check; default ``x0``.
    check_budget : int, optional
        Denoiser calls for the check (default 200).
    margin : float, optional
        Safety margin on estimated constants (default 0.05).
    seed : int, optional
        Seed of the check's search.
    accelerate : bool or "auto", optional
        Safeguarded type-I Anderson acceleration of the fixed-point iteration
        (forward-backward, Douglas-Rachford, ADMM). ``"auto"`` (default)
        accelerates guarded runs whose denoiser is exact (its check reports
        no inexactness tolerance) and leaves the others plain: inexact,
        iterative proxes such as TV gained nothing and stalled when
        accelerated (``benchmarks/bench_anderson.py``). A candidate
        step is taken only when the safeguard holds (its fixed-point residual
        stays below a summable bound and its length is bounded by a multiple
        of the plain step's), otherwise the plain step, so the plain
        iteration's guarantee is kept; the monitor watches the plain map's
        residual at every accepted point. ``max_iter`` counts evaluations of
        the iteration map, rejected candidates included.
    anderson_memory : int, optional
        Difference pairs the acceleration keeps (default 5): it holds
        ``2 m + 4`` iterate-sized tensors, 56 MiB at 1024 x 1024 in float32
        (104 MiB in float64) for ``m = 5``.
    threads : int, optional
        Torch threads for the run (restored afterwards). Default: the CPUs
        not already busy according to the one-minute load average, at least
        1 and at most torch's own default (:func:`default_threads`), so a run
        beside another busy process does not oversubscribe the machine.
    """

    step: float | None = None
    relaxation: float | None = None
    report: CheckReport | None = None
    guard: bool = True
    x0: ArrayLike | None = None
    max_iter: int = 300
    tol: float = 1e-4
    callback: Callback | None = None
    reference: ArrayLike | None = None
    data_range: float | None = None
    progress: bool = False
    policy: Policy | None = None
    sample: Any = None
    check_budget: int = DEFAULT_BUDGET
    margin: float = DEFAULT_MARGIN
    seed: int = 0
    accelerate: bool | str = "auto"
    anderson_memory: int = DEFAULT_MEMORY
    threads: int | None = None

    def __post_init__(self) -> None:
        set_ = object.__setattr__
        set_(self, "step", _positive_or_none(self.step, "step"))
        set_(self, "relaxation", _positive_or_none(self.relaxation, "relaxation"))
        set_(self, "data_range", _positive_or_none(self.data_range, "data_range"))
        set_(self, "max_iter", positive_int(self.max_iter, "max_iter"))
        set_(self, "check_budget", positive_int(self.check_budget, "check_budget"))
        set_(self, "seed", nonnegative_int(self.seed, "seed"))
        set_(self, "tol", nonnegative_number(self.tol, "tol"))
        set_(self, "anderson_memory", positive_int(self.anderson_memory, "anderson_memory"))
        if self.threads is not None:
            set_(self, "threads", positive_int(self.threads, "threads"))
        if self.report is not None and not isinstance(self.report, CheckReport):
            raise TypeError(f"`report` must be a CheckReport, got {type(self.report).__name__}")
        if self.callback is not None and not callable(self.callback):
            raise TypeError(f"`callback` must be callable, got {type(self.callback).__name__}")
        if self.policy is None:
            set_(self, "policy", Policy())
        if not isinstance(self.policy, Policy):
            raise TypeError(f"`policy` must be a pnpguard Policy, got {type(self.policy).__name__}")
        for name in ("guard", "progress"):
            if not isinstance(getattr(self, name), bool):
                raise TypeError(f"`{name}` must be True or False, got {getattr(self, name)!r}")
        if not (isinstance(self.accelerate, bool) or self.accelerate == "auto"):
            raise TypeError(f"`accelerate` must be True, False or 'auto', got {self.accelerate!r}")

    @classmethod
    def from_keywords(cls, keywords: dict[str, Any]) -> RunOptions:
        """Build from a solver's keyword arguments; an unknown keyword raises TypeError with a hint."""
        known = [f.name for f in dataclasses.fields(cls)]
        unknown = sorted(set(keywords) - set(known))
        if unknown:
            raise TypeError(unknown_message("keyword argument", unknown[0], known))
        return cls(**keywords)


def solver_signature(*leading: str) -> inspect.Signature:
    """``(*leading, fidelity, denoiser, *, <every RunOptions field with its default>)``, for help text."""
    parameters = [
        inspect.Parameter(name, inspect.Parameter.POSITIONAL_OR_KEYWORD)
        for name in (*leading, "fidelity", "denoiser")
    ]
    parameters += [
        inspect.Parameter(f.name, inspect.Parameter.KEYWORD_ONLY, default=f.default, annotation=f.type)
        for f in dataclasses.fields(RunOptions)
    ]
    return inspect.Signature(parameters, return_annotation="Reconstruction")
