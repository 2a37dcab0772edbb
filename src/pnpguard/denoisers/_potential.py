"""Denoisers with an explicit potential: ``D = I - grad g`` with ``g`` computable."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import torch
from torch import nn

from .._validation import positive_number
from ._base import Denoiser
from ._facts import Fact, as_claim
from ._frozen import FrozenNetwork
from ._wrap import as_denoiser

#: ``potential(x) -> g(x)``: ``(N, C, H, W)`` images to one value per image, shape ``(N,)``,
#: differentiable by autograd.
Potential = Callable[[torch.Tensor], torch.Tensor]


class PotentialPoint:
    """The potential at one point, with its gradient available on demand.

    The value is computed with the autograd graph kept, so that the gradient
    at an accepted point costs one backward pass and no second forward pass.

    Attributes
    ----------
    point : torch.Tensor
        The point, a leaf tensor that requires grad.
    values : torch.Tensor
        ``g`` per image, shape ``(N,)`` (or ``()`` for an ``(H, W)`` point).
    """

    def __init__(self, point: torch.Tensor, values: torch.Tensor):
        self.point = point
        self.values = values
        self._gradient: torch.Tensor | None = None

    @property
    def total(self) -> float:
        """``g`` summed over the images (the potential of the whole batch)."""
        return float(self.values.detach().sum())

    def gradient(self) -> torch.Tensor:
        """``grad g`` at the point (detached); the graph is freed afterwards."""
        if self._gradient is None:
            with torch.enable_grad():
                (gradient,) = torch.autograd.grad(self.values.sum(), self.point)
            self._gradient = gradient.detach()
            self.values = self.values.detach()
        return self._gradient


class GradientStepDenoiser(Denoiser):
    r"""``D(x) = x - grad g(x)`` for a potential ``g`` the library can evaluate.

    Parameters
    ----------
    potential : callable
        ``potential(x)`` maps ``(N, C, H, W)`` tensors to one value per image
        (shape ``(N,)``), differentiably (smooth activations: the gradient is
        differentiated again when the check uses Jacobians).
    name : str
        Short name for reports.
    sigma : float, optional
        The strength the potential was built for.
    weight : float, optional
        ``lambda`` in ``D = I - lambda grad g`` (the potential becomes
        ``lambda g``; default 1).
    verified : bool
        True only when the library built ``potential`` and ``D`` from it
        itself (this class with a library-made potential); a user's pairing of
        a map with a potential is a claim.
    source : str
        Why the structure holds, for the fact.

    Notes
    -----
    Since ``D`` is computed from ``g`` by automatic differentiation here,
    ``D = I - grad g`` holds by construction (up to rounding), and ``g`` itself
    is available (:meth:`potential_at`): the objective ``F = f + g`` of a
    reconstruction is computable, and a proximal-gradient descent on it with
    backtracking decreases it at every step (Hurault, Leclaire & Papadakis
    2022; Attouch, Bolte & Svaiter 2013).

    References
    ----------
    .. [1] S. Hurault, A. Leclaire and N. Papadakis, "Gradient step denoiser
       for convergent plug-and-play", ICLR 2022. arXiv:2110.03220
    .. [2] H. Attouch, J. Bolte and B. F. Svaiter, "Convergence of descent
       methods for semi-algebraic and tame problems", Math. Program. 137
       (2013) 91-129. doi:10.1007/s10107-011-0484-9
    """

    def __init__(
        self,
        potential: Potential,
        *,
        name: str,
        sigma: float | None = None,
        weight: float = 1.0,
        verified: bool = True,
        source: str = "D = I - grad g computed by automatic differentiation of the potential g",
    ) -> None:
        if not callable(potential):
            raise TypeError(f"`potential` must be callable, got {type(potential).__name__}")
        self.weight = positive_number(weight, "weight")
        fact = Fact.gradient_step(source, verified=verified) if verified else as_claim(Fact.gradient_step(source))
        super().__init__(name=name, sigma=sigma, differentiable=True, facts=(fact,))
        self._potential = potential

    def potential_at(self, t: torch.Tensor) -> PotentialPoint:
        """``lambda g`` at ``t`` (``(H, W)`` or ``(N, C, H, W)``), its gradient on demand."""
        with torch.enable_grad():
            point = t.detach().requires_grad_(True)
            batch = point[None, None] if point.ndim == 2 else point
            values = self.weight * self._potential(batch)
            if values.shape != (batch.shape[0],):
                raise ValueError(
                    f"the potential of denoiser {self.name!r} returned shape {tuple(values.shape)}; "
                    f"expected one value per image, ({batch.shape[0]},)"
                )
            if t.ndim == 2:
                values = values[0]
        return PotentialPoint(point, values)

    def _denoise(self, t: torch.Tensor) -> torch.Tensor:
        if torch.is_grad_enabled():
            # Traced (apply_traced, the check's Jacobian products): torch.func.grad composes
            # with jvp/vjp and with autograd, so D itself can be differentiated.
            def total(x: torch.Tensor) -> torch.Tensor:
                return self.weight * self._potential(x[None, None] if x.ndim == 2 else x).sum()

            return t - torch.func.grad(total)(t)
        return t - self.potential_at(t).gradient()


def _residual_energy(module: nn.Module, x: torch.Tensor, sigma: float) -> torch.Tensor:
    """``||x - N(x, sigma)||^2 / 2`` per image."""
    return 0.5 * (x - module(x, sigma)).flatten(1).square().sum(1)


class ModulePotential:
    """A potential computed by a torch module, run in the input's dtype and on its device.

    Parameters
    ----------
    module : torch.nn.Module
        Copied, frozen and put in evaluation mode.
    sigma : float
        Noise level passed on.
    energy : callable, optional
        ``energy(module, x, sigma) -> (N,)``; default ``||x - module(x, sigma)||^2 / 2``.
    """

    def __init__(
        self,
        module: nn.Module,
        sigma: float,
        energy: Callable[[nn.Module, torch.Tensor, float], torch.Tensor] = _residual_energy,
    ):
        self._network = FrozenNetwork(module)
        self._sigma = sigma
        self._energy = energy

    @property
    def module(self) -> nn.Module:
        """The frozen network (its own dtype)."""
        return self._network.module

    def __call__(self, x: torch.Tensor) -> torch.Tensor:
        return self._energy(self._network.like(x), x, self._sigma)


def gradient_step_denoiser(
    module: nn.Module, sigma: float, *, name: str = "gradient-step network", weight: float = 1.0
) -> GradientStepDenoiser:
    r"""Turn any torch network ``N(x, sigma)`` into the denoiser ``D = I - grad g``.

    ``g(x) = ||x - N(x, sigma)||^2 / 2`` (Hurault, Leclaire & Papadakis 2022).
    The structure "``D = I - grad g`` with ``g`` computable" then holds by
    construction and is recorded as a verified fact; nothing is claimed about
    the network ``N`` itself. ``D`` is a good denoiser only once ``N`` has been
    trained (or fine-tuned) as part of ``D``: see
    ``pnpguard.train_denoiser(..., architecture="gradient-step")``.

    Parameters
    ----------
    module : torch.nn.Module
        Called as ``module(x, sigma)`` on ``(N, C, H, W)`` tensors; should be
        twice differentiable (smooth activations such as softplus; with ReLU
        the gradient of ``g`` is piecewise and its Lipschitz constant unbounded).
        It is copied.
    sigma : float
        Noise level passed to the network.
    name : str, optional
        Short name for reports.
    weight : float, optional
        ``lambda`` in ``D = I - lambda grad g``.

    Returns
    -------
    GradientStepDenoiser

    References
    ----------
    .. [1] S. Hurault, A. Leclaire and N. Papadakis, "Gradient step denoiser
       for convergent plug-and-play", ICLR 2022. arXiv:2110.03220

    Examples
    --------
    >>> import torch, pnpguard as pg
    >>> class Smoother(torch.nn.Module):
    ...     def forward(self, x, sigma):
    ...         return torch.nn.functional.avg_pool2d(x, 3, stride=1, padding=1, count_include_pad=False)
    >>> denoiser = pg.gradient_step_denoiser(Smoother(), 0.1)
    >>> denoiser.facts[0].kind, denoiser.facts[0].verified
    ('gradient_step', True)
    """
    if not isinstance(module, nn.Module):
        raise TypeError(f"`module` must be a torch.nn.Module, got {type(module).__name__}")
    sigma = positive_number(sigma, "sigma")
    source = (
        f"D = I - grad g with g(x) = ||x - N(x)||^2 / 2 built by the library from the network "
        f"{type(module).__name__} and differentiated by autograd (Hurault, Leclaire & Papadakis, ICLR 2022)"
    )
    return GradientStepDenoiser(ModulePotential(module, sigma), name=name, sigma=sigma, weight=weight, source=source)


class _ClaimedPotential(Denoiser):
    """A user's map paired with a user's potential: ``D = I - grad g`` is only claimed."""

    def __init__(self, denoiser: Denoiser, potential: Potential, name: str):
        super().__init__(
            name=name,
            sigma=denoiser.sigma,
            differentiable=denoiser.differentiable,
            facts=tuple(denoiser.facts) + (as_claim("gradient_step"),),
        )
        self._inner = denoiser
        self._claimed = GradientStepDenoiser(potential, name=name, verified=False, source="the user's potential")

    def potential_at(self, t: torch.Tensor) -> PotentialPoint:
        return self._claimed.potential_at(t)

    def _denoise(self, t: torch.Tensor) -> torch.Tensor:
        return self._inner._run(t)


def with_potential(denoiser: Any, potential: Potential, *, name: str | None = None) -> Denoiser:
    """Pair your denoiser with the potential ``g`` you state it is a gradient step on.

    The pairing ``D = I - grad g`` is recorded as the user's claim, never as a
    proof: a guarded run on the potential route is then conditional on it, and
    the run monitor checks the sufficient decrease of ``F = f + g`` at every
    step, flagging a false claim with the two iterates and the values as a
    witness.

    Parameters
    ----------
    denoiser : Denoiser or anything :func:`as_denoiser` accepts
        The map ``D``, used as it is.
    potential : callable
        ``potential(x)``: ``(N, C, H, W)`` tensors to one value per image.
    name : str, optional
        Default: the denoiser's name.

    Returns
    -------
    Denoiser
        The same map, with ``potential_at`` and the claimed fact.
    """
    if not callable(potential):
        raise TypeError(f"`potential` must be callable, got {type(potential).__name__}")
    denoiser = as_denoiser(denoiser)
    return _ClaimedPotential(denoiser, potential, denoiser.name if name is None else name)
