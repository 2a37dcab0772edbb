"""Strength sweeps of the check: constants, verdicts and admissible step windows against strength."""

from __future__ import annotations

import json
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .._jobs import run_jobs
from .._validation import nonnegative_int, number_in, positive_number
from ..check import check_denoiser
from ..check._check import DEFAULT_BUDGET
from ..fidelity import LeastSquares
from ..guarantee import Refused, admissible
from ..guarantee._admissible import DEFAULT_MARGIN
from ..splitting import ALGORITHMS
from ..splitting import algorithm as algorithm_record

FORMAT = "pnpguard-strength-sweep"
FORMAT_VERSION = 1


def _finite(value: float) -> float | None:
    return float(value) if value is not None and math.isfinite(value) else None


@dataclass(frozen=True)
class SweepPoint:
    """The check and the guarantees at one strength.

    Attributes
    ----------
    strength : float
    verdict : str or None
        The check's verdict; None when building or checking the denoiser failed.
    theta, lipschitz, residual_lipschitz : float or None
        The check's constants (None when infinite or unknown).
    windows : dict of str to (float, float) or None
        Per algorithm (API name), the open interval of admissible step
        parameters (the upper end may be infinite; null in JSON), or None when
        the guard refuses.
    routes : dict of str to str
        Per algorithm, the theorem route used, or the refusal's first reason.
    error : str or None
        The error when the denoiser failed at this strength.
    """

    strength: float
    verdict: str | None
    theta: float | None
    lipschitz: float | None
    residual_lipschitz: float | None
    windows: dict[str, tuple[float, float] | None]
    routes: dict[str, str]
    error: str | None = None

    def as_dict(self) -> dict[str, Any]:
        """The point as plain JSON-ready values."""
        return {
            "strength": self.strength, "verdict": self.verdict, "theta": self.theta,
            "lipschitz": self.lipschitz, "residual_lipschitz": self.residual_lipschitz,
            "windows": {k: None if w is None else [_finite(w[0]), _finite(w[1])] for k, w in self.windows.items()},
            "routes": dict(self.routes), "error": self.error,
        }


@dataclass(frozen=True)
class StrengthSweep:
    """A sweep of the check over a denoiser's strength.

    Attributes
    ----------
    points : tuple of SweepPoint
        One per strength, increasing.
    algorithms : tuple of str
        API names of the algorithms whose windows were computed.
    step_names : dict of str to str
        What the step parameter means per algorithm (``"step"``, ``"gamma"``...).
    margin : float
        Safety margin on estimated constants.
    """

    points: tuple[SweepPoint, ...]
    algorithms: tuple[str, ...]
    step_names: dict[str, str]
    margin: float

    def refused(self, algorithm: str) -> tuple[float, ...]:
        """The strengths at which the guard refuses ``algorithm``."""
        name = algorithm_record(algorithm).name
        return tuple(p.strength for p in self.points if p.windows.get(name) is None)

    def as_dict(self) -> dict[str, Any]:
        """The sweep as our JSON layout (``format`` ``"pnpguard-strength-sweep"``, version 1)."""
        return {
            "format": FORMAT, "format_version": FORMAT_VERSION, "margin": self.margin,
            "algorithms": list(self.algorithms), "step_names": dict(self.step_names),
            "points": [p.as_dict() for p in self.points],
        }

    def save(self, path: str | Path) -> Path:
        """Write :meth:`as_dict` as JSON; returns the path."""
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(json.dumps(self.as_dict(), indent=1, allow_nan=False) + "\n")
        return path

    def plot(self, *, title: str | None = None) -> Any:
        """A figure: the constants against strength, and per algorithm the admissible step band.

        Refused strengths are marked with red crosses; the strength axis is
        logarithmic. Returns the matplotlib figure.
        """
        import matplotlib.pyplot as plt

        strengths = [p.strength for p in self.points]
        figure, axes = plt.subplots(1 + len(self.algorithms), 1, sharex=True,
                                    figsize=(6.0, 2.2 * (1 + len(self.algorithms))), squeeze=False)
        top = axes[0, 0]
        for key, label, marker in (("theta", "averagedness theta", "o"),
                                   ("lipschitz", "Lipschitz", "s"),
                                   ("residual_lipschitz", "residual Lipschitz ||I - D||", "^")):
            values = [getattr(p, key) for p in self.points]
            top.plot(strengths, [math.nan if v is None else v for v in values], marker=marker, label=label)
        top.axhline(1.0, color="0.6", lw=0.8, ls=":")
        top.set_ylabel("constant")
        top.legend(fontsize="small")
        if title:
            top.set_title(title)
        for axis, name in zip(axes[1:, 0], self.algorithms):
            low = [math.nan if p.windows[name] is None else p.windows[name][0] for p in self.points]
            high = [math.nan if p.windows[name] is None else p.windows[name][1] for p in self.points]
            finite = [v for v in low + high if math.isfinite(v) and v > 0]
            ceiling = 2.0 * max(finite) if finite else 1.0
            label = "admissible"
            if any(h == math.inf for h in high):
                # An unbounded window is drawn up to the ceiling.
                high = [ceiling if h == math.inf else h for h in high]
                label = f"admissible (unbounded above {ceiling / 2:.3g})" if finite else "admissible (unbounded)"
            axis.fill_between(strengths, low, high, alpha=0.35, label=label)
            axis.plot(strengths, high, color="C0", lw=1)
            refused = self.refused(name)
            if refused:
                finite = [h for h in high if math.isfinite(h)]
                level = min(finite) if finite else 1.0
                axis.plot(refused, [level] * len(refused), "x", color="red", ms=8, label="refused")
            axis.set_ylabel(f"{ALGORITHMS[name].short}: {self.step_names[name]}")
            axis.legend(fontsize="small")
        axes[-1, 0].set_xscale("log")
        axes[-1, 0].set_xlabel("strength")
        figure.tight_layout()
        return figure


@dataclass(frozen=True)
class _Job:
    factory: Callable[[float], Any]
    fidelity: LeastSquares
    strength: float
    algorithms: tuple[str, ...]
    budget: int
    seed: int
    margin: float


def _point(job: _Job) -> SweepPoint:
    denoiser = job.factory(job.strength)
    report = check_denoiser(denoiser, job.fidelity.start_image(), budget=job.budget, seed=job.seed)
    windows: dict[str, tuple[float, float] | None] = {}
    routes: dict[str, str] = {}
    for name in job.algorithms:
        try:
            guarantee = admissible(name, job.fidelity, report, margin=job.margin)
        except Refused as refusal:
            windows[name], routes[name] = None, refusal.reasons[0] if refusal.reasons else "refused"
            continue
        windows[name] = (float(guarantee.step_interval[0]), float(guarantee.step_interval[1]))
        routes[name] = guarantee.route
    return SweepPoint(job.strength, report.verdict, _finite(report.theta), _finite(report.lipschitz),
                      _finite(report.residual_lipschitz), windows, routes)


def sweep_check(
    factory: Callable[[float], Any],
    fidelity: LeastSquares,
    strengths: Sequence[float],
    *,
    algorithms: Sequence[str] | None = None,
    budget: int = DEFAULT_BUDGET,
    seed: int = 0,
    margin: float = DEFAULT_MARGIN,
    workers: int | str | None = None,
    scheduler: Any = None,
    progress: bool = False,
) -> StrengthSweep:
    """Check a denoiser at each strength and compute each algorithm's admissible step window.

    Parameters
    ----------
    factory : callable
        ``factory(strength) -> denoiser``.
    fidelity : LeastSquares
        The data term; the check samples around its first iterate
        ``A^T y / ||A||^2`` and the windows use its constants.
    strengths : sequence of float
        Positive strengths (sorted on return).
    algorithms : sequence of str, optional
        Algorithm names; default every algorithm of the table.
    budget, seed, margin
        As in :func:`pnpguard.check_denoiser` and :func:`pnpguard.admissible`.
    workers, scheduler, progress
        Where the checks run (see :func:`pnpguard.bench.run_suite`); default serially.

    Returns
    -------
    StrengthSweep
        A strength whose denoiser fails keeps its point, with the error and
        every algorithm refused.

    Examples
    --------
    >>> import numpy as np, pnpguard as pg
    >>> frame = pg.phantoms.cells(32, seed=0)
    >>> blur = pg.Convolution(pg.gaussian_psf(5, 1.0), frame.shape)
    >>> fidelity = pg.LeastSquares(blur, blur(frame), sigma=0.01)
    >>> sweep = pg.sweep_check(lambda s: pg.relaxed(pg.WaveletShrinkage(sigma=0.02), s), fidelity,
    ...                        [0.25, 0.5, 1.0], algorithms=["fb"])
    >>> [round(p.theta, 3) for p in sweep.points]
    [0.125, 0.25, 0.5]
    """
    if not callable(factory):
        raise TypeError(f"`factory` must be a callable strength -> denoiser, got {type(factory).__name__}")
    if not isinstance(fidelity, LeastSquares):
        raise TypeError(f"`fidelity` must be a pnpguard LeastSquares, got {type(fidelity).__name__}")
    grid = sorted(positive_number(s, f"strengths[{i}]") for i, s in enumerate(strengths))
    if not grid:
        raise ValueError("`strengths` must hold at least one strength, got an empty sequence")
    names = tuple(algorithm_record(a).name for a in (algorithms if algorithms is not None else ALGORITHMS))
    budget = nonnegative_int(budget, "budget")
    margin = number_in(margin, "margin", 0.0, 1.0, high_open=True)
    jobs = [_Job(factory, fidelity, s, names, budget, seed, margin) for s in grid]
    points = []
    for strength, done in zip(grid, run_jobs(_point, jobs, workers=workers, scheduler=scheduler,
                                             progress=progress, description="strengths")):
        points.append(done.value if done.ok else SweepPoint(
            strength, None, None, None, None, {n: None for n in names}, {n: "failed" for n in names}, done.error))
    step_names = {n: ALGORITHMS[n].step_name for n in names}
    return StrengthSweep(tuple(points), names, step_names, margin)
