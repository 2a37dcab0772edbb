"""Guarded PnP solvers: forward-backward, Douglas-Rachford and ADMM."""

from __future__ import annotations

import math
import time
from dataclasses import replace
from typing import Any

import numpy as np
import torch

from .._arrays import from_tensor, to_tensor
from .._threads import torch_threads
from ..check import CheckReport, check_denoiser
from ..denoisers import Denoiser, as_denoiser
from ..fidelity import LeastSquares
from ..guarantee import Guarantee, admissible
from ..metrics import psnr, ssim
from ..splitting import Algorithm
from ..splitting import algorithm as algorithm_record
from ._anderson import RADIUS_FACTOR, Anderson, memory_bytes
from ._monitor import Flag, Monitor, norm
from ._options import RunOptions, solver_signature
from ._result import IterationState, Reconstruction


def _image(value: Any, name: str, fidelity: LeastSquares) -> torch.Tensor:
    tensor, _ = to_tensor(value, name)
    if tuple(tensor.shape) != fidelity.image_shape and tuple(tensor.shape[-2:]) != fidelity.op.in_shape:
        raise ValueError(
            f"`{name}` has shape {tuple(tensor.shape)} but the unknown image has shape "
            f"{fidelity.image_shape}"
        )
    return tensor.to(dtype=fidelity.y.dtype, device=fidelity.y.device).expand(fidelity.image_shape).clone()


class _Run:
    """Shared set-up, guard and loop of the solvers."""

    def __init__(self, algorithm: Algorithm, fidelity: LeastSquares, denoiser: Any, options: RunOptions):
        if not isinstance(fidelity, LeastSquares):
            raise TypeError(f"`fidelity` must be a pnpguard LeastSquares, got {type(fidelity).__name__}")
        self.algorithm = algorithm
        self.fidelity = fidelity
        self.denoiser = as_denoiser(denoiser)
        self.options = o = options
        self.policy = o.policy
        self.x0 = fidelity.start_image() if o.x0 is None else _image(o.x0, "x0", fidelity)
        self.reference = None
        if o.reference is not None:
            self.reference = _image(o.reference, "reference", fidelity)
            span = float(self.reference.max() - self.reference.min())
            self.data_range = (span if span > 0 else 1.0) if o.data_range is None else o.data_range
        self.step = o.step
        self.relaxation = o.relaxation

    # ---------------------------------------------------------------- guard
    def guard(self) -> tuple[CheckReport | None, Guarantee | None, float]:
        o = self.options
        report = o.report
        if report is not None and report.denoiser != self.denoiser.name:
            raise ValueError(
                f"`report` checks denoiser {report.denoiser!r} but the run uses "
                f"{self.denoiser.name!r}; check this denoiser (or give both the same name)"
            )
        if not o.guard:
            if self.step is None:
                self.step = 1.0 / self.fidelity.lipschitz
            if self.relaxation is None:
                self.relaxation = 1.0
            return report, None, 0.0
        seconds = 0.0
        if report is None:
            start = time.perf_counter()
            sample = self.x0 if o.sample is None else o.sample
            report = check_denoiser(self.denoiser, sample, budget=o.check_budget, seed=o.seed)
            seconds = time.perf_counter() - start
        guarantee = admissible(self.algorithm.name, self.fidelity, report, margin=o.margin)
        if self.step is None:
            self.step = guarantee.step
        if self.relaxation is None:
            self.relaxation = guarantee.relaxation
        guarantee.map_constant(self.step, self.relaxation)  # raises Refused outside the set
        return report, guarantee, seconds

    # ----------------------------------------------------------------- loop
    def run(self) -> Reconstruction:
        """Guard, then iterate the algorithm's map from its start."""
        report, guarantee, check_seconds = self.guard()
        tolerance = 0.0 if report is None else report.tolerance
        driven = _DrivenTolerance.of(self.denoiser, tolerance)
        if guarantee is not None and tolerance > 0:
            guarantee = _inexact_guarantee(guarantee, tolerance, driven is not None)
        certified = (None, math.nan) if guarantee is None else guarantee.map_constant(self.step, self.relaxation)
        denoiser = self.denoiser if driven is None else driven
        rule = None if guarantee is None else guarantee.rule
        if rule is not None and rule.scheme is not None:
            # The route watches its own objective (the prox route: F = step f + phi).
            scheme = rule.scheme(self.fidelity, denoiser, self.step, certified[1])
        else:
            scheme = self.algorithm.scheme(self.fidelity, denoiser, self.step)
        watches_objective = self.algorithm.watches == "objective" or certified[0] == "descent"
        start = self.algorithm.start(self.fidelity, self.x0, self.step)
        o = self.options
        scale = max(norm(start), norm(self.fidelity.y), 1e-12)
        # An inexact denoiser (RMS error <= tol per pixel per call) moves T v by at most
        # error_gain tol sqrt(N) (the Algorithm record says how often the error enters T),
        # and two consecutive steps enter each comparison of the monitor.
        per_tolerance = self.algorithm.error_gain * math.sqrt(start.numel())
        monitor = Monitor(
            self.policy,
            certified[0],
            certified[1],
            scale,
            2.0 * self.relaxation * tolerance * per_tolerance,
            fixed_point=not watches_objective,
            eps=self.denoiser.rounding_eps(start.dtype),
        )
        anderson = None
        if _accelerates(o.accelerate, self.algorithm.watches, guarantee, tolerance, watches_objective):
            if self.algorithm.watches != "fixed_point":
                raise ValueError(
                    f"`accelerate` applies to the fixed-point algorithms; {self.algorithm.name!r} is a "
                    "descent scheme (use accelerate=False)"
                )
            anderson = Anderson(o.anderson_memory, radius=RADIUS_FACTOR * scale)
            if guarantee is not None:
                guarantee = _accelerated_guarantee(guarantee, o.anderson_memory)
        objectives: list[float] = []
        # Without a driver the error stays at `tolerance`: residuals below what it allows
        # say nothing about the exact map's fixed point.
        error_floor = 0.0 if driven is not None else self.relaxation * tolerance * per_tolerance
        relaxation = self.relaxation
        flags: list[Flag] = []
        residuals: list[float] = []
        relative: list[float] = []
        metrics: dict[str, list[float]] = {"psnr": [], "ssim": []} if self.reference is not None else {}
        v, estimate = start, start
        # While an accelerated candidate awaits its safeguard: the plain step's point from the
        # accepted point it was proposed from (the fallback), and that point's norm.
        pending: tuple[torch.Tensor, float] | None = None
        plain = True
        back_offs, converged, message = 0, False, "reached max_iter"
        bar = _progress(o.progress, o.max_iter, self.algorithm.name)
        begin = time.perf_counter()
        size = norm(start)
        for iteration in range(o.max_iter):
            if driven is not None:
                previous_tolerance = driven.tolerance
                driven.tolerance = driven.schedule(iteration, v.dtype)
                monitor.inexactness = 2.0 * relaxation * previous_tolerance * per_tolerance
            image, candidate_estimate = scheme(v)
            # With relaxation 1 the candidate is the map's output itself (not v + (T v - v),
            # which differs by rounding): a descent scheme recognises its own accepted point.
            candidate = image if relaxation == 1.0 else v + relaxation * (image - v)
            step = candidate - v
            step_norm = norm(step)
            if pending is not None:
                fallback, fallback_size = pending
                pending = None
                if not anderson.admits(step_norm):
                    # The candidate failed the safeguard: take the plain step from its origin.
                    v, size, plain = fallback, fallback_size, True
                    continue
            blow, candidate_size = monitor.blow_up(iteration, candidate)
            if blow is None:
                new_flags = monitor.observe(iteration, v, size, step, step_norm, plain)
                if watches_objective:
                    descent = scheme.last
                    if not objectives and math.isfinite(descent.objective_before):
                        objectives.append(descent.objective_before)
                    new_flags += monitor.descent(iteration, descent)
            else:
                new_flags = [blow]
            flags += new_flags
            action = _strongest(new_flags)
            if action == "warn" and not math.isfinite(candidate_size):
                action = "stop"  # a non-finite iterate never enters the run, whatever the policy
            if action == "stop":
                message = f"stopped by the monitor at iteration {iteration}: {new_flags[0].message}"
                break
            if action == "back_off":
                if back_offs == self.policy.max_back_offs:
                    message = f"stopped after {back_offs} back-offs: {new_flags[0].message}"
                    break
                back_offs += 1
                relaxation *= 0.5
                monitor.certify(*(_recertify(guarantee, self.step, relaxation)))
                if anderson is not None:
                    anderson.restart()
                continue
            residual = step_norm / relaxation
            residuals.append(residual)
            relative.append(residual / max(size, 1e-300))
            accepted = v
            size, plain = candidate_size, True
            v, estimate = candidate, candidate_estimate
            if watches_objective:
                objectives.append(scheme.last.objective_after)
            if self.reference is not None:
                metrics["psnr"].append(psnr(estimate, self.reference, data_range=self.data_range))
                metrics["ssim"].append(ssim(estimate, self.reference, data_range=self.data_range))
            if bar is not None:
                bar.update(1)
                bar.set_postfix(residual=f"{relative[-1]:.2e}")
            if o.callback is not None:
                state = IterationState(len(relative), estimate, v, residual, relative[-1])
                if o.callback(state) is True:
                    message = f"stopped by the callback after {len(relative)} iterations"
                    break
            if relative[-1] <= o.tol:
                converged, message = True, f"relative residual {relative[-1]:.2e} <= tol {o.tol:g}"
                break
            if residual <= error_floor:
                message = (
                    f"residual {residual:.3g} is within what the denoiser's stated error allows "
                    f"({error_floor:.3g}); convergence to the exact map's fixed point cannot be "
                    "established beyond it (the denoiser's tolerance cannot be driven down)"
                )
                break
            if anderson is not None:
                best = anderson.stagnated(accepted, step_norm)
                if best is not None:  # acceleration ended: plain steps from the lowest-residual point
                    v, size, plain = best, norm(best), False
                    continue
                proposal = anderson.propose(accepted, step, step_norm)
                if proposal is not None:
                    pending = (v, size)
                    v, size, plain = proposal, norm(proposal), False
        if pending is not None:  # max_iter ran out with a candidate unevaluated: end on the plain step
            v = pending[0]
        denoiser_input = scheme.denoiser_input(v)
        trivial = monitor.trivial(len(relative), denoiser_input, self.denoiser.apply(denoiser_input))
        if trivial is not None:
            flags.append(trivial)
        seconds = time.perf_counter() - begin
        if bar is not None:
            bar.close()
        notes: tuple[str, ...] = ()
        if guarantee is not None and relaxation != self.relaxation:
            notes = (f"relaxation lowered from {self.relaxation:g} to {relaxation:g} by back-offs",)
        if anderson is not None:
            notes += (
                (
                    f"Anderson acceleration: {anderson.accepted} accelerated steps accepted, "
                    f"{anderson.rejected} candidates rejected by the safeguard"
                ),
            )
            if anderson.ended_at is not None:
                notes += (
                    (
                        f"acceleration ended after {anderson.ended_at} accepted points ({anderson.end_reason}); "
                        "plain steps from then on, from the point of lowest residual"
                    ),
                )
        return Reconstruction(
            x=from_tensor(estimate, self.fidelity.kind),
            algorithm=self.algorithm.name,
            converged=converged,
            iterations=len(relative),
            message=message,
            residuals=np.asarray(residuals),
            relative_residuals=np.asarray(relative),
            objectives=np.asarray(objectives),
            metrics={name: np.asarray(values) for name, values in metrics.items()},
            flags=tuple(flags),
            step=self.step,
            relaxation=relaxation,
            report=report,
            guarantee=guarantee,
            seconds=seconds,
            check_seconds=check_seconds,
            back_offs=back_offs,
            notes=notes,
            accelerated=0 if anderson is None else anderson.accepted,
            safeguarded=0 if anderson is None else anderson.rejected,
        )


class _DrivenTolerance(Denoiser):
    """An inexact denoiser whose tolerance the run lowers along a summable schedule.

    ``tol_k = tol_0 (1 + k / SCHEDULE_DELAY)^(-SUMMABLE_POWER)``, floored at
    ``TOLERANCE_FLOOR_EPS`` times the machine epsilon of the iterates' dtype:
    below it the float arithmetic, not the inner solve, limits the accuracy
    (measured: float32 TV solves stall near 1.4e-5 RMS per pixel, 120 eps).
    The sum of the per-call errors is then finite up to that rounding, which
    is what the Krasnosel'skii-Mann iteration with errors needs.
    """

    def __init__(self, denoiser: Denoiser, driver: Any, tolerance: float):
        super().__init__(name=denoiser.name, sigma=denoiser.sigma, differentiable=False)
        self._driver = driver
        self.initial = tolerance
        self.tolerance = tolerance

    @classmethod
    def of(cls, denoiser: Denoiser, tolerance: float) -> _DrivenTolerance | None:
        driver = denoiser.tolerance_driver() if tolerance > 0 else None
        return None if driver is None else cls(denoiser, driver, tolerance)

    def schedule(self, iteration: int, dtype: torch.dtype) -> float:
        decay = (1.0 + iteration / SCHEDULE_DELAY) ** -SUMMABLE_POWER
        return max(self.initial * decay, TOLERANCE_FLOOR_EPS * torch.finfo(dtype).eps)

    def _denoise(self, t: torch.Tensor) -> torch.Tensor:
        return self._driver(t, self.tolerance)


#: Exponent of the inner-tolerance schedule (any value above 1 makes it summable).
SUMMABLE_POWER = 1.1
#: Iterations over which the tolerance stays near its start: ``(1 + k / SCHEDULE_DELAY)^-p`` is
#: summable like ``(k + 1)^-p`` but tightens later, when the iterates have settled and warm
#: starts make tight solves cheap (our choice, measured on the demo: same PSNR, fewer inner steps).
SCHEDULE_DELAY = 10.0
#: Floor of the driven tolerance in machine epsilons of the iterates' dtype.
TOLERANCE_FLOOR_EPS = 256.0

_INEXACT_THEOREM = (
    "Krasnosel'skii-Mann iteration with summable errors (Combettes, \"Solving monotone inclusions "
    "via compositions of nonexpansive averaged operators\", Optimization 53(5-6) 2004, 475-504; "
    "theorem number from memory: Sec. 3)"
)


def _inexact_guarantee(guarantee: Guarantee, tolerance: float, driven: bool) -> Guarantee:
    """The guarantee of a run whose denoiser is computed to a stated error."""
    if driven:
        text = (
            f"inexact denoiser, tolerance driven down along the run: tol_k = {tolerance:.3g} "
            f"(1 + k / {SCHEDULE_DELAY:g})^-{SUMMABLE_POWER:g} RMS per pixel, so the errors are summable and the iterates converge "
            f"to a fixed point of the exact map ({_INEXACT_THEOREM})"
        )
        return replace(guarantee, assumptions=guarantee.assumptions + (text,))
    text = (
        f"inexact denoiser whose tolerance ({tolerance:.3g} RMS per pixel) cannot be driven down: the "
        "guarantee is conditional on that error, and convergence is not declared below what it allows"
    )
    return replace(guarantee, status="conditional", assumptions=guarantee.assumptions + (text,))


_ACCELERATED_THEOREM = (
    "safeguarded type-I Anderson acceleration keeps the plain iteration's convergence (Zhang, O'Donoghue "
    "and Boyd, \"Globally convergent type-I Anderson acceleration for nonsmooth fixed-point iterations\", "
    "SIAM J. Optim. 30(4) 2020, 3170-3197, global convergence of the safeguarded scheme, theorem number "
    "from memory; Walker and Ni, SIAM J. Numer. Anal. 49(4) 2011; docs/theory.md section 13)"
)


def _accelerates(
    setting: bool | str, watches: str, guarantee: Guarantee | None, tolerance: float, watches_objective: bool
) -> bool:
    """Whether a run is accelerated: ``True``/``False`` as given; ``"auto"`` only where it was
    measured to pay with nothing lost.

    ``"auto"`` accelerates guarded fixed-point runs (a guarantee, the plain map's residual
    watched) whose denoiser is exact (check tolerance 0). With an inexact, iterative prox
    the accelerated candidates meet the prox's own errors: measured on the quick suite
    with the TV prox at tol 1e-6, 6 of 12 accelerated runs raised stall flags the plain
    ones did not and the median wall time fell only 1.1-1.4 times. Exact denoisers on the
    full suite (128 x 128, tol 1e-4, 120 runs) took 3.1 / 3.6 / 3.5 times fewer map
    evaluations in the median (forward-backward / Douglas-Rachford / ADMM) and raised no
    flag the plain runs did not (``benchmarks/bench_anderson.py``; ``docs/theory.md``,
    section 13).
    """
    if setting != "auto":
        return bool(setting)
    return guarantee is not None and watches == "fixed_point" and not watches_objective and tolerance == 0


def _accelerated_guarantee(guarantee: Guarantee, memory: int) -> Guarantee:
    """The guarantee of an accelerated run: the plain one, plus what the safeguard keeps."""
    size = memory_bytes(memory, 1024 * 1024, torch.float32) / 2**20
    text = (
        f"accelerated run (Anderson type I, memory {memory}; {size:.0f} MiB extra at 1024 x 1024 float32): "
        "a candidate is taken only when its fixed-point residual stays below D ||r_0|| (n + 1)^-(1 + eps) "
        "and its length is at most a fixed multiple of the plain step's, "
        f"otherwise the plain step, so the iterates converge to a fixed point of the same map ({_ACCELERATED_THEOREM})"
    )
    return replace(guarantee, assumptions=guarantee.assumptions + (text,))


def _strongest(flags: list[Flag]) -> str:
    actions = {flag.action for flag in flags}
    for action in ("stop", "back_off", "warn"):
        if action in actions:
            return action
    return "continue"


def _recertify(guarantee: Guarantee | None, step: float, relaxation: float) -> tuple[str | None, float]:
    if guarantee is None:
        return None, math.nan
    return guarantee.map_constant(step, relaxation)


def _progress(progress: Any, total: int, name: str):
    if not progress:
        return None
    from tqdm.auto import tqdm

    return tqdm(total=total, desc=name, leave=False)


def reconstruct(algorithm: str | Algorithm, fidelity: LeastSquares, denoiser: Any, **options: Any) -> Reconstruction:
    """Guarded PnP reconstruction with any algorithm of the table.

    The one entry point behind :func:`forward_backward`,
    :func:`douglas_rachford` and :func:`admm`; a new algorithm added to
    :data:`pnpguard.splitting.ALGORITHMS` runs through it with no further code.

    Parameters
    ----------
    algorithm : str or Algorithm
        API name or short name (``"forward_backward"`` / ``"fb"``, ...).
    fidelity : LeastSquares
        Data term ``f``.
    denoiser : Denoiser, callable or torch.nn.Module
        Anything :func:`pnpguard.as_denoiser` accepts.
    **options
        The keywords of :class:`RunOptions`, validated once.

    Returns
    -------
    Reconstruction

    Raises
    ------
    Refused
        On a guarded run that no theorem covers, or parameters outside the
        admissible set.
    TypeError, ValueError
        For an unknown algorithm or keyword, or an invalid option.

    Examples
    --------
    >>> import numpy as np, pnpguard as pg
    >>> frame = pg.phantoms.cells(32, seed=0)
    >>> blur = pg.Convolution(pg.gaussian_psf(5, 1.0), frame.shape)
    >>> fidelity = pg.LeastSquares(blur, blur(frame), sigma=0.01)
    >>> result = pg.reconstruct("fb", fidelity, pg.WaveletShrinkage(sigma=0.01), max_iter=50)
    >>> result.algorithm, result.guarantee.status
    ('forward_backward', 'proved')
    """
    record, run_options = algorithm_record(algorithm), RunOptions.from_keywords(options)
    with torch_threads(run_options.threads):
        return _Run(record, fidelity, denoiser, run_options).run()


def forward_backward(fidelity: LeastSquares, denoiser: Any, **options: Any) -> Reconstruction:
    """PnP forward-backward: ``x+ = x + lam (D(x - step grad f(x)) - x)``.

    The denoiser replaces the proximal step of the regulariser; the
    monitored variable is ``x`` and ``T = D (I - step grad f)``.

    Parameters
    ----------
    fidelity : LeastSquares
        Data term ``f``.
    denoiser : Denoiser, callable or torch.nn.Module
        Anything :func:`pnpguard.as_denoiser` accepts.
    **options
        The keywords of :class:`RunOptions` (``step`` is the gradient step
        ``eta``; ``relaxation``, ``guard``, ``x0``, ``max_iter``, ``tol``,
        ``callback``, ``reference``...), validated once.

    Return value and errors are those of :func:`reconstruct`.

    References
    ----------
    .. [1] P. L. Combettes and V. R. Wajs, "Signal recovery by proximal
       forward-backward splitting", Multiscale Model. Simul. 4(4) (2005)
       1168-1200, doi:10.1137/050626090.
    .. [2] Y. Sun, B. Wohlberg and U. S. Kamilov, "An online plug-and-play
       algorithm for regularized image reconstruction", IEEE Trans. Comput.
       Imaging 5(3) (2019) 395-408, doi:10.1109/TCI.2019.2893568.
    """
    return reconstruct("forward_backward", fidelity, denoiser, **options)


def douglas_rachford(fidelity: LeastSquares, denoiser: Any, **options: Any) -> Reconstruction:
    """PnP Douglas-Rachford: ``z+ = z + lam (prox_{gamma f}(2 D z - z) - D z)``.

    The monitored variable is ``z`` and ``T = (I + R_f R_D) / 2``; the
    estimate is ``prox_{gamma f}(2 D z - z)``. ``step`` is the prox parameter
    ``gamma``; ``x0`` initialises ``z``.

    Parameters, return value and errors are those of :func:`reconstruct`
    (``**options``: the keywords of :class:`RunOptions`).

    References
    ----------
    .. [1] P. L. Lions and B. Mercier, "Splitting algorithms for the sum of two
       nonlinear operators", SIAM J. Numer. Anal. 16(6) (1979) 964-979,
       doi:10.1137/0716071.
    .. [2] P. Giselsson and S. Boyd, IEEE Trans. Autom. Control 62(2) (2017)
       532-544, doi:10.1109/TAC.2016.2564160.
    """
    return reconstruct("douglas_rachford", fidelity, denoiser, **options)


def admm(fidelity: LeastSquares, denoiser: Any, **options: Any) -> Reconstruction:
    """PnP ADMM: ``x+ = prox_{gamma f}(z - u)``, ``z+ = D(x+ + u)``, ``u+ = u + x+ - z+``.

    Run as Douglas-Rachford on the governing sequence ``w = x+ + u`` (the
    change of variables of Eckstein & Bertsekas 1992), which is what the
    guarantee and the monitor are about; with ``z0 = x0`` and ``u0 = 0`` it
    starts from ``w0 = prox_{gamma f}(x0)``. A relaxation ``lam`` gives the
    over-relaxed ADMM ``x^ = lam x+ + (1 - lam) z`` in place of ``x+`` in the
    ``z`` and ``u`` updates. The estimate is ``x``; ``step`` is ``gamma``.

    Parameters, return value and errors are those of :func:`reconstruct`
    (``**options``: the keywords of :class:`RunOptions`).

    References
    ----------
    .. [1] D. Gabay, "Applications of the method of multipliers to variational
       inequalities", in *Augmented Lagrangian Methods*, North-Holland, 1983.
    .. [2] J. Eckstein and D. P. Bertsekas, Math. Program. 55 (1992) 293-318,
       doi:10.1007/BF01581204.
    .. [3] S. H. Chan, X. Wang and O. A. Elgendy, "Plug-and-play ADMM for image
       restoration: fixed-point convergence and applications", IEEE Trans.
       Comput. Imaging 3(1) (2017) 84-98, doi:10.1109/TCI.2016.2629286.
    """
    return reconstruct("admm", fidelity, denoiser, **options)


# help() and inspect.signature show every option by name (they live in RunOptions).
for _solver in (forward_backward, douglas_rachford, admm):
    _solver.__signature__ = solver_signature()  # type: ignore[attr-defined]
reconstruct.__signature__ = solver_signature("algorithm")  # type: ignore[attr-defined]
