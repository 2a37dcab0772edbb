"""Safeguarded type-I Anderson acceleration of a relaxed fixed-point iteration.

For the relaxed map ``T_lam`` with step ``f(v) = T_lam v - v``, the plain
(Krasnosel'skii-Mann) step goes from an accepted point ``v_k`` to
``v_k + f_k``. Type-I Anderson acceleration keeps the last ``m`` differences
``s_i = v_(i+1) - v_i`` and ``y_i = f_(i+1) - f_i`` of accepted points and
proposes ``v~ = v_k + f_k - (S + Y) gamma`` with ``(S^T Y) gamma = S^T f_k``:
a quasi-Newton step for ``G = I - T_lam`` whose inverse-Jacobian estimate
``H = I + (S + Y)(S^T Y)^(-1) S^T`` (in ``v~ = v_k - H G(v_k)``) satisfies the
secant conditions ``H (-y_i) = s_i``.

The candidate is only a proposal. It is taken when

1. its length is bounded by the plain step, ``||v~ - v_k|| <= STEP_BOUND ||f_k||``,
   and it stays in the ball ``||v~|| <= RADIUS_FACTOR scale`` (both checked before
   ``T`` is evaluated there; otherwise the plain step is taken),
2. and, once ``T`` has been evaluated at ``v~``, its residual satisfies
   ``||f(v~)|| <= D ||f_0|| (n + 1)^(-(1 + eps))``, ``n`` the number of
   candidates accepted so far (the safeguard of Zhang et al. 2020).

A rejected candidate costs one evaluation of ``T``; the run then takes the
plain step from ``v_k`` and restarts the memory. Condition 2 makes the
residuals at accepted candidates summable and condition 1 the lengths of the
accelerated steps; together with the Fejer monotonicity of the plain steps this
keeps the convergence of the plain iteration (the argument of Zhang,
O'Donoghue and Boyd 2020, whose safeguard this is; see ``docs/theory.md``,
section 13).

The safeguard admits candidates whose residual is far above the current one,
as the acceleration needs (its residuals are not monotone: on inpainting with
a wavelet prior, forward-backward's accepted residuals stayed above their
lowest value for 90 points, up to 13 times above it, and then converged three
times faster than the plain run), but then the iterate can also drift to a
region where the plain map is slow: on the same task, Douglas-Rachford
candidates raised the residual by a third and the run did not recover in 1000
iterations. So acceleration ends when the last :data:`ABOVE_START` accepted
points all have a residual above the first one (where the plain iteration
never goes) or :data:`IDLE_LIMIT` accepted points in a row have not brought
the residual :data:`PROGRESS` below its value when progress was last made.
The run then continues with plain steps from the accepted point of lowest
residual (one more evaluation of ``T``; the tail of the run is the plain
iteration, so its convergence is unaffected).

References
----------
.. [1] J. Zhang, B. O'Donoghue and S. Boyd, "Globally convergent type-I
   Anderson acceleration for nonsmooth fixed-point iterations", SIAM J.
   Optim. 30(4) (2020) 3170-3197, doi:10.1137/18M1232772.
.. [2] H. F. Walker and P. Ni, "Anderson acceleration for fixed-point
   iterations", SIAM J. Numer. Anal. 49(4) (2011) 1715-1735,
   doi:10.1137/10078356X.
"""

from __future__ import annotations

import math

import numpy as np
import torch

#: Default memory ``m`` (pairs kept); Walker and Ni report small memories (1-5) work well.
DEFAULT_MEMORY = 5
#: ``D`` of the summable residual bound (the value of Zhang et al. 2020, Sec. 5, from memory).
SAFEGUARD_FACTOR = 1e6
#: ``eps`` of the summable residual bound (same source).
SAFEGUARD_POWER = 1e-6
#: Longest accelerated step, in plain steps (our choice: bounds the inverse-Jacobian estimate,
#: as the regularisation of Zhang et al. does, while leaving room for the long steps that pay).
STEP_BOUND = 1e4
#: Reciprocal condition number of ``S^T Y`` below which the oldest pairs are dropped (our choice).
CONDITION_LIMIT = 1e-10
#: Largest candidate norm, in multiples of the run's reference scale (the larger of the first
#: iterate's and the data's norms). Plain iterates of an averaged map stay within ``||v_0 - z||``
#: of a fixed point ``z``, so within about 3 scales when ``||z||`` is about one scale; a candidate
#: beyond that is refused before ``T`` is evaluated (our choice: where the fixed points form a
#: set, as for Douglas-Rachford with a mask, unbounded extrapolation along it made the relative
#: residual small while the estimate was far from a fixed point).
RADIUS_FACTOR = 3.0
#: Accepted points in a row above the first residual after which acceleration ends (our choice:
#: half the monitor's stall window, so that a drifting run is back on the plain iteration before a
#: stall flag is due, ``benchmarks/bench_anderson.py``).
ABOVE_START = 25
#: Accepted points in a row without progress after which acceleration ends (our choice: four
#: stall windows; accelerated runs that went on to converge fast were idle for up to 90).
IDLE_LIMIT = 200
#: Relative fall of the residual that counts as progress (the monitor's ``stall_drop``).
PROGRESS = 0.01


class Anderson:
    """The memory and the safeguard of one accelerated run.

    Parameters
    ----------
    memory : int
        Number of difference pairs kept (``m``).
    safeguard : float
        ``D`` of the residual bound (default :data:`SAFEGUARD_FACTOR`).

    Attributes
    ----------
    accepted : int
        Candidates accepted (``n``).
    rejected : int
        Candidates the safeguard turned down (each cost one evaluation of ``T``).
    ended_at : int or None
        Accepted points seen when acceleration ended (see the module notes); None while it runs.
    end_reason : str or None
        Which of the two end rules ended it.
    """

    def __init__(self, memory: int, safeguard: float = SAFEGUARD_FACTOR, radius: float | None = None):
        self.memory = memory
        self.safeguard = safeguard
        self.radius = radius
        self.accepted = 0
        self.rejected = 0
        self.ended_at: int | None = None
        self.end_reason: str | None = None
        self._first: float | None = None  # ||f_0||
        self._seen = 0  # accepted points seen
        self._best: tuple[float, torch.Tensor | None] = (math.inf, None)  # lowest residual, its point
        self._mark = math.inf  # residual when progress was last made
        self._idle = 0  # accepted points since then
        self._above = 0  # accepted points in a row with a residual above the first one
        self._point: torch.Tensor | None = None  # last accepted point v_k and its step f_k
        self._step: torch.Tensor | None = None
        self._s: list[torch.Tensor] = []
        self._y: list[torch.Tensor] = []
        self._sy = np.zeros((0, 0))  # S^T Y, float64, rows and columns in the order of the lists

    def restart(self) -> None:
        """Forget the difference pairs (the next proposal is the plain step)."""
        self._point = self._step = None
        self._s, self._y = [], []
        self._sy = np.zeros((0, 0))

    def stagnated(self, point: torch.Tensor, step_norm: float) -> torch.Tensor | None:
        """Record the accepted ``point`` and its residual; where to go when acceleration ends here.

        Returns the accepted point of lowest residual when this point ends
        acceleration (see the module notes) and that point is an earlier one;
        None otherwise. Call before :meth:`propose`.
        """
        if self.ended_at is not None:
            return None
        if self._first is None:
            self._first = step_norm
        self._seen += 1
        if step_norm < self._best[0]:
            self._best = (step_norm, point)
        self._above = self._above + 1 if step_norm > self._first else 0
        if step_norm <= (1.0 - PROGRESS) * self._mark:
            self._mark, self._idle = step_norm, 0
        else:
            self._idle += 1
        if self._above >= ABOVE_START:
            self.end_reason = f"{ABOVE_START} accepted points in a row with a residual above the first one"
        elif self._idle >= IDLE_LIMIT:
            self.end_reason = f"{IDLE_LIMIT} accepted points in a row without a {PROGRESS:.0%} fall of the residual"
        else:
            return None
        self.ended_at = self._seen
        best = self._best[1]
        self._best = (self._best[0], None)
        self.restart()
        return None if best is point else best

    def propose(self, point: torch.Tensor, step: torch.Tensor, step_norm: float) -> torch.Tensor | None:
        """The candidate after the accepted ``point`` whose plain step is ``step``; None for the plain step."""
        if self._first is None:
            self._first = step_norm
        if self.ended_at is not None:
            return None
        if self._point is not None:
            self._remember(point - self._point, step - self._step)
        self._point, self._step = point, step
        if not self._s:
            return None
        rhs = np.array([_dot(s, step) for s in self._s])
        while self._s and 1.0 / max(np.linalg.cond(self._sy), 1.0) < CONDITION_LIMIT:
            self._forget_oldest()
            rhs = rhs[1:]
        if not self._s:
            return None
        gamma = np.linalg.solve(self._sy, rhs)
        if not np.all(np.isfinite(gamma)):
            return None
        candidate = point + step
        for coefficient, s, y in zip(gamma, self._s, self._y):
            candidate = candidate - float(coefficient) * (s + y)
        if not float(torch.linalg.vector_norm(candidate - point)) <= STEP_BOUND * step_norm:
            return None  # also for non-finite values
        if self.radius is not None and not float(torch.linalg.vector_norm(candidate)) <= self.radius:
            return None
        return candidate

    def admits(self, candidate_step_norm: float) -> bool:
        """The safeguard: may the candidate whose plain step has norm ``candidate_step_norm`` be accepted?

        Counts the decision; a rejection restarts the memory.
        """
        bound = self.safeguard * self._first * (self.accepted + 1) ** -(1.0 + SAFEGUARD_POWER)
        if candidate_step_norm <= bound:  # False for NaN
            self.accepted += 1
            return True
        self.rejected += 1
        self.restart()
        return False

    def _remember(self, s: torch.Tensor, y: torch.Tensor) -> None:
        if len(self._s) == self.memory:
            self._forget_oldest()
        row = [_dot(s, old) for old in self._y]
        column = [_dot(old, y) for old in self._s]
        k = len(self._s)
        grown = np.zeros((k + 1, k + 1))
        grown[:k, :k] = self._sy
        grown[k, :k] = row
        grown[:k, k] = column
        grown[k, k] = _dot(s, y)
        self._s.append(s)
        self._y.append(y)
        self._sy = grown

    def _forget_oldest(self) -> None:
        self._s.pop(0)
        self._y.pop(0)
        self._sy = self._sy[1:, 1:]


def _dot(a: torch.Tensor, b: torch.Tensor) -> float:
    value = float(torch.vdot(a.reshape(-1), b.reshape(-1)))
    return value if math.isfinite(value) else math.nan


def memory_bytes(memory: int, pixels: int, dtype: torch.dtype) -> int:
    """Bytes of iterate-sized tensors the accelerator keeps: ``2 m`` differences and 4 more.

    The ``m`` pairs ``(s_i, y_i)``, the last accepted point and its step, the
    candidate awaiting its safeguard and the accepted point of lowest residual
    (the plain iteration already keeps the iterate and its step).
    """
    return (2 * memory + 4) * pixels * torch.finfo(dtype).bits // 8
