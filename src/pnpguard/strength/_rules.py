"""Rules that score a reconstruction without ground truth: the discrepancy principle and SURE.

Both read only the data, the forward operator and the noise level. The
discrepancy principle compares the data residual with the noise energy; Stein's
unbiased risk estimate (SURE) estimates the mean squared error, with the
divergence of the reconstruction map estimated by one Monte-Carlo probe, and in
its generalised (projected) form the error on the range of ``A^T`` when ``A``
has a null space.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch

from ..fidelity import LeastSquares, conjugate_gradient
from ..operators import PixelMask

#: The rules :func:`pnpguard.choose_strength` knows.
RULES = ("discrepancy", "sure")

#: Safety factor ``tau`` of the discrepancy principle: the chosen strength is the largest
#: whose residual satisfies ``||A x - y||^2 <= tau^2 m sigma^2``.
DISCREPANCY_TAU = 1.0

#: Size of the Monte-Carlo probe step, as a fraction of the noise level.
PROBE_SCALE = 0.1

#: Conjugate-gradient settings of the pseudo-inverse ``A^+`` (min-norm least squares).
PINV_RTOL = 1e-6
PINV_MAX_ITER = 200


def discrepancy(fidelity: LeastSquares, x: torch.Tensor, noise: float) -> float:
    """``||A x - y||^2 / (m noise^2)``: 1 when the residual matches the expected noise energy.

    References
    ----------
    .. [1] V. A. Morozov, "On the solution of functional equations by the method of
       regularization", Soviet Math. Dokl. 7 (1966) 414-417.
    """
    residual = fidelity.op.apply(x) - fidelity.y
    return float(residual.pow(2).sum()) / (fidelity.y.numel() * noise**2)


def pseudo_inverse(op, data: torch.Tensor) -> torch.Tensor:
    """``A^+ data``: the min-norm least-squares solution.

    Exact for pixel masks (``A^+ = A^T``); otherwise conjugate gradients on
    ``A^T A z = A^T data`` from zero (which stays in the range of ``A^T``),
    stopped at relative residual :data:`PINV_RTOL` or :data:`PINV_MAX_ITER`
    iterations; on ill-conditioned operators the stop acts as a regularisation.
    """
    if isinstance(op, PixelMask):
        return op.apply_adjoint(data)
    solution, _, _ = conjugate_gradient(
        op.apply_normal, op.apply_adjoint(data), rtol=PINV_RTOL, max_iter=PINV_MAX_ITER
    )
    return solution


@dataclass(frozen=True)
class SureProbe:
    """What SURE needs besides the reconstructions: the probe and the pseudo-inverses.

    Attributes
    ----------
    probe : torch.Tensor
        ``c``, standard normal in data space (the same at every strength).
    delta : float
        Step of the perturbation ``y + delta c``.
    ml : torch.Tensor
        ``A^+ y``, the maximum-likelihood estimate on the range of ``A^T``.
    back : torch.Tensor
        ``A^+ c``.
    constant : float or None
        Per-pixel unbiased estimate of ``||P x||^2`` (``P`` the projection on
        the range of ``A^T``) when known (pixel masks: ``(||A^+ y||^2 - k
        noise^2) / n`` with ``k`` observed pixels); None otherwise.
    noise : float
    """

    probe: torch.Tensor
    delta: float
    ml: torch.Tensor
    back: torch.Tensor
    constant: float | None
    noise: float

    @classmethod
    def build(cls, fidelity: LeastSquares, noise: float, seed: int) -> SureProbe:
        """The probe ``c`` from ``torch.Generator().manual_seed(seed)`` and the pseudo-inverses."""
        y = fidelity.y
        generator = torch.Generator().manual_seed(seed)
        probe = torch.randn(y.shape, generator=generator, dtype=y.dtype).to(y.device)
        ml = pseudo_inverse(fidelity.op, y)
        constant = None
        if isinstance(fidelity.op, PixelMask):
            observed = float(fidelity.op.apply(torch.ones_like(ml)).sum())
            constant = (float(ml.pow(2).sum()) - observed * noise**2) / ml.numel()
        return cls(probe, PROBE_SCALE * noise, ml, pseudo_inverse(fidelity.op, probe), constant, noise)

    def perturbed(self, fidelity: LeastSquares) -> LeastSquares:
        """The data term with data ``y + delta c``."""
        return LeastSquares(fidelity.op, fidelity.y + self.delta * self.probe, sigma=fidelity.sigma)

    def value(self, op, x: torch.Tensor, x_perturbed: torch.Tensor) -> float:
        """Per-pixel risk estimate of ``x`` on the range of ``A^T`` (plus :attr:`constant` when known).

        Notes
        -----
        With ``u = A^T y / noise^2``, ``x_ML = A^+ y`` and ``P = A^+ A``,
        ``E ||P (x_hat - x)||^2 = E [||P x_hat||^2 - 2 x_hat^T x_ML + 2 tr(P dx_hat/du)] + ||P x||^2``
        (generalised SURE [2]_). The trace is estimated by one probe [1]_:
        ``tr(P dx_hat/du) ~ noise^2 (A^+ c)^T (x_hat(y + delta c) - x_hat(y)) / delta``.
        For ``A = I`` it is the classical SURE,
        ``||y - x_hat||^2 / n - noise^2 + 2 noise^2 div(x_hat) / n``.

        References
        ----------
        .. [1] S. Ramani, T. Blu, M. Unser, "Monte-Carlo SURE: a black-box optimization of
           regularization parameters for general denoising algorithms", IEEE Trans.
           Image Process. 17(9) (2008) 1540-1554, doi:10.1109/TIP.2008.2001404.
        .. [2] Y. C. Eldar, "Generalized SURE for exponential families: applications to
           regularization", IEEE Trans. Signal Process. 57(2) (2009) 471-481,
           doi:10.1109/TSP.2008.2008212.
        """
        projected = pseudo_inverse(op, op.apply(x)) if not isinstance(op, PixelMask) else op.apply(x)
        trace = self.noise**2 * float((self.back * (x_perturbed - x)).sum()) / self.delta
        risk = float(projected.pow(2).sum()) - 2.0 * float((x * self.ml).sum()) + 2.0 * trace
        risk /= x.numel()
        return risk + self.constant if self.constant is not None else risk
