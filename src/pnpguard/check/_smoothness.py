"""The smoothness of a denoiser's residual: an estimate of ``Lip(I - D)`` from Jacobian products.

For a gradient-step denoiser ``D = I - grad g`` this is ``L = Lip(grad g)``, the
constant the prox route needs (``L < 1`` makes ``D`` the proximal map of a weakly
convex function). The pair search of :func:`pnpguard.check_denoiser` spends its
budget on averagedness and stops looking at ``I - D`` once it has refuted
nonexpansiveness; this estimator has a budget of its own and spends all of it on
``I - D``.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Any

import torch

from .._validation import int_at_least
from ..denoisers import as_denoiser
from ._samples import reference_sigma, split_samples

#: Jacobian products (one JVP and one VJP each) spent by default.
DEFAULT_SMOOTHNESS_BUDGET = 36
#: Points probed around each sample, as multiples of the reference noise level
#: (0 is the sample itself).
PROBE_SCALES = (0.0, 1.0, 2.0)


@dataclass(frozen=True)
class SmoothnessEstimate:
    """A lower-bound estimate of ``Lip(I - D)`` and the point and direction attaining it.

    Attributes
    ----------
    denoiser : str
        The denoiser's name.
    value : float
        The largest ``||(I - J_D(x)) v|| / ||v||`` found: a lower bound on
        ``Lip(I - D)`` (up to rounding), never a proof of an upper bound.
    products : int
        Jacobian products used (each one JVP and one VJP).
    points : int
        Points probed.
    seconds : float
        Wall time.
    point, direction : torch.Tensor
        Where and along which unit direction ``value`` was attained (the
        witness; ``||(I - J_D(point)) direction||`` reproduces it).
    history : tuple of float
        The best value after each product, to judge whether the search had
        settled.
    """

    denoiser: str
    value: float
    products: int
    points: int
    seconds: float
    point: torch.Tensor = field(repr=False)
    direction: torch.Tensor = field(repr=False)
    history: tuple[float, ...] = field(default=(), repr=False)

    def __str__(self) -> str:
        return (
            f"Lip(I - D) of {self.denoiser} >= {self.value:.6g} (estimate: power iterations on "
            f"(I - J)^T (I - J) at {self.points} points, {self.products} Jacobian products, "
            f"{self.seconds:.2f} s)"
        )


def estimate_smoothness(
    denoiser: Any,
    sample: Any,
    *,
    budget: int = DEFAULT_SMOOTHNESS_BUDGET,
    seed: int = 0,
) -> SmoothnessEstimate:
    """Estimate ``Lip(I - D)``, i.e. ``Lip(grad g)`` for ``D = I - grad g``.

    At each probed point (the samples, and the samples plus Gaussian noise at
    :data:`PROBE_SCALES` times the reference noise level) power iterations on
    ``(I - J)^T (I - J)`` (``J`` the Jacobian of ``D``, from
    :func:`torch.func.jvp` and :func:`torch.func.vjp`) converge to the
    spectral norm of ``I - J`` there; the largest value met over the points is
    a lower bound on the Lipschitz constant of ``I - D``, which is the
    supremum of that norm (for a ``C^1`` map). Half the budget is spread over
    the points, the other half continues at the best point.

    Parameters
    ----------
    denoiser : Denoiser, callable or torch.nn.Module
        A differentiable denoiser (torch-native: ``apply_traced`` available).
    sample : array or sequence of arrays
        Images like those the denoiser meets in the iteration, ``(H, W)`` or
        ``(N, C, H, W)``.
    budget : int, optional
        Jacobian products to spend (at least 2 per probed point).
    seed : int, optional
        Seed of the probe noise and the starting directions.

    Returns
    -------
    SmoothnessEstimate

    Raises
    ------
    TypeError
        If the denoiser is not differentiable.
    ValueError
        If the budget is smaller than two products per probed point.

    Notes
    -----
    For ``D = I - grad g`` with ``g`` twice differentiable, ``I - J`` is the
    Hessian of ``g``, symmetric, and the estimate is its largest eigenvalue in
    modulus. The value is a lower bound: points the probe did not visit may
    have a larger Hessian. The accuracy on maps whose constant is known is
    measured in the test suite.

    References
    ----------
    .. [1] G. H. Golub and C. F. Van Loan, *Matrix Computations*, 4th ed.,
       Johns Hopkins 2013, Sec. 8.6 (power iteration on ``A^T A`` for the
       largest singular value; numbering from memory).
    .. [2] S. Hurault, A. Leclaire and N. Papadakis, "Proximal denoiser for
       convergent plug-and-play optimization with nonconvex regularization",
       ICML 2022 (where ``Lip(grad g) < 1`` is the condition).

    Examples
    --------
    >>> import numpy as np, pnpguard as pg
    >>> shrink = pg.as_denoiser(lambda x: 0.6 * x, differentiable=True)
    >>> estimate = pg.estimate_smoothness(shrink, np.ones((8, 8)), budget=6)
    >>> round(estimate.value, 6)   # I - D = 0.4 I
    0.4
    """
    denoiser = as_denoiser(denoiser)
    if not denoiser.differentiable:
        raise TypeError(
            f"`denoiser` {denoiser.name!r} is not differentiable: the smoothness estimate needs "
            "Jacobian products (a torch-native denoiser)"
        )
    budget = int_at_least(budget, "budget", 1)
    samples, _ = split_samples(sample)
    points_count = len(samples) * len(PROBE_SCALES)
    if budget < 2 * points_count:
        raise ValueError(
            f"`budget` must be at least {2 * points_count} (two Jacobian products per probed point: "
            f"{len(samples)} sample(s) x {len(PROBE_SCALES)} scales), got {budget}"
        )
    start = time.perf_counter()
    generator = torch.Generator().manual_seed(seed)
    reference = reference_sigma(denoiser, samples)
    points = [
        x + scale * reference * torch.randn(x.shape, generator=generator, dtype=torch.float64).to(x.dtype)
        for x in samples
        for scale in PROBE_SCALES
    ]
    search = _PowerSearch(denoiser, generator)
    per_point = (budget // 2) // points_count
    for point in points:
        search.iterate(point, max(2, per_point))
    best_point = search.best_point
    search.iterate(best_point, budget - search.products, direction=search.best_direction)
    return SmoothnessEstimate(
        denoiser=denoiser.name,
        value=search.best,
        products=search.products,
        points=points_count,
        seconds=time.perf_counter() - start,
        point=search.best_point,
        direction=search.best_direction,
        history=tuple(search.history),
    )


class _PowerSearch:
    """Power iterations on ``(I - J)^T (I - J)``, keeping the best ``||(I - J) v||``."""

    def __init__(self, denoiser, generator: torch.Generator):
        self.denoiser = denoiser
        self.function = denoiser.apply_traced
        self.generator = generator
        self.products = 0
        self.best = 0.0
        self.best_point: torch.Tensor | None = None
        self.best_direction: torch.Tensor | None = None
        self.history: list[float] = []

    def iterate(self, point: torch.Tensor, steps: int, direction: torch.Tensor | None = None) -> None:
        if direction is None:
            direction = torch.randn(point.shape, generator=self.generator, dtype=torch.float64).to(point.dtype)
        direction = direction / torch.linalg.vector_norm(direction)
        # One plain call first: it validates the point and lets the denoiser prepare
        # (e.g. a network's copy in the point's dtype) outside the function transforms.
        self.denoiser.apply(point)
        _, pullback = torch.func.vjp(self.function, point)
        for _ in range(steps):
            _, pushed = torch.func.jvp(self.function, (point,), (direction,))
            image = direction - pushed.detach()
            value = float(torch.linalg.vector_norm(image.double()))
            (pulled,) = pullback(image)
            normal = image - pulled.detach()
            self.products += 1
            if math.isfinite(value) and value > self.best:
                self.best, self.best_point, self.best_direction = value, point, direction
            self.history.append(self.best)
            size = torch.linalg.vector_norm(normal)
            if not (torch.isfinite(size) and size > 0):
                break
            direction = normal / size
