"""Fixed-point residual monitor: flags with evidence, and what to do about them.

For a relaxed iteration ``v_{k+1} = T_lam v_k`` the monitor sees the steps
``d_k = v_{k+1} - v_k = T_lam v_k - v_k``. Consecutive iterates are a pair
for ``T_lam`` whose images are known for free: ``a = v_k - v_{k+1} = -d_k``
and ``r = a - (T_lam v_k - T_lam v_{k+1}) = d_{k+1} - d_k``. Hence:

- the averagedness statistic of the pair,
  ``||d_{k+1} - d_k||^2 / (2 (||d_k||^2 - <d_k, d_{k+1}>))``, must not exceed
  the constant the guarantee certifies for ``T_lam`` (THEORY.md section 5:
  online evidence); for a contraction, ``||d_{k+1}|| <= rho ||d_k||``;
- for any nonexpansive ``T_lam`` the residual ``||d_k||`` is non-increasing
  (Bauschke & Combettes 2017, Prop. 5.16 and its proof).

References
----------
.. [1] H. H. Bauschke and P. L. Combettes, *Convex Analysis and Monotone
   Operator Theory in Hilbert Spaces*, 2nd ed., Springer, 2017, Sec. 5.2.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Literal

import torch

from .._validation import choice, positive_int, positive_number
from ..check._pairs import ROUNDING_FACTOR, averagedness_value
from ..splitting import DescentStep

Action = Literal["warn", "stop", "back_off"]
#: Flags with a policy (raised during the run).
FLAG_KINDS = ("assumption_broken", "blow_up", "residual_increase", "stall")
#: Relative change below which the denoiser counts as having done nothing at the
#: final point (our choice: far above float64 rounding, far below any useful denoising).
TRIVIAL_CHANGE = 1e-6
ACTIONS = ("back_off", "stop", "warn")


@dataclass(frozen=True)
class Policy:
    """What the monitor does when it raises each flag, and its thresholds.

    Parameters
    ----------
    assumption_broken, residual_increase, stall, blow_up : {"warn", "stop", "back_off"}
        ``"warn"`` records and continues (except on non-finite values, which
        always stop the run); ``"stop"`` returns the last good iterate; ``"back_off"`` restarts from the last good iterate with half
        the relaxation (recorded), at most ``max_back_offs`` times, then stops.
    increase_rtol : float
        Relative rise of the residual tolerated before ``residual_increase``.
    stall_window : int
        Iterations over which the residual must fall by ``stall_drop``.
    stall_drop : float
        Relative decrease expected over the window while above ``tol``.
    blowup_ratio : float
        ``blow_up`` when the iterate's norm exceeds this multiple of the
        reference scale (the larger of the initial iterate's norm and the
        data's norm), or any value is not finite.
    max_back_offs : int
        Limit on restarts.
    """

    assumption_broken: Action = "warn"
    residual_increase: Action = "warn"
    stall: Action = "warn"
    blow_up: Action = "stop"
    increase_rtol: float = 1e-6
    stall_window: int = 50
    stall_drop: float = 0.01
    blowup_ratio: float = 1e4
    max_back_offs: int = 5

    def __post_init__(self) -> None:
        for kind in FLAG_KINDS:
            choice(getattr(self, kind), kind, ACTIONS)
        for name in ("increase_rtol", "stall_drop", "blowup_ratio"):
            positive_number(getattr(self, name), name)
        for name in ("stall_window", "max_back_offs"):
            positive_int(getattr(self, name), name)


@dataclass(frozen=True)
class Flag:
    """One problem the monitor saw.

    Attributes
    ----------
    kind : str
        ``"assumption_broken"``, ``"residual_increase"``, ``"stall"``,
        ``"blow_up"`` or ``"trivial_fixed_point"`` (the denoiser left the
        final point unchanged: the run settled where the data term alone
        puts it, the prior did nothing).
    iteration : int
        Iteration at which it was seen (0-based index of the iterate ``v_k``).
    message : str
        What happened, with numbers.
    action : str
        What the run did (``"warn"``, ``"stop"``, ``"back_off"``).
    witness : tuple of torch.Tensor or None
        For ``assumption_broken`` and ``residual_increase``: the pair of
        consecutive iterates ``(v_(k-1), v_k)`` of the governing variable that
        violates the certified inequality (or is expanded). For
        ``trivial_fixed_point``: the denoiser's input and output at the end.
    value : float
        The offending statistic.
    """

    kind: str
    iteration: int
    message: str
    action: str
    witness: tuple[torch.Tensor, torch.Tensor] | None = field(default=None, repr=False)
    value: float = math.nan


def norm(t: torch.Tensor) -> float:
    """Euclidean norm of a whole tensor, accumulated in its own dtype."""
    return float(torch.linalg.vector_norm(t))


@dataclass
class Monitor:
    """Watches the steps ``d_k`` of one run and raises flags.

    Parameters
    ----------
    policy : Policy
    map_kind : str or None
        What the guarantee certifies for ``T_lam``: ``"averaged"``,
        ``"contraction"``, ``"nonexpansive"``, or None for an unguarded run
        (only the residual, stall and blow-up checks apply).
    constant : float
        The certified averagedness constant or contraction factor.
    scale : float
        Reference norm for the blow-up bound.
    inexactness : float
        Absolute error allowed in each step ``d_k`` because the denoiser is
        computed inexactly (an iterative prox with a stated tolerance); added
        to the rounding allowance, so that evaluation errors the guarantee
        already admits are not reported as broken assumptions.
    fixed_point : bool
        True for fixed-point schemes (the residual and averagedness checks);
        False for descent schemes, whose residuals need not fall
        monotonically and whose certificate is the sufficient decrease of the
        objective (:meth:`descent`).
    eps : float or None
        Machine epsilon of the rounding allowance: that of the coarser of the
        iterates' precision and the denoiser's (:meth:`Denoiser.rounding_eps`);
        None for the iterates' dtype.
    """

    policy: Policy
    map_kind: str | None
    constant: float
    scale: float
    inexactness: float = 0.0
    fixed_point: bool = True
    eps: float | None = None
    residuals: list[float] = field(default_factory=list)
    _previous_step: torch.Tensor | None = None
    _previous_point: torch.Tensor | None = None

    def certify(self, map_kind: str | None, constant: float) -> None:
        """Change the certified constant (after a back-off changes the relaxation)."""
        self.map_kind, self.constant = map_kind, constant
        self._previous_step = None
        self._previous_point = None

    def _certified_factor(self) -> float:
        """The Lipschitz factor the certificate promises: the contraction's constant, else 1."""
        return self.constant if self.map_kind == "contraction" else 1.0

    def blow_up(self, iteration: int, candidate: torch.Tensor) -> tuple[Flag | None, float]:
        """Flag non-finite or runaway values in a candidate iterate; also return its norm."""
        size = norm(candidate)
        if not math.isfinite(size):
            bad = int((~torch.isfinite(candidate)).sum())
            if bad:
                message = f"{bad} non-finite values in the next iterate"
                return self._flag("blow_up", iteration, message, math.nan), size
        bound = self.policy.blowup_ratio * self.scale
        if size > bound:
            message = f"iterate norm {size:.3g} exceeds the bound {bound:.3g}"
            return self._flag("blow_up", iteration, message, size), size
        return None, size

    def observe(
        self,
        iteration: int,
        point: torch.Tensor,
        point_norm: float,
        step: torch.Tensor,
        residual: float,
        plain: bool = True,
    ) -> list[Flag]:
        """Record the step ``d_k = T_lam v_k - v_k`` (norm ``residual``) at ``v_k = point``.

        ``plain`` says that ``point`` is the plain step from the previous
        point (``v_k = v_(k-1) + d_(k-1)``); an accelerated run reaches some
        points otherwise, and the pair is then judged from its own difference.
        """
        flags = []
        if self._previous_step is not None and self.fixed_point:
            eps = torch.finfo(point.dtype).eps if self.eps is None else self.eps
            allowance = ROUNDING_FACTOR * eps * 2.0 * point_norm + self.inexactness
            if plain:
                flags += self._compare(iteration, point, step, residual, allowance)
            else:
                flags += self._compare_pair(iteration, point, step, allowance)
        self.residuals.append(residual)
        flags += self._stall(iteration)
        self._previous_step, self._previous_point = step, point
        return flags

    def _compare(self, iteration, point, step, residual, allowance) -> list[Flag]:
        previous, before = self._previous_step, self.residuals[-1]
        flags = []
        witness = (self._previous_point, point)
        if residual > before * (1.0 + self.policy.increase_rtol) + allowance:
            # ||T v_k - T v_(k-1)|| = ||d_k|| > ||d_(k-1)|| = ||v_k - v_(k-1)||: the pair of
            # consecutive iterates is expanded by the (relaxed) iteration map.
            flags.append(
                self._flag(
                    "residual_increase",
                    iteration,
                    f"fixed-point residual rose from {before:.6g} to {residual:.6g}: the iteration "
                    "map expands the last pair of iterates",
                    residual / before if before > 0 else math.inf,
                    witness,
                )
            )
        if self.map_kind is None:
            return flags
        if self.map_kind == "averaged":
            # a = -d_(k-1) and r = d_k - d_(k-1). From one inner product p = <d_(k-1), d_k>:
            # <a, r> = ||d_(k-1)||^2 - p and ||r||^2 = ||d_k||^2 - 2 p + ||d_(k-1)||^2. Their
            # cancellation error, about eps ||d||^2, is far below the rounding allowance
            # eps ||v|| ||d|| that makes a pair informative (||d|| <= ||v|| once iterating).
            p = float(torch.vdot(previous.reshape(-1), step.reshape(-1)))
            inner = before * before - p
            r_norm = math.sqrt(max(residual * residual - 2.0 * p + before * before, 0.0))
            statistic, informative = averagedness_value(r_norm, inner, before, allowance)
            if informative and r_norm > 0:
                if statistic > self.constant + 1e-6:
                    flags.append(
                        self._flag(
                            "assumption_broken",
                            iteration,
                            f"consecutive iterates give averagedness {statistic:.6g} > certified "
                            f"{self.constant:.6g}",
                            statistic,
                            witness,
                        )
                    )
        else:
            factor = self._certified_factor()
            if residual > factor * before + allowance:
                flags.append(
                    self._flag(
                        "assumption_broken",
                        iteration,
                        f"||d_(k+1)|| / ||d_k|| = {residual / before:.6g} > certified "
                        f"{self.map_kind} factor {factor:.6g}",
                        residual / before,
                        witness,
                    )
                )
        return flags

    def _compare_pair(self, iteration, point, step, allowance) -> list[Flag]:
        """The checks of :meth:`_compare` on a pair not joined by a plain step.

        With ``p = v_(k-1)`` and ``q = v_k``: ``a = p - q``,
        ``r = (p - T_lam p) - (q - T_lam q) = d_k - d_(k-1)`` and
        ``T_lam p - T_lam q = a - r`` (section 2 of the theory notes).
        """
        previous, witness = self._previous_step, (self._previous_point, point)
        a = self._previous_point - point
        r = step - previous
        a_norm, r_norm, moved = norm(a), norm(r), norm(a - r)
        flags = []
        if moved > a_norm * (1.0 + self.policy.increase_rtol) + allowance:
            flags.append(
                self._flag(
                    "residual_increase",
                    iteration,
                    f"the iteration map expands the last pair of accepted points: "
                    f"||T p - T q|| = {moved:.6g} > ||p - q|| = {a_norm:.6g}",
                    moved / a_norm if a_norm > 0 else math.inf,
                    witness,
                )
            )
        if self.map_kind == "averaged":
            inner = float(torch.vdot(a.reshape(-1), r.reshape(-1)))
            theta, informative = averagedness_value(r_norm, inner, a_norm, allowance)
            if informative and r_norm > 0 and theta > self.constant + 1e-6:
                flags.append(
                    self._flag(
                        "assumption_broken",
                        iteration,
                        f"the last pair of accepted points gives averagedness {theta:.6g} > certified "
                        f"{self.constant:.6g}",
                        theta,
                        witness,
                    )
                )
        elif self.map_kind is not None:
            factor = self._certified_factor()
            if moved > factor * a_norm + allowance:
                flags.append(
                    self._flag(
                        "assumption_broken",
                        iteration,
                        f"||T p - T q|| / ||p - q|| = {moved / a_norm:.6g} > certified "
                        f"{self.map_kind} factor {factor:.6g}",
                        moved / a_norm,
                        witness,
                    )
                )
        return flags

    def _stall(self, iteration: int) -> list[Flag]:
        window = self.policy.stall_window
        if len(self.residuals) <= window or len(self.residuals) % window:
            return []
        # The lowest residual so far against the lowest before the window: for the plain
        # iteration of an averaged map the residual never rises, so these are the window's
        # last and first residuals; accelerated runs accept points above the lowest
        # residual, and a single such point must not read as a stall.
        old = min(self.residuals[:-window])
        new = min(old, min(self.residuals[-window:]))
        if new > (1.0 - self.policy.stall_drop) * old:
            return [
                self._flag(
                    "stall",
                    iteration,
                    f"lowest residual fell only from {old:.6g} to {new:.6g} over {window} iterations",
                    new / old if old > 0 else math.inf,
                )
            ]
        return []

    def descent(self, iteration: int, step: DescentStep) -> list[Flag]:
        """Flag a step of a descent scheme that failed the sufficient decrease after backtracking.

        The witness is the pair ``(x_k, x_(k+1))``; the message gives both
        objective values and the smallest step tried. For a denoiser built
        from its potential this does not happen (the test holds for every
        small enough step); it exposes a potential that does not belong to the
        map (a false claim) or a non-smooth one.
        """
        if step.accepted:
            return []
        message = (
            f"the step does not decrease the objective enough (step down to {step.step:.3g}): F went from "
            f"{step.objective_before:.8g} to {step.objective_after:.8g}; the map is not a gradient step "
            "on the stated potential (or the potential is not smooth, or an estimated constant is too small)"
        )
        witness = (step.point_before, step.point_after)
        return [self._flag("assumption_broken", iteration, message, step.objective_after - step.objective_before, witness)]

    def trivial(self, iteration: int, denoiser_input: torch.Tensor, denoiser_output: torch.Tensor) -> Flag | None:
        """Flag a run whose denoiser changes its final input by less than :data:`TRIVIAL_CHANGE` (relative).

        Such a run has settled on a fixed point of the data step alone (for
        inpainting, the zero-filled start itself): converged, but the prior
        played no part. Raised once, after the loop, with action ``"warn"``.
        """
        change = norm(denoiser_output - denoiser_input)
        size = norm(denoiser_input)
        if change > TRIVIAL_CHANGE * size:
            return None
        message = (
            f"the denoiser changed its final input by {change:.3g} (relative {change / max(size, 1e-300):.3g}): "
            "the run settled where the data step alone puts it; the prior did nothing (strength too low?)"
        )
        return Flag("trivial_fixed_point", iteration, message, "warn", (denoiser_input, denoiser_output), change)

    def _flag(self, kind, iteration, message, value, witness=None) -> Flag:
        return Flag(kind, iteration, message, getattr(self.policy, kind), witness, value)
