"""Constants of PnP iteration maps from published theorems (pure formulas).

Notation: the data term ``f`` is convex with ``L``-Lipschitz gradient and
``mu``-strongly convex (``mu = 0`` allowed); the denoiser ``D`` is
``theta``-averaged, or has a residual ``D - I`` that is ``eps``-Lipschitz.
"""

from __future__ import annotations

import math


def gradient_step_averagedness(step: float, lipschitz: float) -> float:
    """``I - step grad f`` is ``step L / 2``-averaged for ``0 < step < 2 / L``.

    References
    ----------
    .. [1] H. H. Bauschke and P. L. Combettes, "The Baillon-Haddad theorem
       revisited", J. Convex Anal. 17 (2010) 781-787, Thm. 1.1 (cocoercivity),
       with Bauschke & Combettes, *Convex Analysis and Monotone Operator
       Theory*, 2nd ed., 2017, Prop. 4.39 (numbering from memory).
    """
    return step * lipschitz / 2.0


def composed_averagedness(first: float, second: float) -> float:
    """Averagedness of ``T1 T2`` for ``a1``- and ``a2``-averaged maps (both < 1).

    ``a = (a1 + a2 - 2 a1 a2) / (1 - a1 a2)``.

    References
    ----------
    .. [1] P. L. Combettes and I. Yamada, "Compositions and convex combinations
       of averaged nonexpansive operators", J. Math. Anal. Appl. 425 (2015)
       55-70, doi:10.1016/j.jmaa.2014.11.044, Prop. 2.4 (numbering from memory).
    """
    return (first + second - 2.0 * first * second) / (1.0 - first * second)


def forward_backward_averagedness(theta: float, step: float, lipschitz: float) -> float:
    """Averagedness of ``D (I - step grad f)``: :func:`composed_averagedness` of
    ``theta`` and ``step L / 2``."""
    return composed_averagedness(theta, gradient_step_averagedness(step, lipschitz))


def reflected_prox_lipschitz(gamma: float, mu: float, lipschitz: float) -> float:
    """Lipschitz constant of ``2 prox_{gamma f} - I``.

    ``max(|1 - gamma mu| / (1 + gamma mu), |1 - gamma L| / (1 + gamma L))``;
    equal to 1 when ``mu = 0``.

    References
    ----------
    .. [1] P. Giselsson and S. Boyd, "Linear convergence and metric selection
       for Douglas-Rachford splitting and ADMM", IEEE Trans. Autom. Control
       62(2) 2017, 532-544, doi:10.1109/TAC.2016.2564160, Thm. 1 (from memory).
    """
    return max(
        abs(1.0 - gamma * mu) / (1.0 + gamma * mu),
        abs(1.0 - gamma * lipschitz) / (1.0 + gamma * lipschitz),
    )


def reflected_denoiser_lipschitz(theta: float) -> float:
    """Lipschitz constant of ``2 D - I`` for a ``theta``-averaged ``D``.

    ``2 D - I = (1 - 2 theta) I + 2 theta N`` is ``|1 - 2 theta| + 2 theta``-
    Lipschitz: 1 for ``theta <= 1/2``, ``4 theta - 1`` above (our derivation
    from the definition, checked numerically).
    """
    return abs(1.0 - 2.0 * theta) + 2.0 * theta


def douglas_rachford_window(
    reflected_lipschitz: float, mu: float, lipschitz: float
) -> tuple[float, float] | None:
    """Prox parameters ``gamma`` making ``R_{gamma f} R_D`` a contraction.

    ``R_D`` is ``reflected_lipschitz``-Lipschitz (``4 theta - 1`` for a
    theta-averaged ``D`` with theta > 1/2). With ``c = 1 / reflected_lipschitz``
    the product ``reflected_lipschitz * delta(gamma)`` is below 1 iff ``gamma``
    lies in ``((1 - c) / ((1 + c) mu), (1 + c) / ((1 - c) L))``, nonempty iff
    ``((1 - c) / (1 + c))^2 < mu / L`` (our derivation from the two Lipschitz
    constants above). Every ``gamma > 0`` works when ``reflected_lipschitz <= 1``.
    Returns None when the window is empty or ``mu = 0``.
    """
    if mu <= 0.0:
        return None
    if reflected_lipschitz <= 1.0:
        return (0.0, math.inf)
    c = 1.0 / reflected_lipschitz
    low = (1.0 - c) / ((1.0 + c) * mu)
    high = (1.0 + c) / ((1.0 - c) * lipschitz)
    return (low, high) if low < high else None


def forward_backward_contraction(eps: float, step: float, mu: float, lipschitz: float) -> float:
    """Lipschitz bound ``(1 + eps) max(|1 - step mu|, |1 - step L|)`` of ``D (I - step grad f)``.

    References
    ----------
    .. [1] E. K. Ryu, J. Liu, S. Wang, X. Chen, Z. Wang and W. Yin,
       "Plug-and-play methods provably converge with properly trained
       denoisers", ICML 2019, PMLR 97, Thm. 1 (from memory).
    """
    return (1.0 + eps) * max(abs(1.0 - step * mu), abs(1.0 - step * lipschitz))


def forward_backward_contraction_window(
    eps: float, mu: float, lipschitz: float
) -> tuple[float, float] | None:
    """Steps for which :func:`forward_backward_contraction` is below 1.

    ``1 / (mu (1 + 1/eps)) < step < 2 / L - 1 / (L (1 + 1/eps))``, nonempty iff
    ``eps < 2 mu / (L - mu)`` (Ryu et al. 2019, Thm. 1; from memory, and
    re-derived: both factors below ``1 / (1 + eps)``). None when empty.
    """
    if mu <= 0.0:
        return None
    if eps == 0.0:
        return (0.0, 2.0 / lipschitz)
    shrink = 1.0 + 1.0 / eps
    low = 1.0 / (mu * shrink)
    high = 2.0 / lipschitz - 1.0 / (lipschitz * shrink)
    return (low, high) if low < high else None


def relaxed_contraction(relaxation: float, rho: float) -> float:
    """Contraction factor of ``(1 - lam) I + lam R`` for a ``rho``-Lipschitz ``R``:
    ``|1 - lam| + lam rho`` (triangle inequality)."""
    return abs(1.0 - relaxation) + relaxation * rho


def optimal_prox_parameter(mu: float, lipschitz: float) -> float:
    """``1 / sqrt(mu L)``, which minimises :func:`reflected_prox_lipschitz` (Giselsson & Boyd 2017)."""
    return 1.0 / math.sqrt(mu * lipschitz)


def prox_weak_convexity(smoothness: float) -> float:
    """Weak convexity ``M = L / (L + 1)`` of ``phi`` when ``D = I - grad g = prox_phi``.

    For ``grad g`` ``L``-Lipschitz with ``L < 1``, ``D`` is the proximal
    operator of a function ``phi`` such that ``phi + (M / 2) ||.||^2`` is
    convex. Check value: for ``g = <x, Q x> / 2`` with symmetric ``Q`` of
    spectrum in ``[-L, L]``, ``phi = <x, Q (I - Q)^-1 x> / 2`` has smallest
    curvature ``-L / (1 + L)`` (derived).

    References
    ----------
    .. [1] S. Hurault, A. Leclaire and N. Papadakis, "Proximal denoiser for
       convergent plug-and-play optimization with nonconvex regularization",
       ICML 2022, PMLR 162, Prop. 3.1 (numbering from memory), from
       R. Gribonval and M. Nikolova, "A characterization of proximity
       operators", J. Math. Imaging Vis. 62 (2020) 773-789.
    """
    return smoothness / (smoothness + 1.0)


def prox_descent_constant(weak_convexity: float, step: float, lipschitz: float) -> float:
    """``c = 1 - (M + step L) / 2`` in ``F(x+) <= F(x) - c ||x+ - x||^2`` for ``F = step f + phi``.

    One step ``x+ = prox_phi(x - step grad f(x))`` with ``phi`` ``M``-weakly
    convex and ``grad f`` ``L``-Lipschitz: ``u -> phi(u) + ||u - v||^2 / 2`` is
    ``(1 - M)``-strongly convex and minimal at ``x+``, so comparing it at
    ``x`` and ``x+`` gives ``phi(x+) <= phi(x) - <x+ - x, step grad f(x)>
    - (1 - M / 2) ||x+ - x||^2``; the descent lemma bounds ``step f(x+)``;
    the sum is the claim (derived; the argument of Beck 2017, Lemma 10.4,
    with a weakly convex ``phi``). Positive iff ``step < (2 - M) / L``.

    References
    ----------
    .. [1] A. Beck, *First-Order Methods in Optimization*, SIAM 2017, Lemma
       10.4 (sufficient decrease of the proximal gradient step; numbering from
       memory).
    """
    return 1.0 - (weak_convexity + step * lipschitz) / 2.0


def same_fixed_point_strength(sigma: float, gamma: float, new_gamma: float) -> float:
    """The strength that keeps a Douglas-Rachford / ADMM fixed point when ``gamma`` becomes ``new_gamma``.

    For a denoiser ``D = prox_{lam R}`` the fixed points minimise
    ``gamma f + lam R``, that is ``f + (lam / gamma) R``; only ``lam / gamma``
    matters. A denoiser for Gaussian noise of level ``sigma`` read as a MAP
    estimator has ``lam = sigma^2``, so ``sigma sqrt(new_gamma / gamma)``
    keeps the fixed point (derived; docs/theory.md section 14).
    """
    return sigma * math.sqrt(new_gamma / gamma)
