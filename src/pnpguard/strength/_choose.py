"""Choose a denoiser's strength without ground truth: guarded runs over a grid, scored by a rule."""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import torch

from .._jobs import run_jobs
from .._validation import choice, int_at_least, nonnegative_int, positive_int, positive_number
from ..check import check_denoiser
from ..check._check import DEFAULT_BUDGET
from ..fidelity import LeastSquares
from ..guarantee import Refused
from ..metrics import psnr
from ..solvers import reconstruct
from ..splitting import algorithm as algorithm_record
from ._rules import DISCREPANCY_TAU, RULES, SureProbe, discrepancy


@dataclass(frozen=True)
class StrengthRow:
    """One strength tried: the rule's value and what the guard said.

    Attributes
    ----------
    strength : float
    value : float or None
        The rule's value (None when the guard refused the run or it failed):
        ``||A x - y||^2 / (m sigma^2)`` for the discrepancy rule, the per-pixel
        risk estimate for SURE.
    verdict : str or None
        The denoiser check's verdict (``"proved"``, ``"estimated"``, ``"refuted"``).
    guarantee : str
        The guarantee's status (``"proved"``, ``"conditional"``...), or
        ``"refused"``, or ``"failed"``.
    iterations : int
    seconds : float
        Wall time of the runs at this strength (two runs for SURE).
    message : str
        Why the run ended, the refusal's reasons, or the error.
    psnr : float or None
        PSNR against the ``reference`` given to :func:`choose_strength`
        (evaluation only; never used by the rule), else None.
    """

    strength: float
    value: float | None
    verdict: str | None
    guarantee: str
    iterations: int
    seconds: float
    message: str
    psnr: float | None = None

    def as_dict(self) -> dict[str, Any]:
        """The row as plain JSON-ready values."""
        return {
            "strength": self.strength, "value": self.value, "verdict": self.verdict,
            "guarantee": self.guarantee, "iterations": self.iterations, "seconds": self.seconds,
            "message": self.message, "psnr": self.psnr,
        }


@dataclass(frozen=True)
class StrengthChoice:
    """The strengths tried, in increasing order, and the one the rule chose.

    Attributes
    ----------
    strength : float or None
        The chosen strength (None when every strength was refused or failed).
    rule : {"discrepancy", "sure"}
    rows : tuple of StrengthRow
        Every strength tried, refused ones included, sorted by strength.
    algorithm : str
    x : numpy.ndarray or None
        The reconstruction at the chosen strength.
    note : str
        How the choice was made, in one sentence.
    """

    strength: float | None
    rule: str
    rows: tuple[StrengthRow, ...]
    algorithm: str
    x: np.ndarray | None = field(repr=False)
    note: str

    def table(self) -> str:
        """The rows as a plain-text table, the chosen strength marked with ``*``."""
        lines = [f"{'strength':>11}  {self.rule:>12}  {'check':>10}  {'guarantee':>11}  {'iter':>5}  {'time':>7}"]
        for row in self.rows:
            value = "-" if row.value is None else f"{row.value:.5g}"
            mark = " *" if row.strength == self.strength else ""
            lines.append(
                f"{row.strength:>11.4g}  {value:>12}  {row.verdict or '-':>10}  {row.guarantee:>11}  "
                f"{row.iterations:>5}  {row.seconds:>6.2f}s{mark}"
            )
        return "\n".join(lines)

    def __str__(self) -> str:
        chosen = "none" if self.strength is None else f"{self.strength:.4g}"
        return f"strength by {self.rule} ({self.algorithm}): {chosen}; {self.note}\n{self.table()}"

    def as_dict(self) -> dict[str, Any]:
        """The choice as plain JSON-ready values (without the reconstruction)."""
        return {"strength": self.strength, "rule": self.rule, "algorithm": self.algorithm,
                "note": self.note, "rows": [row.as_dict() for row in self.rows]}


@dataclass(frozen=True)
class _Job:
    fidelity: LeastSquares
    factory: Callable[[float], Any]
    algorithm: str
    strength: float
    rule: str
    noise: float
    probe: SureProbe | None
    options: dict[str, Any]
    reference: np.ndarray | None
    data_range: float


def _evaluate(job: _Job) -> tuple[StrengthRow, np.ndarray | None]:
    """Guarded run(s) at one strength and the rule's value."""
    begin = time.perf_counter()
    denoiser = job.factory(job.strength)
    report = job.options.get("report")
    if report is None and job.options.get("guard", True):
        report = check_denoiser(denoiser, job.fidelity.start_image(),
                                budget=job.options.get("check_budget", DEFAULT_BUDGET),
                                seed=job.options.get("seed", 0))
    options = {**job.options, "report": report}
    try:
        result = reconstruct(job.algorithm, job.fidelity, denoiser, **options)
    except Refused as refusal:
        row = StrengthRow(job.strength, None, report.verdict if report is not None else None,
                          "refused", 0, time.perf_counter() - begin, "; ".join(refusal.reasons))
        return row, None
    x = torch.as_tensor(result.x, dtype=job.fidelity.y.dtype).reshape(job.fidelity.image_shape)
    iterations = result.iterations
    if job.rule == "discrepancy":
        value = discrepancy(job.fidelity, x, job.noise)
    else:
        # Warm start at x_hat(y): the perturbed run then differs from it by the map's response.
        perturbed = reconstruct(job.algorithm, job.probe.perturbed(job.fidelity), job.factory(job.strength),
                                **{**options, "report": result.report, "x0": x})
        x_perturbed = torch.as_tensor(perturbed.x, dtype=x.dtype).reshape(x.shape)
        value = job.probe.value(job.fidelity.op, x, x_perturbed)
        iterations += perturbed.iterations
    verdict = result.report.verdict if result.report is not None else None
    status = result.guarantee.status if result.guarantee is not None else "none"
    quality = None
    if job.reference is not None:
        quality = psnr(np.asarray(result.x, dtype=np.float64), job.reference, data_range=job.data_range)
    row = StrengthRow(job.strength, value if math.isfinite(value) else None, verdict, status, iterations,
                      time.perf_counter() - begin, result.message, quality)
    return row, np.asarray(result.x, dtype=np.float64)


def _pick(rows: Sequence[StrengthRow], rule: str, tau: float) -> int | None:
    """Index of the chosen row among rows sorted by strength (None when none has a value)."""
    scored = [i for i, row in enumerate(rows) if row.value is not None]
    if not scored:
        return None
    if rule == "sure":
        return min(scored, key=lambda i: rows[i].value)
    within = [i for i in scored if rows[i].value <= tau**2]
    return max(within) if within else min(scored)


def _refinement(strengths: Sequence[float], chosen: int, rule: str, points: int) -> list[float]:
    """Geometric points between the chosen strength and its grid neighbours (the bracket)."""
    if points == 0:
        return []
    low = strengths[max(chosen - 1, 0)] if rule == "sure" else strengths[chosen]
    high = strengths[min(chosen + 1, len(strengths) - 1)]
    if high <= low:
        return []
    inside = np.geomspace(low, high, points + 2)[1:-1]
    return [float(s) for s in inside if all(not math.isclose(s, t, rel_tol=1e-9) for t in strengths)]


def choose_strength(
    fidelity: LeastSquares,
    factory: Callable[[float], Any],
    algorithm: str,
    strengths: tuple[float, float],
    *,
    rule: str = "sure",
    points: int = 7,
    refine: int = 4,
    noise: float | None = None,
    tau: float = DISCREPANCY_TAU,
    seed: int = 0,
    workers: int | str | None = None,
    scheduler: Any = None,
    progress: bool = False,
    reference: Any = None,
    data_range: float = 1.0,
    **options: Any,
) -> StrengthChoice:
    """Choose a denoiser's strength without ground truth.

    Guarded runs at ``points`` strengths spaced geometrically over the range,
    then ``refine`` more between the best one and its neighbours; each run is
    scored by a rule that needs only the data, the operator and the noise
    level. A strength the guard refuses stays in the table as refused.

    Parameters
    ----------
    fidelity : LeastSquares
        The data term ``||A x - y||^2 / (2 sigma^2)``.
    factory : callable
        ``factory(strength) -> denoiser``. With ``workers`` or ``scheduler`` it
        must be picklable by cloudpickle (a lambda is).
    algorithm : str
        Any algorithm of :data:`pnpguard.splitting.ALGORITHMS` (``"fb"``, ``"dr"``...).
    strengths : (float, float)
        The range ``(low, high)``, ``0 < low < high``.
    rule : {"sure", "discrepancy"}
        ``"sure"``: the smallest Monte-Carlo SURE risk (generalised SURE on the
        range of ``A^T`` when ``A`` has a null space). ``"discrepancy"``: the
        largest strength whose residual ``||A x - y||^2`` is at most
        ``tau^2 m noise^2`` (``m`` data values).
    points : int
        Strengths of the coarse grid (at least 2).
    refine : int
        Strengths added in each refinement bracket.
    noise : float, optional
        Standard deviation of the data's Gaussian noise; default ``fidelity.sigma``.
    tau : float
        Safety factor of the discrepancy principle (default 1: the residual
        matches the expected noise energy).
    seed : int
        Seed of the SURE probe (the same probe at every strength).
    workers, scheduler
        Where the runs go (see :func:`pnpguard.bench.run_suite`); default serially.
    progress : bool
        One progress bar over the runs.
    reference : array, optional
        Ground truth for evaluation only: each row then carries its PSNR
        (with ``data_range``); the rule never sees it.
    data_range : float
        Intensity range of the PSNR against ``reference``.
    **options
        Keywords of :func:`pnpguard.reconstruct` (``max_iter``, ``tol``, ``check_budget``...).

    Returns
    -------
    StrengthChoice

    Notes
    -----
    The discrepancy principle takes the largest regularisation whose data
    residual does not exceed the noise energy ``tau^2 m noise^2`` [1]_; with
    ``tau = 1`` it matches the expected residual at the true image. It presumes
    that the residual grows with the strength (true of proximal denoisers whose
    strength is their regularisation weight); when it does not, it picks an end
    of the range and SURE is the rule to use. SURE
    estimates the mean squared error from the data alone [2]_; the divergence
    of the reconstruction map is estimated with one probe ``c``, from a second
    run on ``y + delta c`` (``delta = noise / 10``) warm-started at the first
    result. For operators with a null space it estimates the error on the range
    of ``A^T`` [3]_, up to a constant (known for pixel masks, so the value is
    then the projected mean squared error per pixel).

    References
    ----------
    .. [1] V. A. Morozov, "On the solution of functional equations by the method of
       regularization", Soviet Math. Dokl. 7 (1966) 414-417.
    .. [2] S. Ramani, T. Blu, M. Unser, "Monte-Carlo SURE: a black-box optimization of
       regularization parameters for general denoising algorithms", IEEE Trans.
       Image Process. 17(9) (2008) 1540-1554, doi:10.1109/TIP.2008.2001404.
    .. [3] Y. C. Eldar, "Generalized SURE for exponential families: applications to
       regularization", IEEE Trans. Signal Process. 57(2) (2009) 471-481,
       doi:10.1109/TSP.2008.2008212.

    Examples
    --------
    >>> import numpy as np, pnpguard as pg
    >>> frame = pg.phantoms.cells(32, seed=0)
    >>> blur = pg.Convolution(pg.gaussian_psf(5, 1.0), frame.shape)
    >>> data = blur(frame) + 0.02 * np.random.default_rng(0).standard_normal(frame.shape)
    >>> fidelity = pg.LeastSquares(blur, data, sigma=0.02)
    >>> chosen = pg.choose_strength(fidelity, lambda s: pg.WaveletShrinkage(sigma=s), "fb",
    ...                             (1e-4, 1e-1), rule="discrepancy", points=4, refine=0, max_iter=30)
    >>> len(chosen.rows), chosen.strength in [row.strength for row in chosen.rows]
    (4, True)
    """
    if not isinstance(fidelity, LeastSquares):
        raise TypeError(f"`fidelity` must be a pnpguard LeastSquares, got {type(fidelity).__name__}")
    if not callable(factory):
        raise TypeError(f"`factory` must be a callable strength -> denoiser, got {type(factory).__name__}")
    record = algorithm_record(algorithm)
    rule = choice(rule, "rule", RULES)
    if not (isinstance(strengths, Sequence) and len(strengths) == 2):
        raise ValueError(f"`strengths` must be a pair (low, high), got {strengths!r}")
    low = positive_number(strengths[0], "strengths[0]")
    high = positive_number(strengths[1], "strengths[1]")
    if not low < high:
        raise ValueError(f"`strengths` must have low < high, got {strengths!r}")
    points = int_at_least(points, "points", 2)
    refine = nonnegative_int(refine, "refine")
    noise = fidelity.sigma if noise is None else positive_number(noise, "noise")
    tau = positive_number(tau, "tau")
    probe = SureProbe.build(fidelity, noise, seed) if rule == "sure" else None
    if reference is not None:
        reference = np.asarray(reference, dtype=np.float64)
    data_range = positive_number(data_range, "data_range")

    def run(grid: Sequence[float]) -> list[tuple[StrengthRow, np.ndarray | None]]:
        jobs = [_Job(fidelity, factory, record.name, float(s), rule, noise, probe, options, reference, data_range)
                for s in grid]
        out = []
        for strength, done in zip(grid, run_jobs(_evaluate, jobs, workers=workers, scheduler=scheduler,
                                                  progress=progress, description="strengths")):
            out.append(done.value if done.ok else (
                StrengthRow(float(strength), None, None, "failed", 0, 0.0, done.error), None))
        return out

    evaluated = dict(zip(np.geomspace(low, high, points).tolist(), run(np.geomspace(low, high, points).tolist())))
    grid = sorted(evaluated)
    chosen = _pick([evaluated[s][0] for s in grid], rule, tau)
    if chosen is not None:
        extra = _refinement(grid, chosen, rule, refine)
        evaluated.update(zip(extra, run(extra)))
        grid = sorted(evaluated)
        chosen = _pick([evaluated[s][0] for s in grid], rule, tau)
    rows = tuple(evaluated[s][0] for s in grid)
    if chosen is None:
        note = "every strength was refused or failed"
        return StrengthChoice(None, rule, rows, record.name, None, note)
    if rule == "sure":
        note = "smallest SURE risk estimate"
    elif rows[chosen].value <= tau**2:
        note = f"largest strength with residual <= tau^2 m noise^2 (tau = {tau:g})"
    else:
        note = f"no strength has residual <= tau^2 m noise^2 (tau = {tau:g}); the smallest was taken"
    return StrengthChoice(grid[chosen], rule, rows, record.name, evaluated[grid[chosen]][1], note)
