"""Pairwise statistics of a map ``D`` on pairs of images.

With ``a = x - y`` and ``r = (x - D x) - (y - D y)``:

- averagedness statistic ``theta(x, y) = ||r||^2 / (2 <a, r>)`` when
  ``<a, r> > 0``; ``D`` theta-averaged implies ``theta(x, y) <= theta`` for
  every pair, so a maximum over pairs is a lower bound on the averagedness
  constant. ``theta(x, y) >= 1`` is equivalent to ``||Dx - Dy|| >= ||x - y||``.
  When ``r != 0`` and ``<a, r> <= 0`` the pair is expanded and the statistic
  is infinite.
- Lipschitz ratio ``||Dx - Dy|| / ||x - y||`` and residual ratio
  ``||r|| / ||a||``, lower bounds on the Lipschitz constants of ``D`` and
  ``D - I``.

All are computed in float64 per pair. Floating-point rounding in the
denoiser's output is covered by an allowance (see :func:`rounding_allowance`)
so that rounding noise is never reported as a counterexample.

References
----------
.. [1] P. L. Combettes and I. Yamada, "Compositions and convex combinations of
   averaged nonexpansive operators", J. Math. Anal. Appl. 425 (2015) 55-70,
   doi:10.1016/j.jmaa.2014.11.044 (Definition 1.1 and the characterisation
   ||Tx - Ty||^2 + ((1 - theta)/theta) ||r||^2 <= ||x - y||^2).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import torch

#: Multiple of the output dtype's machine epsilon (times the output norm) taken as
#: the rounding error of one denoiser evaluation. A heuristic: errors of long
#: floating-point sums grow like sqrt(n) eps in practice (common practice).
ROUNDING_FACTOR = 64.0
#: A pair is informative when ``||r||^2 > INFORMATIVE_FACTOR * allowance * ||a||``:
#: the rounding error ``e`` of ``r`` moves ``<a, r>`` by up to ``||e|| ||a||`` while
#: ``<a, r> = ||r||^2 / (2 theta)``, so the statistic's relative error stays below
#: about ``2 theta / INFORMATIVE_FACTOR``.
INFORMATIVE_FACTOR = 1000.0


def averagedness_statistic(
    r_norm: torch.Tensor, inner: torch.Tensor, a_norm: torch.Tensor, allowance: torch.Tensor
) -> tuple[torch.Tensor, torch.Tensor]:
    """``theta = ||r||^2 / (2 <a, r>)`` (``inf`` when ``<a, r> <= 0``) and whether it is informative.

    The one definition of the pair statistic, used by the check and by the
    run monitor. All arguments are float64 tensors of one shape: ``||r||``,
    ``<a, r>``, ``||a||`` and the absolute rounding allowance of ``r``.
    """
    informative = r_norm**2 > INFORMATIVE_FACTOR * allowance * a_norm
    theta = torch.where(
        inner > 0,
        r_norm**2 / (2.0 * inner.clamp_min(torch.finfo(torch.float64).tiny)),
        torch.full_like(inner, torch.inf),
    )
    return theta, informative


def averagedness_value(r_norm: float, inner: float, a_norm: float, allowance: float) -> tuple[float, bool]:
    """:func:`averagedness_statistic` of one pair, on Python floats (the run monitor's per-step form).

    The same formula and the same informativeness test, without building
    tensors for four numbers on every iteration.
    """
    informative = r_norm**2 > INFORMATIVE_FACTOR * allowance * a_norm
    if inner > 0:
        return r_norm**2 / (2.0 * max(inner, torch.finfo(torch.float64).tiny)), informative
    return math.inf, informative


@dataclass(frozen=True)
class PairStatistics:
    """Statistics of a batch of pairs, one entry per pair (float64 tensors).

    Attributes
    ----------
    theta : torch.Tensor
        Averagedness statistic; ``inf`` on expanded pairs; 0 where ``r`` is
        below the rounding allowance (no information).
    lipschitz : torch.Tensor
        ``||Dx - Dy|| / ||x - y||``.
    residual : torch.Tensor
        ``||r|| / ||a||``.
    expansive : torch.Tensor
        Boolean: ``||Dx - Dy|| > ||x - y||`` by more than the rounding allowance.
    informative : torch.Tensor
        Boolean: ``||r||^2 > INFORMATIVE_FACTOR * allowance * ||a||`` (see
        :func:`averagedness_statistic`).
    """

    theta: torch.Tensor
    lipschitz: torch.Tensor
    residual: torch.Tensor
    expansive: torch.Tensor
    informative: torch.Tensor


def _flat_norm(t: torch.Tensor) -> torch.Tensor:
    return torch.linalg.vector_norm(t.reshape(t.shape[0], -1), dim=1)


def rounding_allowance(dx: torch.Tensor, dy: torch.Tensor, eps: float | None = None) -> torch.Tensor:
    """Per-pair absolute allowance for rounding in ``Dx - Dy`` (float64).

    ``eps`` is the machine epsilon of the precision the denoiser computed in
    (:meth:`Denoiser.rounding_eps`); default that of the outputs' dtype.
    """
    eps = torch.finfo(dx.dtype).eps if eps is None else eps
    return ROUNDING_FACTOR * eps * (_flat_norm(dx.double()) + _flat_norm(dy.double()))


def pair_statistics(
    x: torch.Tensor, y: torch.Tensor, dx: torch.Tensor, dy: torch.Tensor, eps: float | None = None
) -> PairStatistics:
    """Statistics of the pairs ``(x[k], y[k])`` with outputs ``dx[k]``, ``dy[k]``.

    All four tensors share the shape ``(K, ...)``: ``K`` pairs. ``eps``: the
    machine epsilon of the denoiser's computing precision (see
    :func:`rounding_allowance`).
    """
    allowance = rounding_allowance(dx, dy, eps)
    x, y, dx, dy = x.double(), y.double(), dx.double(), dy.double()
    a = (x - y).reshape(x.shape[0], -1)
    out = (dx - dy).reshape(x.shape[0], -1)
    r = a - out
    a_norm = torch.linalg.vector_norm(a, dim=1)
    out_norm = torch.linalg.vector_norm(out, dim=1)
    r_norm = torch.linalg.vector_norm(r, dim=1)
    inner = torch.sum(a * r, dim=1)
    theta, informative = averagedness_statistic(r_norm, inner, a_norm, allowance)
    expansive = out_norm > a_norm + allowance
    theta = torch.where(informative | expansive, theta, torch.zeros_like(theta))
    # A pair that is not expanded beyond rounding cannot show theta > 1.
    theta = torch.where(expansive, theta, theta.clamp_max(1.0))
    return PairStatistics(
        theta=theta,
        lipschitz=out_norm / a_norm,
        residual=r_norm / a_norm,
        expansive=expansive,
        informative=informative,
    )
