"""Admissible step sizes and relaxations for PnP algorithms, or a refusal."""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Literal

from .._validation import number_in
from ..check import CheckReport, claimed_constants
from ..fidelity import LeastSquares
from ..splitting import ALGORITHMS
from ..splitting import algorithm as algorithm_record
from ._refused import Refused
from ._routes import ROUTES, Constants, MapKind, Route, Window, find_route, routes_for, theta_limit
from ._theorems import optimal_prox_parameter, same_fixed_point_strength

#: Relative inflation of estimated constants before use (our choice: the search
#: typically lands within 1 % of the true constant on test maps with known values).
DEFAULT_MARGIN = 0.05

#: A strong convexity below this fraction of ``L`` is rounding in the data term's
#: smallest singular value (float64 eps is 2.2e-16; generous factor: common practice)
#: and is taken as 0.
MU_ROUNDING = 1e-12

Status = Literal["proved", "conditional"]


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
    map_kind : {"averaged", "contraction", "descent", "nonexpansive"}
        What the theorem says of the relaxed iteration map at the recommended
        parameters.
    constant : float
        Its averagedness constant or contraction factor (1 for nonexpansive).
    theorem : str
        Citation.
    assumptions : tuple of str
        What the guarantee rests on.
    status : {"proved", "conditional"}
        ``"proved"`` when every constant used is proved (the data term's
        ``L`` from a certified norm bound); ``"conditional"`` when one is an
        estimate (inflated by ``margin``) or a claim (the denoiser's, or a
        norm the user gave to :func:`pnpguard.as_operator`).
    theta, residual_lipschitz, lipschitz, strong_convexity : float
        The constants used (denoiser's after the margin; data term's ``L`` and
        ``mu``).
    margin : float
        Safety margin applied to estimated constants.
    smoothness : float
        ``Lip(grad g)`` after the margin, for the prox route (``inf`` when not
        estimated).
    alternatives : tuple of Guarantee
        Other routes that also apply.
    rule : Route
        The route record (from :data:`pnpguard.guarantee.ROUTES`) behind the guarantee.
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
    smoothness: float = math.inf
    alternatives: tuple[Guarantee, ...] = field(default=(), repr=False)
    rule: Route | None = field(default=None, repr=False, compare=False)

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
                    f"{self.algorithm}: {self._step_name} {step:.6g} is outside the admissible interval "
                    f"({low:.6g}, {high:.6g}) of the {self.route} route"
                ],
                [f"use {self._step_name} {self.step:.6g} (recommended) or any value inside the interval"],
            )
        route = self.rule if self.rule is not None else find_route(self.route, self.algorithm)
        certified = route.iteration_map(self, step)
        lam_high = certified.relaxations[1]
        if not (0.0 < relaxation < lam_high):
            raise Refused(
                [
                    f"{self.algorithm}: relaxation {relaxation:.6g} is outside the admissible "
                    f"interval (0, {lam_high:.6g}) at {self._step_name} {step:.6g}"
                ],
                [f"use relaxation {min(self.relaxation, 0.5 * lam_high):.6g}"],
            )
        if certified.kind == "nonexpansive":
            return "nonexpansive", 1.0
        return certified.kind, route.relaxed(relaxation, certified.constant)

    @property
    def _step_name(self) -> str:
        return algorithm_record(self.algorithm).step_name

    def __str__(self) -> str:
        low, high = self.step_interval
        name = self._step_name
        lines = [
            f"guarantee for {self.algorithm} ({self.route} route): {self.status.upper()}",
            f"  {name:<19}{self.step:.6g}   admissible ({low:.6g}, {_fmt(high)})",
            f"  relaxation         {self.relaxation:.6g}   "
            + (
                "admissible: 1 only"
                if self.relaxation_interval[1] - self.relaxation_interval[0] < 1e-12
                else f"admissible ({self.relaxation_interval[0]:.6g}, {_fmt(self.relaxation_interval[1])})"
            ),
            _map_text(self.map_kind, self.constant, self.rule),
            f"  theorem            {self.theorem}",
        ]
        lines += [f"  assumes            {text}" for text in self.assumptions]
        for other in self.alternatives:
            lines.append(f"  also admissible    {other.route} route, {name} {other.step:.6g}")
        return "\n".join(lines)


def _map_text(kind: str, constant: float, rule: Route | None) -> str:
    if kind == "descent" and rule is not None:
        return "  objective          " + rule.objective.format(c=constant)
    return f"  iteration map      {kind}" + ("" if kind == "nonexpansive" else f", constant {constant:.6g}")


def _fmt(value: float) -> str:
    return "inf" if math.isinf(value) else f"{value:.6g}"


# ---------------------------------------------------------------------- inputs
def _constants(fidelity: LeastSquares, report: CheckReport, margin: float) -> Constants:
    """The constants the routes read: proved, claimed (unrefuted claims) or estimated + margin.

    ``L`` from an estimated operator norm is inflated by ``margin`` like an
    estimated denoiser constant; a claimed norm stands as stated.
    """
    estimates = (report.theta, report.residual_lipschitz)
    data_basis = fidelity.lipschitz_basis
    lipschitz = fidelity.lipschitz * (1.0 + margin if data_basis == "estimated" else 1.0)
    mu = fidelity.strong_convexity
    if mu <= MU_ROUNDING * lipschitz:
        mu = 0.0
    smoothness_raw = math.nan
    if report.smoothness is not None:
        # Both are lower bounds of Lip(I - D): the larger is the better estimate.
        smoothness_raw = max(report.smoothness.value, report.residual_lipschitz)
    potential = ""
    if any(f.kind == "gradient_step" and f.verified for f in report.facts):
        potential = "proved"
    elif any(f.kind == "gradient_step" for f in report.claims):
        potential = "claimed"
    common = dict(
        potential=potential,
        smoothness_raw=smoothness_raw,
        smoothness=math.inf if math.isnan(smoothness_raw) else smoothness_raw * (1.0 + margin),
        denoiser_lipschitz=report.lipschitz,
        lipschitz=lipschitz,
        strong_convexity=mu,
        data_basis=data_basis,
        expansive=not report.nonexpansive,
        refutation=report.refuted or "",
        estimates=estimates,
    )
    if report.verdict == "proved":
        return Constants(
            theta=report.theta,
            residual_lipschitz=report.residual_lipschitz,
            basis="proved",
            margin=margin if data_basis == "estimated" else 0.0,
            **common,
        )
    inflate = 1.0 + margin
    theta, eps = report.theta * inflate, report.residual_lipschitz * inflate
    claimed = claimed_constants(report.claims) if report.verdict == "estimated" else None
    if claimed is not None and (claimed.theta < theta or claimed.residual_lipschitz < eps):
        # A claim the search did not refute stands (the guarantee is conditional on it);
        # the margin is for estimates that nothing else backs.
        return Constants(
            theta=min(theta, claimed.theta),
            residual_lipschitz=min(eps, claimed.residual_lipschitz),
            basis="claimed",
            margin=margin,
            **common,
        )
    return Constants(theta=theta, residual_lipschitz=eps, basis="estimated", margin=margin, **common)


def _data_basis(c: Constants) -> str:
    """Where the data term's ``L`` comes from, as printed in assumptions."""
    return {
        "certified": "certified",
        "estimated": f"from a power-iteration estimate of ||A||, inflated by {100 * c.margin:.0f} %: not a proof",
        "claimed": "from the operator norm the user claimed: not verified",
    }[c.data_basis]


def _assumptions(c: Constants, report: CheckReport, route: Route) -> tuple[str, ...]:
    if route.premise is not None:
        data = f"data term convex, grad f Lipschitz with L = {c.lipschitz:.6g} ({_data_basis(c)})"
        return (route.premise(c), data, route.assumption)
    if not route.uses_constants:
        premise = {
            "proved": "D = I - grad g with g computable, built by the library from the network "
            "(verified by construction)",
            "claimed": "the user's claim that D = I - grad g for the potential g given with it (not verified; "
            "the run monitor checks the sufficient decrease of F = f + g at every step)",
        }[c.potential]
        return (premise, "data term convex with a computable prox", route.assumption)
    texts = []
    if c.basis == "proved":
        texts.append(f"denoiser constants proved from its structure ({report.method})")
        if report.tolerance > 0:
            texts.append(
                f"the denoiser is an inexact prox: each call within RMS {report.tolerance:.3g} "
                "per pixel of the exact map, whose constants are proved"
            )
    elif c.basis == "claimed":
        claims = "; ".join(str(claim) for claim in report.claims)
        texts.append(
            f"the user's claim ({claims}), not refuted by a search of {report.calls} calls "
            f"(search lower bounds: theta >= {report.theta:.4g}, Lipschitz(D - I) >= "
            f"{report.residual_lipschitz:.4g}); the guarantee is conditional on the claim"
        )
    else:
        texts.append(
            f"denoiser constants are estimates (lower bounds from {report.calls} calls), "
            f"inflated by {100 * c.margin:.0f} %: theta {report.theta:.4g} -> "
            f"{c.theta:.4g}, Lipschitz(D - I) {report.residual_lipschitz:.4g} -> {c.residual_lipschitz:.4g}"
        )
    texts.append(
        "data term convex, grad f Lipschitz with L = "
        f"{c.lipschitz:.6g} ({_data_basis(c)})"
        + (f", strongly convex with mu = {c.strong_convexity:.6g}" if c.strong_convexity > 0 else ", mu = 0")
    )
    texts.append(route.assumption)
    return tuple(texts)


def _parameter_trade_off(algorithm: str, gamma: float, c: Constants, report: CheckReport) -> tuple[str, ...]:
    """For Douglas-Rachford and ADMM: how ``gamma`` and the denoiser's strength set the fixed point together."""
    if algorithm_record(algorithm).step_name != "gamma" or not math.isfinite(gamma):
        return ()
    text = (
        f"gamma = {gamma:.4g} is part of the model, not only a speed setting: for a denoiser D = prox of "
        "lam R the fixed points minimise f + (lam / gamma) R, so a larger gamma weakens the prior as a "
        "weaker denoiser would; gamma and lam (for a Gaussian denoiser of level sigma read as MAP, lam = "
        "sigma^2) move together for the same fixed point (docs/theory.md section 14)"
    )
    if c.strong_convexity > 0:
        best = optimal_prox_parameter(c.strong_convexity, c.lipschitz)
        same = (
            f"; the same fixed point is reached fastest by the linear-rate bound at gamma = {best:.4g} "
            "(1 / sqrt(mu L), Giselsson & Boyd 2017)"
        )
        if report.sigma is not None:
            same += f" with the strength set to {same_fixed_point_strength(report.sigma, gamma, best):.4g}"
        text += same
    else:
        text += "; with mu = 0 no rate theorem singles out a fastest gamma for the same fixed point"
    return (text,)


def _guarantee(
    algorithm: str, route: Route, window: Window, c: Constants, report: CheckReport
) -> Guarantee:
    certified = route.iteration_map(c, window.step)
    constant = 1.0 if certified.kind == "nonexpansive" else route.relaxed(window.relaxation, certified.constant)
    if window.basis is None:
        status = "proved" if c.basis == "proved" and c.data_basis == "certified" else "conditional"
    else:
        status = "proved" if window.basis == "proved" else "conditional"
    return Guarantee(
        algorithm=algorithm,
        route=route.name,
        step=window.step,
        step_interval=window.interval,
        relaxation=window.relaxation,
        relaxation_interval=certified.relaxations,
        map_kind=certified.kind,
        constant=constant,
        theorem=route.theorem,
        assumptions=_assumptions(c, report, route) + _parameter_trade_off(algorithm, window.step, c, report),
        status=status,
        theta=c.theta,
        residual_lipschitz=c.residual_lipschitz,
        lipschitz=c.lipschitz,
        strong_convexity=c.strong_convexity,
        margin=c.margin,
        smoothness=c.smoothness,
        rule=route,
    )


def _evaluate(
    algorithm: str, c: Constants, report: CheckReport, table: tuple[Route, ...]
) -> tuple[list[Guarantee], list[str]]:
    found, reasons = [], []
    for route in routes_for(algorithm, table):
        outcome = route.applies(c, algorithm)
        if isinstance(outcome, Window):
            found.append(_guarantee(algorithm, route, outcome, c, report))
        elif outcome is not None and outcome not in reasons:
            reasons.append(outcome)
    return found, reasons


# ----------------------------------------------------------------- suggestions
def _suggestions(
    algorithm: str, c: Constants, report: CheckReport, table: tuple[Route, ...]
) -> tuple[list[str], float | None]:
    """Ways out of a refusal, and the relaxation factor when one repairs the case."""
    suggestions = []
    covered = {name for route in table for name in route.algorithms}
    for other in ALGORITHMS:
        if other == algorithm or other not in covered:
            continue
        found, _ = _evaluate(other, c, report, table)
        if found:
            best = found[0]
            suggestions.append(
                f"switch to {other}: {best.route} route with {algorithm_record(other).step_name} {best.step:.6g} "
                f"(admissible ({best.step_interval[0]:.3g}, {_fmt(best.step_interval[1])}))"
            )
            break
    if algorithm == "forward_backward":
        target = 0.99
    elif c.strong_convexity > 0:
        target = max(0.5, 0.99 * theta_limit(c.strong_convexity, c.lipschitz))
    else:
        target = 0.5
    factor = None
    if math.isfinite(report.theta) and c.theta > target:
        s = math.floor(1000.0 * target / c.theta) / 1000.0
        if s > 0:
            factor = s
            suggestions.append(
                f"relax the denoiser: pnpguard.relaxed(denoiser, {s:g}) = (1 - s) I + s D with "
                f"s = {s:g} has theta = {s:g} x {c.theta:.4g} = {s * c.theta:.4g}, admissible for {algorithm}"
            )
    elif not math.isfinite(report.theta):
        suggestions.append(
            "relaxing the denoiser cannot repair it: the witness pair is expanded with "
            "<x - y, r> <= 0 for every factor s of (1 - s) I + s D; use a denoiser with proved structure "
            "(e.g. wavelet soft thresholding or an averaged-by-construction network)"
        )
    if c.refutation in ("nonexpansiveness", "averagedness") and not c.potential:
        suggestions.append(
            "if the denoiser is a torch network N(x, sigma), give it an explicit potential: "
            "pnpguard.gradient_step_denoiser(N, sigma) builds D = I - grad g with g = ||x - N(x)||^2 / 2; "
            "fine-tune it as a gradient-step denoiser (pnpguard.train_denoiser(frames, "
            "architecture='gradient-step', initial_weights=...)) and run "
            "pnpguard.reconstruct('proximal_gradient', fidelity, denoiser): the potential route needs no "
            "Lipschitz constant"
        )
    if report.sigma is not None and report.sigma > report.lowest_sigma:
        suggestions.append(
            f"lower the denoiser strength (sigma = {report.sigma:.4g}; lowest allowed "
            f"{report.lowest_sigma:.4g}) and check again"
        )
    return suggestions, factor


def admissible(
    algorithm: str,
    fidelity: LeastSquares,
    report: CheckReport,
    *,
    margin: float = DEFAULT_MARGIN,
    routes: tuple[Route, ...] = ROUTES,
) -> Guarantee:
    """Admissible parameters for a PnP algorithm, from published theorems.

    Parameters
    ----------
    algorithm : str or Algorithm
        A key of :data:`pnpguard.splitting.ALGORITHMS` (``"forward_backward"``,
        ``"douglas_rachford"``, ``"admm"``) or its short name. ADMM is Douglas-Rachford on the governing sequence
        ``w = x + u`` and gets the same conditions.
    fidelity : LeastSquares
        The data term (its ``lipschitz`` and ``strong_convexity``).
    report : CheckReport
        The denoiser check (:func:`pnpguard.check_denoiser`).
    margin : float, optional
        Relative inflation of *estimated* denoiser constants (default 0.05).
        A user's claim that the search does not refute stands as stated (the
        guarantee is then conditional on it); the margin applies to estimates
        that no claim backs.
    routes : tuple of Route, optional
        The theorem table to use (default :data:`ROUTES`); a route is one
        record, so a new theorem can be tried without touching this function.

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
    record = algorithm_record(algorithm)
    if not isinstance(fidelity, LeastSquares):
        raise TypeError(f"`fidelity` must be a pnpguard LeastSquares, got {type(fidelity).__name__}")
    if not isinstance(report, CheckReport):
        raise TypeError(f"`report` must be a CheckReport from check_denoiser, got {type(report).__name__}")
    margin = number_in(margin, "margin", 0.0, 1.0, high_open=True)
    c = _constants(fidelity, report, margin)
    if c.lipschitz <= 0.0:
        raise Refused(["the data term is constant (its operator is zero): nothing to reconstruct"])
    found, reasons = _evaluate(record.name, c, report, routes)
    if not found:
        suggestions, factor = _suggestions(record.name, c, report, routes)
        raise Refused(reasons, suggestions, relaxed_factor=factor)
    best, *others = found
    return replace(best, alternatives=tuple(others))
