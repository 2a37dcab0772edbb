"""Theorem routes as data: one record per published convergence result.

A :class:`Route` says for which algorithms it holds, when it applies (which
constants of the denoiser and the data term it needs), the window of
parameters it admits with a recommended value, what it certifies of the
relaxed iteration map (averagedness constant or contraction factor), its
citation and the wording of its assumptions. :func:`pnpguard.admissible`
tries the routes of an algorithm in table order; the first that applies is
the guarantee, the others are its alternatives, and the reasons of those that
do not apply make up a refusal. Adding a route is one record in
:data:`ROUTES` plus its tests; an unknown route or algorithm raises.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, Literal, Protocol

from ..splitting import SUFFICIENT_DECREASE, ProxForwardBackward
from . import _theorems as th

MapKind = Literal["averaged", "contraction", "descent", "nonexpansive"]


class RouteConstants(Protocol):
    """The constants a route reads (a :class:`Constants` or a :class:`Guarantee`)."""

    theta: float
    residual_lipschitz: float
    lipschitz: float
    strong_convexity: float
    smoothness: float


@dataclass(frozen=True)
class Window:
    """Where a route applies: the open interval of parameters and the recommended values.

    ``basis`` overrides where the route's premise comes from (``"proved"`` or
    ``"claimed"``) when the route does not rest on the denoiser's constants.
    """

    step: float
    interval: tuple[float, float]
    relaxation: float
    basis: str | None = None


@dataclass(frozen=True)
class IterationMap:
    """What a route certifies of the unrelaxed map at one parameter value.

    ``constant`` is the averagedness constant (``"averaged"``), the
    Lipschitz factor of the map the relaxation acts on (``"contraction"``) or
    the sufficient-decrease constant ``c`` of an objective the scheme decreases
    (``"descent"``); ``relaxations`` is the open interval of admissible
    relaxations.
    """

    kind: MapKind
    constant: float
    relaxations: tuple[float, float]


#: A route's applicability test: a Window when it applies, a reason (str) when it
#: does not and the user should hear why, None when it has nothing to say.
Applies = Callable[["Constants", str], "Window | str | None"]


@dataclass(frozen=True)
class Route:
    """One theorem that turns measured constants into admissible parameters.

    Attributes
    ----------
    name : str
        Short name shown in guarantees (``"averaged"``, ``"strongly convex"``...).
    algorithms : tuple of str
        API names of the algorithms it covers (keys of
        :data:`pnpguard.splitting.ALGORITHMS`).
    theorem : str
        Citation, with the result's number.
    applies : callable
        ``applies(constants, algorithm_name) -> Window | str | None``.
    iteration_map : callable
        ``iteration_map(constants, step) -> IterationMap``.
    relaxed : callable
        ``relaxed(relaxation, constant) -> float``: the certified constant of
        the relaxed map ``(1 - lam) I + lam T``.
    assumption : str
        Wording of what the route assumes beyond the constants.
    uses_constants : bool
        False for routes that rest on the denoiser's structure alone (the
        potential route): the guarantee then quotes no denoiser constant.
    objective : str
        For routes that certify a descent, the objective that decreases and
        by how much, with ``{c}`` for the sufficient-decrease constant.
    scheme : callable or None
        ``scheme(fidelity, denoiser, step, constant)`` building the iteration
        the monitor watches, when the route needs another than the
        algorithm's own (the prox route watches ``F = step f + phi``).
    premise : callable or None
        ``premise(constants) -> str``: what the route rests on, replacing the
        default wording built from the denoiser's constants.
    """

    name: str
    algorithms: tuple[str, ...]
    theorem: str
    applies: Applies
    iteration_map: Callable[[RouteConstants, float], IterationMap]
    relaxed: Callable[[float, float], float]
    assumption: str = "the iteration map has a fixed point (a solution exists)"
    uses_constants: bool = True
    objective: str = (
        "F = f + g decreases at every step by at least ({c:g} / tau) ||x_(k+1) - x_k||^2 (checked by the monitor)"
    )
    scheme: Callable[..., Any] | None = None
    premise: Callable[[Constants], str] | None = None


# ------------------------------------------------------------------- constants
@dataclass(frozen=True)
class Constants:
    """The numbers every route reads, and where each came from.

    Attributes
    ----------
    theta, residual_lipschitz, denoiser_lipschitz : float
        The denoiser's constants as used (estimates after the safety margin).
    lipschitz, strong_convexity : float
        ``L`` and ``mu`` of the data term.
    basis : {"proved", "claimed", "estimated"}
        Where the denoiser's constants come from: its verified structure, the
        user's unrefuted claims, or a search (inflated by ``margin``).
    data_basis : {"certified", "estimated", "claimed"}
        What ``L`` rests on: a certified norm bound, a power-iteration
        estimate (inflated by ``margin`` before use) or the user's claimed norm.
    margin : float
        Inflation applied to estimates, of the denoiser or of ``L`` (0 otherwise).
    expansive : bool
        True when a pair (or the structure) shows that the denoiser expands.
    refutation : str
        The check's reason when the denoiser was refuted, else "".
    estimates : tuple of float
        The check's raw ``(theta, residual_lipschitz)`` before the margin.
    potential : {"proved", "claimed", ""}
        Whether ``D = I - grad g`` with ``g`` computable is verified (built by
        the library), the user's claim, or unknown.
    smoothness : float
        ``Lip(grad g) = Lip(I - D)`` for the prox route: the larger of the
        dedicated estimate and the pair search's lower bound, inflated by
        ``margin``; ``inf`` when it was not estimated.
    smoothness_raw : float
        The same before the margin (``nan`` when not estimated).
    """

    theta: float
    residual_lipschitz: float
    denoiser_lipschitz: float
    lipschitz: float
    strong_convexity: float
    basis: Literal["proved", "claimed", "estimated"]
    data_basis: Literal["certified", "estimated", "claimed"]
    margin: float
    expansive: bool
    refutation: str
    estimates: tuple[float, float]
    potential: str = ""
    smoothness: float = math.inf
    smoothness_raw: float = math.nan

    def quoted(self, value: float) -> str:
        """A denoiser constant as printed in reasons, marked when it carries the safety margin."""
        if self.basis == "estimated" and self.margin > 0:
            return f"{value:.4g} (estimate incl. {100 * self.margin:.0f} % margin)"
        return f"{value:.4g} ({self.basis})"


# ------------------------------------------------------------------ helpers
def not_averaged_reason(c: Constants) -> str:
    """Why the averagedness routes do not apply."""
    if c.refutation == "nonexpansiveness":
        return (
            f"denoiser is expansive: a pair has ||Dx - Dy|| = {c.denoiser_lipschitz:.4g} ||x - y|| "
            "(witness attached to the check report)"
        )
    if c.refutation == "averagedness":
        return f"denoiser is not averaged: a pair attains theta = {c.estimates[0]:.4g} (witness attached)"
    if c.basis == "estimated":
        return (
            f"denoiser theta = {c.estimates[0]:.4g} (estimate; {100 * c.margin:.0f} % safety margin "
            f"applied: {c.theta:.4g}) is not below 1"
        )
    return f"denoiser theta = {c.quoted(c.theta)} is not below 1"


def theta_limit(mu: float, lipschitz: float) -> float:
    """Largest theta for which the strongly convex DR window is nonempty: ``1 / (2 (1 - sqrt(mu / L)))``."""
    return 1.0 / (2.0 * (1.0 - math.sqrt(mu / lipschitz)))


def _inside(preferred: float, window: tuple[float, float], fallback: float) -> float:
    """``preferred`` when it lies in the open window, else ``fallback``."""
    return preferred if window[0] < preferred < window[1] else fallback


def _scaled(relaxation: float, constant: float) -> float:
    """Averagedness of ``(1 - lam) I + lam T`` for an ``alpha``-averaged ``T``: ``lam alpha``."""
    return relaxation * constant


def _half_relaxed_contraction(relaxation: float, rho: float) -> float:
    """Douglas-Rachford: ``T = (I + R)/2`` with ``R`` rho-Lipschitz, so the relaxed map is
    ``(1 - lam/2) I + (lam/2) R``."""
    return th.relaxed_contraction(relaxation / 2.0, rho)


def _unit(relaxation: float, constant: float) -> float:
    return 1.0


# ------------------------------------------------------- forward-backward routes
def _fb_averaged_applies(c: Constants, algorithm: str) -> Window | str:
    if c.theta < 1.0:
        return Window(1.0 / c.lipschitz, (0.0, 2.0 / c.lipschitz), 1.0)
    return not_averaged_reason(c)


def _fb_averaged_map(c: RouteConstants, step: float) -> IterationMap:
    alpha = th.forward_backward_averagedness(c.theta, step, c.lipschitz)
    return IterationMap("averaged", alpha, (0.0, 1.0 / alpha))


def _fb_residual_applies(c: Constants, algorithm: str) -> Window | str | None:
    lip, mu = c.lipschitz, c.strong_convexity
    if mu <= 0:
        return None
    window = th.forward_backward_contraction_window(c.residual_lipschitz, mu, lip)
    if window is None:
        return (
            f"residual route (Ryu et al. 2019): needs Lipschitz(D - I) = {c.quoted(c.residual_lipschitz)} < "
            f"2 mu / (L - mu) = {2 * mu / (lip - mu) if lip > mu else math.inf:.4g}"
        )
    step = min(max(2.0 / (lip + mu), window[0] * 1.001), window[1] * 0.999)
    return Window(step, window, 1.0)


def _fb_residual_map(c: RouteConstants, step: float) -> IterationMap:
    rho = th.forward_backward_contraction(c.residual_lipschitz, step, c.strong_convexity, c.lipschitz)
    return IterationMap("contraction", rho, (0.0, 2.0 / (1.0 + rho)))


def _fb_nonexpansive_applies(c: Constants, algorithm: str) -> Window | None:
    if c.theta >= 1.0 and not c.expansive and c.denoiser_lipschitz <= 1.0:
        return Window(1.0 / c.lipschitz, (0.0, 2.0 / c.lipschitz), 0.5)
    return None


def _nonexpansive_map(c: RouteConstants, step: float) -> IterationMap:
    return IterationMap("nonexpansive", 1.0, (0.0, 1.0))


# ------------------------------------------------------ Douglas-Rachford routes
def _dr_firm_applies(c: Constants, algorithm: str) -> Window | str | None:
    if c.theta <= 0.5:
        # gamma = 1/L matches the forward-backward step, so the fixed points weigh data
        # and denoiser alike (common practice).
        return Window(1.0 / c.lipschitz, (0.0, math.inf), 1.0)
    if c.strong_convexity <= 0:
        return (
            f"{algorithm} needs a firmly nonexpansive denoiser (theta <= 1/2) or a strongly convex "
            f"data term; theta = {c.quoted(c.theta)} and the forward model has a null space or no "
            "known lower singular value (mu = 0)"
        )
    return None


def _dr_firm_map(c: RouteConstants, step: float) -> IterationMap:
    return IterationMap("averaged", 0.5, (0.0, 2.0))


def _dr_contraction_window(reflected: float, c: Constants) -> Window | None:
    lip, mu = c.lipschitz, c.strong_convexity
    window = th.douglas_rachford_window(reflected, mu, lip)
    if window is None:
        return None
    # 1/L when inside the window (as for the firm route), else 1/sqrt(mu L), the fastest
    # contraction, which every nonempty window contains.
    return Window(_inside(1.0 / lip, window, th.optimal_prox_parameter(mu, lip)), window, 1.0)


def _dr_strongly_convex_applies(c: Constants, algorithm: str) -> Window | str | None:
    if c.theta <= 0.5 or c.strong_convexity <= 0:
        return None  # the firm route covers (or explains) these cases
    if c.theta >= 1.0:
        return not_averaged_reason(c)
    window = _dr_contraction_window(th.reflected_denoiser_lipschitz(c.theta), c)
    if window is None:
        return (
            f"strongly convex route: no gamma makes (4 theta - 1) delta(gamma) < 1 with "
            f"theta = {c.quoted(c.theta)}, mu / L = {c.strong_convexity / c.lipschitz:.4g}; it needs theta < "
            f"{theta_limit(c.strong_convexity, c.lipschitz):.4g}"
        )
    return window


def _dr_strongly_convex_map(c: RouteConstants, step: float) -> IterationMap:
    rho = th.reflected_denoiser_lipschitz(c.theta) * th.reflected_prox_lipschitz(
        step, c.strong_convexity, c.lipschitz
    )
    return IterationMap("contraction", rho, (0.0, 4.0 / (1.0 + rho)))


def _dr_residual_applies(c: Constants, algorithm: str) -> Window | None:
    if c.theta <= 0.5 or c.strong_convexity <= 0:
        return None
    return _dr_contraction_window(1.0 + 2.0 * c.residual_lipschitz, c)


def _dr_residual_map(c: RouteConstants, step: float) -> IterationMap:
    rho = (1.0 + 2.0 * c.residual_lipschitz) * th.reflected_prox_lipschitz(step, c.strong_convexity, c.lipschitz)
    return IterationMap("contraction", rho, (0.0, 4.0 / (1.0 + rho)))


# ---------------------------------------------------------------- potential route
def _potential_applies(c: Constants, algorithm: str) -> Window | str:
    if c.potential:
        # tau = 1 makes the gradient step on g the denoiser itself: x+ = prox_f(D(x)).
        return Window(1.0, (0.0, math.inf), 1.0, basis=c.potential)
    return (
        "the potential route needs a denoiser with an explicit potential, D = I - grad g "
        "(pnpguard.gradient_step_denoiser builds one from a torch network)"
    )


def _potential_map(c: RouteConstants, step: float) -> IterationMap:
    # Relaxation 1 only: a relaxed descent step is not a descent step.
    return IterationMap("descent", SUFFICIENT_DECREASE, (math.nextafter(1.0, 0.0), math.nextafter(1.0, 2.0)))


def _descent_constant(relaxation: float, constant: float) -> float:
    return constant


# -------------------------------------------------------------------- prox route
def _prox_applies(c: Constants, algorithm: str) -> Window | str | None:
    if not c.potential:
        return None
    if math.isnan(c.smoothness_raw):
        if c.estimates[1] >= 1.0:
            return (
                "prox route (Hurault et al. 2022): needs Lip(grad g) = Lip(I - D) < 1; a pair of the check "
                f"attains {c.estimates[1]:.4g}"
            )
        return (
            "prox route: Lip(grad g) = Lip(I - D) was not estimated (check_denoiser(..., smoothness_budget=...) "
            "with a budget above 0)"
        )
    if c.smoothness >= 1.0:
        return (
            f"prox route (Hurault et al. 2022): needs Lip(grad g) = Lip(I - D) < 1; estimated "
            f"{c.smoothness_raw:.4g}" + (f" ({c.smoothness:.4g} with the {100 * c.margin:.0f} % margin)" if c.margin else "")
        )
    weak = th.prox_weak_convexity(c.smoothness)
    return Window(1.0 / c.lipschitz, (0.0, (2.0 - weak) / c.lipschitz), 1.0, basis="estimated")


def _prox_map(c: RouteConstants, step: float) -> IterationMap:
    # Relaxation 1 only: the objective argument is about the plain step.
    constant = th.prox_descent_constant(th.prox_weak_convexity(c.smoothness), step, c.lipschitz)
    return IterationMap("descent", constant, (math.nextafter(1.0, 0.0), math.nextafter(1.0, 2.0)))


def _prox_premise(c: Constants) -> str:
    origin = {
        "proved": "D = I - grad g built by the library from g (verified by construction)",
        "claimed": "the user's claim that D = I - grad g for the potential given with it (not verified)",
    }[c.potential]
    return (
        f"{origin}; Lip(grad g) = Lip(I - D) estimated {c.smoothness_raw:.4g} (a lower bound from Jacobian "
        f"power iterations), {c.smoothness:.4g} with the {100 * c.margin:.0f} % margin, below 1: the guarantee "
        "is conditional on this estimate"
    )


_DOUGLAS_RACHFORD = ("douglas_rachford", "admm")

#: The routes, in order of preference within each algorithm.
ROUTES: tuple[Route, ...] = (
    Route(
        name="averaged",
        algorithms=("forward_backward",),
        theorem=(
            "Krasnosel'skii-Mann iteration of T = D (I - step grad f), which is averaged by "
            "Combettes & Yamada, J. Math. Anal. Appl. 425 (2015), Prop. 2.4"
        ),
        applies=_fb_averaged_applies,
        iteration_map=_fb_averaged_map,
        relaxed=_scaled,
    ),
    Route(
        name="residual contraction",
        algorithms=("forward_backward",),
        theorem=(
            "Ryu, Liu, Wang, Chen, Wang & Yin, ICML 2019, Thm. 1: T = D (I - step grad f) is a "
            "contraction when D - I is eps-Lipschitz and f strongly convex"
        ),
        applies=_fb_residual_applies,
        iteration_map=_fb_residual_map,
        relaxed=th.relaxed_contraction,
    ),
    Route(
        name="nonexpansive",
        algorithms=("forward_backward",),
        theorem=(
            "Krasnosel'skii-Mann iteration of the nonexpansive map T = D (I - step grad f) "
            "(Bauschke & Combettes 2017, Thm. 5.15)"
        ),
        applies=_fb_nonexpansive_applies,
        iteration_map=_nonexpansive_map,
        relaxed=_unit,
    ),
    Route(
        name="firmly nonexpansive",
        algorithms=_DOUGLAS_RACHFORD,
        theorem=(
            "Douglas-Rachford with two firmly nonexpansive resolvents: T = (I + R_f R_D) / 2 is "
            "firmly nonexpansive (Bauschke & Combettes 2017, Thm. 26.11)"
        ),
        applies=_dr_firm_applies,
        iteration_map=_dr_firm_map,
        relaxed=_scaled,
    ),
    Route(
        name="strongly convex",
        algorithms=_DOUGLAS_RACHFORD,
        theorem=(
            "Douglas-Rachford contraction: R_f is delta(gamma)-Lipschitz for strongly convex f "
            "(Giselsson & Boyd, IEEE TAC 62(2) 2017, Thm. 1) and R_D = 2 D - I is (4 theta - 1)-"
            "Lipschitz for a theta-averaged D; product < 1 (derived)"
        ),
        applies=_dr_strongly_convex_applies,
        iteration_map=_dr_strongly_convex_map,
        relaxed=_half_relaxed_contraction,
    ),
    Route(
        name="residual contraction",
        algorithms=_DOUGLAS_RACHFORD,
        theorem=(
            "Douglas-Rachford contraction: R_f is delta(gamma)-Lipschitz for strongly convex f "
            "(Giselsson & Boyd, IEEE TAC 62(2) 2017, Thm. 1) and R_D = 2 D - I is (1 + 2 eps)-"
            "Lipschitz when D - I is eps-Lipschitz; product < 1 (derived)"
        ),
        applies=_dr_residual_applies,
        iteration_map=_dr_residual_map,
        relaxed=_half_relaxed_contraction,
    ),
    Route(
        name="potential",
        algorithms=("proximal_gradient",),
        theorem=(
            "proximal gradient with backtracking on F = f + g, g smooth and nonconvex, f convex: F(x_k) "
            "decreases and converges, ||x_(k+1) - x_k|| -> 0 and every limit point is a critical point of F "
            "(Beck, First-Order Methods in Optimization, SIAM 2017, Sec. 10.3, Thm. 10.15, number from memory); for real-analytic g "
            "(softplus networks) and bounded iterates the whole sequence converges to one critical point "
            "(Attouch, Bolte & Svaiter, Math. Program. 137 (2013), Thm. 5.1); gradient-step denoiser "
            "D = I - grad g (Hurault, Leclaire & Papadakis, ICLR 2022)"
        ),
        applies=_potential_applies,
        iteration_map=_potential_map,
        relaxed=_descent_constant,
        assumption=(
            "convergence to a critical point of the nonconvex objective F = f + g, not to a global "
            "minimiser; F is evaluated exactly as computed (the sufficient decrease is checked at every "
            "step); convergence of the whole sequence needs bounded iterates"
        ),
        uses_constants=False,
    ),
    Route(
        name="weakly convex prox",
        algorithms=("forward_backward",),
        theorem=(
            "D = I - grad g with Lip(grad g) = L < 1 is the prox of an L/(L+1)-weakly convex phi, "
            "phi(D(z)) = g(z) - ||grad g(z)||^2 / 2 (Hurault, Leclaire & Papadakis, ICML 2022, Prop. 3.1, "
            "number from memory; Gribonval & Nikolova, J. Math. Imaging Vis. 62 (2020)); the plain step is a "
            "proximal gradient step on step f + phi, which decreases it while step < (2 - M) / L_f (derived, "
            "docs/theory.md section 15); limit points are critical points (same paper, Thm. 4.1, from memory)"
        ),
        applies=_prox_applies,
        iteration_map=_prox_map,
        relaxed=_descent_constant,
        assumption=(
            "convergence to a critical point of the nonconvex objective step f + phi, not to a global "
            "minimiser; the objective is evaluated along the run and its decrease checked at every step"
        ),
        objective=(
            "F = step f + phi, phi(D(z)) = g(z) - ||grad g(z)||^2 / 2, decreases at every step by at least "
            "{c:.4g} ||x_(k+1) - x_k||^2 (checked by the monitor)"
        ),
        scheme=ProxForwardBackward,
        premise=_prox_premise,
    ),
)


def routes_for(algorithm: str, table: tuple[Route, ...] = ROUTES) -> tuple[Route, ...]:
    """The routes of one algorithm, in order of preference.

    Raises
    ------
    ValueError
        When no route covers ``algorithm``.
    """
    found = tuple(route for route in table if algorithm in route.algorithms)
    if not found:
        raise ValueError(f"no theorem route covers the algorithm {algorithm!r}")
    return found


def find_route(name: str, algorithm: str, table: tuple[Route, ...] = ROUTES) -> Route:
    """The route called ``name`` for ``algorithm``; raises ValueError listing the valid names."""
    candidates = routes_for(algorithm, table)
    for route in candidates:
        if route.name == name:
            return route
    valid = sorted(route.name for route in candidates)
    raise ValueError(f"`route` must be one of {valid} for {algorithm}, got {name!r}")
