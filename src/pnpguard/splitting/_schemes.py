"""Iteration maps of the PnP splittings, on the variable the theory is about.

Each scheme maps the governing variable ``v`` to ``(T v, x)``, where ``T`` is
the iteration map whose averagedness or contraction the guarantee certifies
and ``x`` is the image estimate that goes with ``v``.

- Forward-backward: ``T x = D(x - step grad f(x))``; estimate ``T x``
  (a denoised image).
- Douglas-Rachford (and ADMM): ``T z = z + prox_{gamma f}(2 D z - z) - D z
  = (I + R_f R_D) z / 2``; estimate ``prox_{gamma f}(2 D z - z)``, which
  equals ``D z`` at a fixed point. PnP-ADMM ``x+ = prox(z - u)``,
  ``z+ = D(x+ + u)``, ``u+ = u + x+ - z+`` is this map on ``w = x+ + u``
  (Gabay 1983; Eckstein & Bertsekas 1992): its iterates are
  ``z = D w``, ``u = w - D w``, ``x = prox(2 D w - w)``.

References
----------
.. [1] J. Eckstein and D. P. Bertsekas, "On the Douglas-Rachford splitting
   method and the proximal point algorithm for maximal monotone operators",
   Math. Program. 55 (1992) 293-318, doi:10.1007/BF01581204.
.. [2] S. V. Venkatakrishnan, C. A. Bouman and B. Wohlberg, "Plug-and-play
   priors for model based reconstruction", IEEE GlobalSIP 2013,
   doi:10.1109/GlobalSIP.2013.6737048.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Protocol

import torch

from ..denoisers import Denoiser
from ..fidelity import LeastSquares


class Scheme(Protocol):
    """An iteration map ``T`` built from a data term, a denoiser and a parameter."""

    def __init__(self, fidelity: LeastSquares, denoiser: Denoiser, step: float) -> None: ...

    def __call__(self, v: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]: ...

    def denoiser_input(self, v: torch.Tensor) -> torch.Tensor: ...


@dataclass(frozen=True)
class ForwardBackward:
    """``T x = D(x - step grad f(x))``."""

    fidelity: LeastSquares
    denoiser: Denoiser
    step: float

    def __call__(self, v: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        image = self.denoiser.apply(self.denoiser_input(v))
        return image, image

    def denoiser_input(self, v: torch.Tensor) -> torch.Tensor:
        """What the denoiser is applied to at ``v``: ``v - step grad f(v)``."""
        return v - self.step * self.fidelity.apply_grad(v)


@dataclass(frozen=True)
class DouglasRachford:
    """``T z = z + prox_{gamma f}(2 D z - z) - D z``."""

    fidelity: LeastSquares
    denoiser: Denoiser
    step: float

    def __call__(self, v: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        denoised = self.denoiser.apply(v)
        data_step = self.fidelity.apply_prox(2.0 * denoised - v, self.step)
        return v + data_step - denoised, data_step

    def denoiser_input(self, v: torch.Tensor) -> torch.Tensor:
        """What the denoiser is applied to at ``v``: ``v`` itself."""
        return v


#: ``c`` in the sufficient-decrease test ``F(x+) <= F(x) - (c / tau) ||x+ - x||^2``.
#: With an L-smooth potential and a convex data term the test holds for every
#: ``tau <= 2 (1 - c) / L`` (descent lemma; Beck 2017, Lemma 10.4 and Sec. 10.3.3),
#: so backtracking always ends.
SUFFICIENT_DECREASE = 0.25
#: Factor applied to ``tau`` when the test fails.
BACKTRACK_SHRINK = 0.5
#: Halvings tried in one iteration before the step is reported as failed.
MAX_BACKTRACKS = 40


@dataclass
class DescentStep:
    """What one backtracking step of :class:`PotentialDescent` did.

    Attributes
    ----------
    objective_before, objective_after : float
        ``F(x)`` and ``F(x+)`` with ``F = f + g``.
    step : float
        The ``tau`` accepted (or the last one tried).
    evaluations : int
        Potential evaluations, backtracking included.
    accepted : bool
        True when ``F(x+) <= F(x) - (c / tau) ||x+ - x||^2`` (within rounding).
    point_before, point_after : torch.Tensor
        ``x`` and ``x+``, the witness pair when the test failed.
    """

    objective_before: float
    objective_after: float
    step: float
    evaluations: int
    accepted: bool
    point_before: torch.Tensor
    point_after: torch.Tensor


class PotentialDescent:
    r"""Proximal gradient descent on ``F = f + g`` with backtracking, for ``D = I - grad g``.

    ``x+ = prox_{tau f}(x - tau grad g(x))``, with ``tau`` halved until the
    sufficient decrease ``F(x+) <= F(x) - (c / tau) ||x+ - x||^2`` holds
    (Armijo-type backtracking; ``c`` = :data:`SUFFICIENT_DECREASE`). ``tau``
    never grows again, so a run makes at most :data:`MAX_BACKTRACKS` extra
    evaluations per halving level in total. With ``tau = 1``,
    ``x - grad g(x) = D(x)`` and the step is ``prox_f(D(x))``.

    The potential at an accepted point is kept with its autograd graph, so each
    iteration costs one forward pass per candidate and one backward pass.

    References
    ----------
    .. [1] A. Beck, *First-Order Methods in Optimization*, SIAM, 2017, Ch. 10
       (proximal gradient with backtracking, nonconvex smooth part).
    .. [2] H. Attouch, J. Bolte and B. F. Svaiter, Math. Program. 137 (2013)
       91-129, Thm. 5.1.
    .. [3] S. Hurault, A. Leclaire and N. Papadakis, ICLR 2022.
    """

    def __init__(self, fidelity: LeastSquares, denoiser: Denoiser, step: float) -> None:
        self.fidelity = fidelity
        self.denoiser = denoiser
        self.step = step
        self.last: DescentStep | None = None
        self._built = any(f.kind == "gradient_step" and f.verified for f in denoiser.facts)
        self._here: Any = None
        self._here_point: torch.Tensor | None = None
        self._here_objective = 0.0

    def _potential(self, v: torch.Tensor) -> Any:
        point = self.denoiser.potential_at(v)
        if point is None:
            raise ValueError(
                f"denoiser {self.denoiser.name!r} has no potential: the proximal-gradient scheme needs "
                "D = I - grad g with g computable (pnpguard.gradient_step_denoiser, or pnpguard.with_potential)"
            )
        return point

    def __call__(self, v: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        if self._here_point is v:  # the point accepted last time: its F and graph are kept
            here, before = self._here, self._here_objective
        else:
            here = self._potential(v)
            before = self.fidelity.apply_value(v) + here.total
        # The step uses the map itself, grad g(v) = v - D(v). For a denoiser the library built
        # from g the two agree by construction and the kept graph gives it in one backward
        # pass; for a user's claimed pairing, D is what is run and g only judges it.
        gradient = here.gradient() if self._built else v - self.denoiser.apply(v)
        tau, evaluations = self.step, 0
        eps = torch.finfo(v.dtype).eps
        for _ in range(MAX_BACKTRACKS + 1):
            candidate = self.fidelity.apply_prox(v - tau * gradient, tau)
            there = self._potential(candidate)
            evaluations += 1
            after = self.fidelity.apply_value(candidate) + there.total
            moved = float(torch.linalg.vector_norm(candidate - v)) ** 2
            # Rounding of the two objective values (64 eps: the library's rounding factor).
            allowance = 64.0 * eps * (abs(before) + abs(after))
            accepted = after <= before - SUFFICIENT_DECREASE / tau * moved + allowance
            if accepted:
                break
            tau *= BACKTRACK_SHRINK
        self.step = tau if accepted else tau / BACKTRACK_SHRINK
        self.last = DescentStep(before, after, self.step, evaluations, accepted, v, candidate)
        self._here, self._here_point, self._here_objective = there, candidate, after
        return candidate, candidate

    def denoiser_input(self, v: torch.Tensor) -> torch.Tensor:
        """What the denoiser is applied to at ``v``: ``v`` itself (``D(v) = v - grad g(v)``)."""
        return v


class ProxForwardBackward:
    r"""Forward-backward ``x+ = D(x - step grad f(x))`` watched through ``F = step f + phi``.

    For ``D = I - grad g`` with ``grad g`` ``L``-Lipschitz, ``L < 1``, ``D`` is
    the proximal map of a weakly convex ``phi`` with
    ``phi(D(z)) = g(z) - ||grad g(z)||^2 / 2`` (Hurault, Leclaire & Papadakis,
    ICML 2022, from Gribonval & Nikolova 2020), so the plain PnP
    forward-backward step is a proximal gradient step on ``step f + phi`` and
    both values are computable at every iterate. Each call records a
    :class:`DescentStep` with the test ``F(x+) <= F(x) - c ||x+ - x||^2``
    (``c`` = ``decrease``, from the guarantee); the first iterate has no
    ``phi`` value before it (the start need not be an output of ``D``), so
    its test is skipped.

    For a denoiser the library built from ``g``, ``x+`` comes from the kept
    autograd graph (one forward and one backward pass); for a user's claimed
    pairing the user's map is run and ``g`` only judges it, with
    ``grad g(z)`` read as ``z - D(z)``.
    """

    def __init__(self, fidelity: LeastSquares, denoiser: Denoiser, step: float, decrease: float) -> None:
        self.fidelity = fidelity
        self.denoiser = denoiser
        self.step = step
        self.decrease = decrease
        self.last: DescentStep | None = None
        self._built = any(f.kind == "gradient_step" and f.verified for f in denoiser.facts)
        self._point: torch.Tensor | None = None
        self._objective = math.nan

    def __call__(self, v: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        z = self.denoiser_input(v)
        here = self.denoiser.potential_at(z)
        if here is None:
            raise ValueError(
                f"denoiser {self.denoiser.name!r} has no potential: the prox route needs D = I - grad g "
                "with g computable"
            )
        image = z - here.gradient() if self._built else self.denoiser.apply(z)
        phi = here.total - 0.5 * float(torch.linalg.vector_norm((z - image).double())) ** 2
        after = self.step * self.fidelity.apply_value(image) + phi
        before = self._objective if self._point is v else math.nan
        moved = float(torch.linalg.vector_norm((image - v).double())) ** 2
        allowance = 64.0 * torch.finfo(v.dtype).eps * (abs(after) + (0.0 if math.isnan(before) else abs(before)))
        accepted = math.isnan(before) or after <= before - self.decrease * moved + allowance
        self.last = DescentStep(before, after, self.step, 1, accepted, v, image)
        self._point, self._objective = image, after
        return image, image

    def denoiser_input(self, v: torch.Tensor) -> torch.Tensor:
        """What the denoiser is applied to at ``v``: ``v - step grad f(v)``."""
        return v - self.step * self.fidelity.apply_grad(v)
