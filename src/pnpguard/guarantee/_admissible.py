"""Admissible step sizes and relaxations for PnP algorithms, or a refusal."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Literal

from ..check import CheckReport
from ..fidelity import LeastSquares
from . import _theorems as th
from ._refused import Refused

ALGORITHMS = ("admm", "douglas_rachford", "forward_backward")

#: Relative inflation of estimated constants before use (our choice: the search
#: typically lands within 1 % of the true constant on test maps with known values).
DEFAULT_MARGIN = 0.05

Status = Literal["proved", "conditional"]
MapKind = Literal["averaged", "contraction", "nonexpansive"]

_FB_THEOREM = (
    "Krasnosel'skii-Mann iteration of T = D (I - step grad f), which is averaged by "
    "Combettes & Yamada, J. Math. Anal. Appl. 425 (2015), Prop. 2.4"
)
_FB_NONEXPANSIVE = (
    "Krasnosel'skii-Mann iteration of the nonexpansive map T = D (I - step grad f) "
    "(Bauschke & Combettes 2017, Thm. 5.15)"
)
_FB_CONTRACTION = (
    "Ryu, Liu, Wang, Chen, Wang & Yin, ICML 2019, Thm. 1: T = D (I - step grad f) is a "
    "contraction when D - I is eps-Lipschitz and f strongly convex"
)
_DR_FIRM = (
    "Douglas-Rachford with two firmly nonexpansive resolvents: T = (I + R_f R_D) / 2 is "
    "firmly nonexpansive (Bauschke & Combettes 2017, Thm. 26.11)"
)
_DR_CONTRACTION = (
    "Douglas-Rachford contraction: R_f is delta(gamma)-Lipschitz for strongly convex f "
    "(Giselsson & Boyd, IEEE TAC 62(2) 2017, Thm. 1) and R_D is Lipschitz with the "
    "constant of the denoiser's measured constants; product < 1 (derived)"
)


@dataclass(frozen=True)
class Guarantee:
    """Admissible parameters for one algorithm, and the theorem behind them.

    Attributes
    ----------
    algorithm : str
        ``"forward_backward"``, ``"douglas_rachford"`` or ``"admm"``.
    route : str
        Which case applied (``"averaged"``, ``"nonexpansive"``,
        ``"residual contraction"``, ``"firmly nonexpansive"``,
        ``"strongly convex"``).
    step : float
        Recommended step (forward-backward) or prox parameter ``gamma``
        (Douglas-Rachford / ADMM).
    step_interval : tuple of float
        Open interval of admissible steps.
    relaxation : float
        Recommended relaxation ``lam`` in ``x+ = x + lam (T x - x)``.
    relaxation_interval : tuple of float
        Open interval of admissible relaxations (at the recommended step).
    map_kind : {"averaged", "contraction", "nonexpansive"}
        What the theorem says of the relaxed iteration map at the recommended
        parameters.
    constant : float
        Its averagedness constant or contraction factor (1 for nonexpansive).
    theorem : str
        Citation.
    assumptions : tuple of str
        What the guarantee rests on.
    status : {"proved", "conditional"}
        ``"proved"`` when every constant used is proved; ``"conditional"``
        when one is an estimate (inflated by ``margin``).
    theta, residual_lipschitz, lipschitz, strong_convexity : float
        The constants used (denoiser's after the margin; data term's ``L`` and
        ``mu``).
    margin : float
        Safety margin applied to estimated constants.
    alternatives : tuple of Guarantee
        Other routes that also apply.
    """

    algorithm: str
    route: str
    step: float
    step_interval: tuple[float, float]
    relaxation: float
    relaxation_interval: tuple[float, float]
    map_kind: MapKind
    constant: float
    theorem: str
    assumptions: tuple[str, ...]
    status: Status
    theta: float
    residual_lipschitz: float
    lipschitz: float
    strong_convexity: float
    margin: float
    alternatives: tuple[Guarantee, ...] = field(default=(), repr=False)

    # ------------------------------------------------------------------ use
    def map_constant(self, step: float, relaxation: float) -> tuple[MapKind, float]:
        """What the theorem gives for the relaxed iteration map at other parameters.

        Raises :class:`Refused` when the parameters are outside the admissible
        set of this route.
        """
        low, high = self.step_interval
        if not (low < step < high):
            raise Refused(
                [
                    f"{self.algorithm}: step {step:.6g} is outside the admissible interval "
                    f"({low:.6g}, {high:.6g}) of the {self.route} route"
                ],
                [f"use step {self.step:.6g} (recommended) or any value inside the interval"],
            )
        kind, constant, (_, lam_high) = _route_map(self, step)
        if not (0.0 < relaxation < lam_high):
            raise Refused(
                [
                    f"{self.algorithm}: relaxation {relaxation:.6g} is outside the admissible "
                    f"interval (0, {lam_high:.6g}) at step {step:.6g}"
                ],
                [f"use relaxation {min(self.relaxation, 0.5 * lam_high):.6g}"],
            )
        if kind == "averaged":
            return "averaged", relaxation * constant
        if kind == "contraction":
            return "contraction", _relaxed_factor(self.algorithm, relaxation, constant)
        return "nonexpansive", 1.0

    def __str__(self) -> str:
        low, high = self.step_interval
        name = "step" if self.algorithm == "forward_backward" else "gamma"
        lines = [
            f"guarantee for {self.algorithm} ({self.route} route): {self.status.upper()}",
            f"  {name:<19}{self.step:.6g}   admissible ({low:.6g}, {_fmt(high)})",
            f"  relaxation         {self.relaxation:.6g}   admissible "
            f"({self.relaxation_interval[0]:.6g}, {_fmt(self.relaxation_interval[1])})",
            f"  iteration map      {self.map_kind}"
            + ("" if self.map_kind == "nonexpansive" else f", constant {self.constant:.6g}"),
            f"  theorem            {self.theorem}",
        ]
        lines += [f"  assumes            {text}" for text in self.assumptions]
        for other in self.alternatives:
            lines.append(f"  also admissible    {other.route} route, {name} {other.step:.6g}")
        return "\n".join(lines)


def _fmt(value: float) -> str:
    return "inf" if math.isinf(value) else f"{value:.6g}"


def _relaxed_factor(algorithm: str, relaxation: float, rho: float) -> float:
    """Contraction factor of the relaxed map given the base map's Lipschitz ``rho``.

    Forward-backward: ``T`` itself is ``rho``-Lipschitz. Douglas-Rachford:
    ``rho`` is the Lipschitz constant of ``R_f R_D`` and ``T = (I + R_f R_D)/2``,
    so ``(1 - lam) I + lam T = (1 - lam/2) I + (lam/2) R_f R_D``.
    """
    if algorithm == "forward_backward":
        return th.relaxed_contraction(relaxation, rho)
    return th.relaxed_contraction(relaxation / 2.0, rho)


def _route_map(guarantee: Guarantee, step: float) -> tuple[MapKind, float, tuple[float, float]]:
    """(kind, base constant, relaxation interval) of a route at a given step."""
    theta, eps = guarantee.theta, guarantee.residual_lipschitz
    lip, mu = guarantee.lipschitz, guarantee.strong_convexity
    if guarantee.route == "averaged":
        alpha = th.forward_backward_averagedness(theta, step, lip)
        return "averaged", alpha, (0.0, 1.0 / alpha)
    if guarantee.route == "nonexpansive":
        return "nonexpansive", 1.0, (0.0, 1.0)
    if guarantee.route == "residual contraction" and guarantee.algorithm == "forward_backward":
        rho = th.forward_backward_contraction(eps, step, mu, lip)
        return "contraction", rho, (0.0, 2.0 / (1.0 + rho))
    if guarantee.route == "firmly nonexpansive":
        return "averaged", 0.5, (0.0, 2.0)
    reflected = (
        th.reflected_denoiser_lipschitz(theta)
        if guarantee.route == "strongly convex"
        else 1.0 + 2.0 * eps
    )
    rho = reflected * th.reflected_prox_lipschitz(step, mu, lip)
    return "contraction", rho, (0.0, 4.0 / (1.0 + rho))


# ---------------------------------------------------------------------- inputs
@dataclass(frozen=True)
class _Constants:
    theta: float
    eps: float
    denoiser_lipschitz: float
    lipschitz: float
    mu: float
    denoiser_proved: bool
    data_proved: bool
    margin: float
    report: CheckReport

    @property
    def status(self) -> Status:
        return "proved" if self.denoiser_proved and self.data_proved else "conditional"

    def assumptions(self) -> tuple[str, ...]:
        texts = []
        report = self.report
        if self.denoiser_proved:
            texts.append(f"denoiser constants proved from its structure ({report.method})")
            if report.tolerance > 0:
                texts.append(
                    f"the denoiser is an inexact prox: each call within RMS {report.tolerance:.3g} "
                    "per pixel of the exact map, whose constants are proved"
                )
        else:
            texts.append(
                f"denoiser constants are estimates (lower bounds from {report.calls} calls), "
                f"inflated by {100 * self.margin:.0f} %: theta {report.theta:.4g} -> "
                f"{self.theta:.4g}, Lipschitz(D - I) {report.residual_lipschitz:.4g} -> {self.eps:.4g}"
            )
        texts.append(
            "data term convex, grad f Lipschitz with L = "
            f"{self.lipschitz:.6g} ({'certified' if self.data_proved else 'estimated norm'})"
            + (f", strongly convex with mu = {self.mu:.6g}" if self.mu > 0 else ", mu = 0")
        )
        texts.append("the iteration map has a fixed point (a solution exists)")
        return tuple(texts)


def _constants(fidelity: LeastSquares, report: CheckReport, margin: float) -> _Constants:
    proved = report.verdict == "proved"
    inflate = 1.0 if proved else 1.0 + margin
    return _Constants(
        theta=report.theta * inflate,
        eps=report.residual_lipschitz * inflate,
        denoiser_lipschitz=report.lipschitz,
        lipschitz=fidelity.lipschitz,
        mu=fidelity.strong_convexity,
        denoiser_proved=proved,
        data_proved=fidelity.lipschitz_certified,
        margin=0.0 if proved else margin,
        report=report,
    )


def _guarantee(algorithm, route, step, window, relaxation, theorem, c: _Constants) -> Guarantee:
    draft = Guarantee(
        algorithm=algorithm,
        route=route,
        step=step,
        step_interval=window,
        relaxation=relaxation,
        relaxation_interval=(0.0, 0.0),
        map_kind="averaged",
        constant=0.0,
        theorem=theorem,
        assumptions=c.assumptions(),
        status=c.status,
        theta=c.theta,
        residual_lipschitz=c.eps,
        lipschitz=c.lipschitz,
        strong_convexity=c.mu,
        margin=c.margin,
    )
    kind, constant, lam_window = _route_map(draft, step)
    final_constant = constant
    if kind == "averaged":
        final_constant = relaxation * constant
    elif kind == "contraction":
        final_constant = _relaxed_factor(algorithm, relaxation, constant)
    return Guarantee(
        **{
            **draft.__dict__,
            "relaxation": relaxation,
            "relaxation_interval": lam_window,
            "map_kind": kind,
            "constant": final_constant,
        }
    )


# ---------------------------------------------------------------------- routes
def _forward_backward_routes(c: _Constants) -> tuple[list[Guarantee], list[str]]:
    routes, reasons = [], []
    lip, mu = c.lipschitz, c.mu
    if c.theta < 1.0:
        routes.append(
            _guarantee("forward_backward", "averaged", 1.0 / lip, (0.0, 2.0 / lip), 1.0, _FB_THEOREM, c)
        )
    else:
        reasons.append(_not_averaged_reason(c))
    window = th.forward_backward_contraction_window(c.eps, mu, lip) if mu > 0 else None
    if window is not None:
        step = min(max(2.0 / (lip + mu), window[0] * 1.001), window[1] * 0.999)
        routes.append(
            _guarantee("forward_backward", "residual contraction", step, window, 1.0, _FB_CONTRACTION, c)
        )
    elif mu > 0:
        reasons.append(
            f"residual route (Ryu et al. 2019): needs Lipschitz(D - I) = {c.eps:.4g} < "
            f"2 mu / (L - mu) = {2 * mu / (lip - mu) if lip > mu else math.inf:.4g}"
        )
    if c.theta >= 1.0 and c.report.nonexpansive and c.denoiser_lipschitz <= 1.0:
        routes.append(
            _guarantee("forward_backward", "nonexpansive", 1.0 / lip, (0.0, 2.0 / lip), 0.5, _FB_NONEXPANSIVE, c)
        )
    return routes, reasons


def _inside(preferred: float, window: tuple[float, float], fallback: float) -> float:
    """``preferred`` when it lies in the open window, else ``fallback``."""
    return preferred if window[0] < preferred < window[1] else fallback


def _douglas_rachford_routes(algorithm: str, c: _Constants) -> tuple[list[Guarantee], list[str]]:
    routes, reasons = [], []
    lip, mu = c.lipschitz, c.mu
    # gamma = 1/L matches the forward-backward step, so the fixed points weigh data and
    # denoiser alike (common practice); 1/sqrt(mu L) (the fastest contraction) when 1/L
    # falls outside a contraction window, which always contains it.
    gamma = 1.0 / lip
    if c.theta <= 0.5:
        routes.append(_guarantee(algorithm, "firmly nonexpansive", gamma, (0.0, math.inf), 1.0, _DR_FIRM, c))
        return routes, reasons
    if mu <= 0:
        reasons.append(
            f"{algorithm} needs a firmly nonexpansive denoiser (theta <= 1/2) or a strongly convex "
            f"data term; theta = {c.theta:.4g} and the forward model has a null space or no "
            "known lower singular value (mu = 0)"
        )
        return routes, reasons
    gamma_star = th.optimal_prox_parameter(mu, lip)
    if c.theta < 1.0:
        window = th.douglas_rachford_window(th.reflected_denoiser_lipschitz(c.theta), mu, lip)
        if window is not None:
            step = _inside(gamma, window, gamma_star)
            routes.append(_guarantee(algorithm, "strongly convex", step, window, 1.0, _DR_CONTRACTION, c))
        else:
            reasons.append(
                f"strongly convex route: no gamma makes (4 theta - 1) delta(gamma) < 1 with "
                f"theta = {c.theta:.4g}, mu / L = {mu / lip:.4g}; it needs theta < "
                f"{_theta_limit(mu, lip):.4g}"
            )
    else:
        reasons.append(_not_averaged_reason(c))
    window = th.douglas_rachford_window(1.0 + 2.0 * c.eps, mu, lip)
    if window is not None:
        step = _inside(gamma, window, gamma_star)
        routes.append(_guarantee(algorithm, "residual contraction", step, window, 1.0, _DR_CONTRACTION, c))
    return routes, reasons


def _theta_limit(mu: float, lipschitz: float) -> float:
    """Largest theta for which the strongly convex DR window is nonempty: 1 / (2 (1 - sqrt(mu / L)))."""
    return 1.0 / (2.0 * (1.0 - math.sqrt(mu / lipschitz)))


def _not_averaged_reason(c: _Constants) -> str:
    report = c.report
    if report.refuted == "nonexpansiveness":
        return (
            f"denoiser is expansive: a pair has ||Dx - Dy|| = {report.lipschitz:.4g} ||x - y|| "
            "(witness attached to the check report)"
        )
    if report.verdict == "refuted":
        return f"denoiser is not averaged: a pair attains theta = {report.theta:.4g} (witness attached)"
    return (
        f"denoiser theta = {c.report.theta:.4g} (estimate) inflated by the "
        f"{100 * c.margin:.0f} % margin to {c.theta:.4g} is not below 1"
    )


# ----------------------------------------------------------------- suggestions
def _suggestions(algorithm: str, c: _Constants) -> tuple[list[str], float | None]:
    """Ways out of a refusal, and the relaxation factor when one repairs the case."""
    suggestions = []
    if algorithm != "forward_backward":
        fb, _ = _forward_backward_routes(c)
        if fb:
            suggestions.append(
                f"switch to forward_backward: {fb[0].route} route with step {fb[0].step:.6g} "
                f"(admissible ({fb[0].step_interval[0]:.3g}, {fb[0].step_interval[1]:.6g}))"
            )
    if algorithm == "forward_backward":
        target = 0.99
    elif c.mu > 0:
        target = max(0.5, 0.99 * _theta_limit(c.mu, c.lipschitz))
    else:
        target = 0.5
    relaxation = None
    if math.isfinite(c.report.theta) and c.theta > target:
        s = math.floor(1000.0 * target / c.theta) / 1000.0
        if s > 0:
            relaxation = s
            suggestions.append(
                f"relax the denoiser: pnpguard.relaxed(denoiser, {s:g}) = (1 - s) I + s D has "
                f"theta = {s:g} x {c.theta:.4g} = {s * c.theta:.4g}, admissible for {algorithm}"
            )
    elif not math.isfinite(c.report.theta):
        suggestions.append(
            "relaxation cannot repair this denoiser: the witness pair is expanded with "
            "<x - y, r> <= 0 for every relaxation factor; use a denoiser with proved structure "
            "(e.g. wavelet soft thresholding or an averaged-by-construction network)"
        )
    suggestions.append("lower the denoiser strength (sigma) and check again")
    return suggestions, relaxation


def admissible(
    algorithm: str,
    fidelity: LeastSquares,
    report: CheckReport,
    *,
    margin: float = DEFAULT_MARGIN,
) -> Guarantee:
    """Admissible parameters for a PnP algorithm, from published theorems.

    Parameters
    ----------
    algorithm : {"forward_backward", "douglas_rachford", "admm"}
        The splitting. ADMM is Douglas-Rachford on the governing sequence
        ``w = x + u`` and gets the same conditions.
    fidelity : LeastSquares
        The data term (its ``lipschitz`` and ``strong_convexity``).
    report : CheckReport
        The denoiser check (:func:`pnpguard.check_denoiser`).
    margin : float, optional
        Relative inflation of *estimated* denoiser constants (default 0.05).

    Returns
    -------
    Guarantee
        The preferred route; other applicable routes in ``alternatives``.

    Raises
    ------
    Refused
        When no route applies, with reasons and computed suggestions.

    Notes
    -----
    Routes, with ``L``, ``mu`` the data term's constants:

    1. Forward-backward, ``D`` theta-averaged (theta < 1): any step in
       ``(0, 2/L)``; ``T = D (I - step grad f)`` is alpha-averaged with
       ``alpha = (theta + b - 2 theta b) / (1 - theta b)``, ``b = step L / 2``;
       relaxation in ``(0, 1/alpha)`` (Combettes & Yamada 2015; Krasnosel'skii-
       Mann). Recommended: step ``1/L``, relaxation 1.
    2. Forward-backward, ``D`` only nonexpansive: relaxation in ``(0, 1)``.
    3. Douglas-Rachford / ADMM, theta <= 1/2: any ``gamma > 0``; relaxation of
       ``T = (I + R_f R_D)/2`` in ``(0, 2)``. Recommended ``gamma = 1/L``, the
       forward-backward step, so that the fixed points weigh data and denoiser
       alike (common practice).
    4. Douglas-Rachford / ADMM, 1/2 < theta < 1, ``mu > 0``: ``gamma`` in the
       window where ``(4 theta - 1) delta(gamma) < 1`` (Giselsson & Boyd 2017);
       recommended ``1/L`` when inside, else ``1/sqrt(mu L)``.
    5. Residual route (Ryu et al. 2019): ``D - I`` eps-Lipschitz and ``mu > 0``:
       forward-backward steps in ``(1/(mu (1 + 1/eps)), 2/L - 1/(L (1 + 1/eps)))``;
       Douglas-Rachford with ``R_D`` bounded by ``1 + 2 eps`` (derived).

    References
    ----------
    .. [1] P. L. Combettes and I. Yamada, J. Math. Anal. Appl. 425 (2015) 55-70,
       doi:10.1016/j.jmaa.2014.11.044.
    .. [2] P. Giselsson and S. Boyd, IEEE Trans. Autom. Control 62(2) (2017)
       532-544, doi:10.1109/TAC.2016.2564160.
    .. [3] E. K. Ryu et al., "Plug-and-play methods provably converge with
       properly trained denoisers", ICML 2019, PMLR 97.
    .. [4] H. H. Bauschke and P. L. Combettes, *Convex Analysis and Monotone
       Operator Theory in Hilbert Spaces*, 2nd ed., Springer, 2017, Thm. 5.15
       and Prop. 5.16 (Krasnosel'skii-Mann).
    """
    if algorithm not in ALGORITHMS:
        raise ValueError(f"`algorithm` must be one of {sorted(ALGORITHMS)}, got {algorithm!r}")
    if not isinstance(fidelity, LeastSquares):
        raise TypeError(f"`fidelity` must be a pnpguard LeastSquares, got {type(fidelity).__name__}")
    if not isinstance(report, CheckReport):
        raise TypeError(f"`report` must be a CheckReport from check_denoiser, got {type(report).__name__}")
    if isinstance(margin, bool) or not isinstance(margin, (int, float)) or not 0.0 <= margin < 1.0:
        raise ValueError(f"`margin` must be a number in [0, 1), got {margin!r}")
    c = _constants(fidelity, report, float(margin))
    if c.lipschitz <= 0.0:
        raise Refused(["the data term is constant (its operator is zero): nothing to reconstruct"])
    if algorithm == "forward_backward":
        routes, reasons = _forward_backward_routes(c)
    else:
        routes, reasons = _douglas_rachford_routes(algorithm, c)
    if not routes:
        suggestions, relaxation = _suggestions(algorithm, c)
        raise Refused(reasons, suggestions, relaxation=relaxation)
    best, *others = routes
    return Guarantee(**{**best.__dict__, "alternatives": tuple(others)})
