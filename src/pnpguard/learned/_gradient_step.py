"""Gradient-step denoising network: ``D = I - grad g`` with an explicit potential ``g``."""

from __future__ import annotations

from collections.abc import Sequence

import torch
from torch import nn

from ._multiscale import MultiscaleResidualCNN


class GradientStepNetwork(nn.Module):
    r"""Denoiser that is exactly one gradient step on a computable potential.

    .. math::

        g_\sigma(x) = \tfrac12 \| x - N_\sigma(x) \|^2, \qquad
        D_\sigma(x) = x - \nabla g_\sigma(x),

    where :math:`N_\sigma` is a smooth noise-conditioned network. Here
    :math:`N_\sigma(x) = x - R_\sigma(x)` with :math:`R_\sigma` the noise
    predictor of a :class:`MultiscaleResidualCNN` with softplus activations, so
    :math:`g_\sigma(x) = \frac12 \|R_\sigma(x)\|^2` and
    :math:`\nabla g_\sigma(x) = J_{R_\sigma}(x)^T R_\sigma(x)`, computed by
    automatic differentiation (one forward and one backward pass).

    Parameters
    ----------
    widths, blocks :
        Size of the inner network (see :class:`MultiscaleResidualCNN`).
    activation : {"softplus"}
        Must be smooth: ``g`` is differentiated once to denoise and once more
        to train, and the convergence theory of the reconstruction needs
        ``grad g`` to be Lipschitz and ``g`` real-analytic (Kurdyka-Lojasiewicz
        property), which softplus networks are.

    Notes
    -----
    Because ``D`` is built from ``g`` by this class, "``D = I - grad g`` with
    ``g`` computable" holds by construction; it is the structural fact the
    potential route of the guarantees uses (Hurault, Leclaire & Papadakis
    2022a). The potential is evaluated per image: :meth:`potential` returns one
    value per batch item, summed over channels and pixels.

    The network can be initialised from a trained :class:`MultiscaleResidualCNN`
    of the same widths (:meth:`from_residual`), whose ReLU activations are
    replaced by softplus; it must then be fine-tuned as a gradient-step
    denoiser, since ``J_R^T R`` is not ``R``.

    References
    ----------
    .. [1] S. Hurault, A. Leclaire and N. Papadakis, "Gradient step denoiser
       for convergent plug-and-play", ICLR 2022. arXiv:2110.03220
    .. [2] H. Attouch, J. Bolte and B. F. Svaiter, "Convergence of descent
       methods for semi-algebraic and tame problems", Math. Program. 137
       (2013) 91-129. doi:10.1007/s10107-011-0484-9
    """

    def __init__(
        self, widths: Sequence[int] = (16, 32, 64, 64), blocks: int = 1, activation: str = "softplus"
    ) -> None:
        super().__init__()
        if activation != "softplus":
            raise ValueError(f"`activation` must be 'softplus' (a smooth activation), got {activation!r}")
        self.inner = MultiscaleResidualCNN(tuple(widths), blocks, activation=activation)

    @classmethod
    def from_residual(cls, residual: MultiscaleResidualCNN) -> GradientStepNetwork:
        """Start from a trained multi-scale residual network's weights (ReLU becomes softplus)."""
        if not isinstance(residual, MultiscaleResidualCNN):
            raise TypeError(f"`residual` must be a MultiscaleResidualCNN, got {type(residual).__name__}")
        model = cls(residual.widths, residual.blocks)
        model.inner.load_state_dict(residual.state_dict(), strict=True)
        return model

    def config(self) -> dict[str, list[int] | int | str]:
        """Constructor arguments, stored with the weights."""
        return self.inner.config()

    def residual(self, x: torch.Tensor, sigma: torch.Tensor | float) -> torch.Tensor:
        r"""``x - N(x) = R(x)`` on ``(N, C, H, W)`` images (each channel on its own)."""
        return x - self.inner(x, sigma)

    def potential(self, x: torch.Tensor, sigma: torch.Tensor | float) -> torch.Tensor:
        r"""``g(x) = ||x - N(x)||^2 / 2`` per image, shape ``(N,)``."""
        return 0.5 * self.residual(x, sigma).flatten(1).square().sum(1)

    def potential_and_gradient(
        self, x: torch.Tensor, sigma: torch.Tensor | float, *, create_graph: bool = False
    ) -> tuple[torch.Tensor, torch.Tensor]:
        """``(g(x), grad g(x))``: per-image values ``(N,)`` and the gradient shaped like ``x``.

        With ``create_graph=True`` the gradient can be differentiated again
        (training); otherwise it is detached.
        """
        with torch.enable_grad():
            point = x if (create_graph and x.requires_grad) else x.detach().requires_grad_(True)
            value = self.potential(point, sigma)
            (gradient,) = torch.autograd.grad(value.sum(), point, create_graph=create_graph)
        if not create_graph:
            value, gradient = value.detach(), gradient.detach()
        return value, gradient

    def forward(self, x: torch.Tensor, sigma: torch.Tensor | float) -> torch.Tensor:
        """``D(x) = x - grad g(x)``; differentiable in training mode."""
        differentiable = self.training or (torch.is_grad_enabled() and x.requires_grad)
        _, gradient = self.potential_and_gradient(x, sigma, create_graph=differentiable)
        return x - gradient
