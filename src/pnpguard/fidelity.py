"""Least-squares data terms ``f(x) = ||A x - y||^2 / (2 sigma^2)``."""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable

import torch

from ._arrays import ArrayLike, check_image_shape, from_tensor, to_tensor
from ._validation import positive_number
from .operators import LinearOperator

#: Relative residual at which the conjugate-gradient proximal solve stops.
CG_RTOL = 1e-10
#: Iteration cap of that solve.
CG_MAX_ITER = 1000


def conjugate_gradient(
    apply: Callable[[torch.Tensor], torch.Tensor], rhs: torch.Tensor, *, rtol: float = CG_RTOL, max_iter: int = CG_MAX_ITER
) -> tuple[torch.Tensor, int, float]:
    """Solve ``M x = rhs`` for symmetric positive definite ``M`` by conjugate gradients.

    The whole tensor is one vector (batched images form a block-diagonal
    system). Stops when ``||rhs - M x|| <= rtol ||rhs||``.

    Returns
    -------
    x : torch.Tensor
    iterations : int
    relative_residual : float

    References
    ----------
    .. [1] J. Nocedal and S. J. Wright, *Numerical Optimization*, 2nd ed.,
       Springer, 2006, Algorithm 5.2.
    """
    x = torch.zeros_like(rhs)
    residual = rhs.clone()
    direction = residual.clone()
    rhs_norm = float(torch.linalg.vector_norm(rhs))
    if rhs_norm == 0.0:
        return x, 0, 0.0
    rr = torch.sum(residual * residual)
    for iteration in range(1, max_iter + 1):
        image = apply(direction)
        step = rr / torch.sum(direction * image)
        x = x + step * direction
        residual = residual - step * image
        rr_new = torch.sum(residual * residual)
        relative = math.sqrt(float(rr_new)) / rhs_norm
        if relative <= rtol:
            return x, iteration, relative
        direction = residual + (rr_new / rr) * direction
        rr = rr_new
    return x, max_iter, relative


class LeastSquares:
    """Gaussian-noise data term ``f(x) = ||A x - y||^2 / (2 sigma^2)``.

    Parameters
    ----------
    op : LinearOperator
        Forward model ``A``.
    y : numpy.ndarray or torch.Tensor
        Data, ``op.out_shape`` in the last two axes, ``(M, P)`` or
        ``(N, C, M, P)``, float32 or float64, finite. It is copied, never
        modified.
    sigma : float, optional
        Noise standard deviation, > 0, in the data's units.

    Notes
    -----
    ``grad f(x) = A^T (A x - y) / sigma^2`` is Lipschitz with constant
    ``L = ||A||^2 / sigma^2``, and ``f`` is ``mu``-strongly convex with
    ``mu = s_min(A)^2 / sigma^2`` (0 when ``A`` has a null space). The
    proximal operator is

    .. math:: \\operatorname{prox}_{t f}(v) = (I + (t/\\sigma^2) A^T A)^{-1}
              (v + (t/\\sigma^2) A^T y),

    solved in closed form for periodic blurs, masks and decimation, and by
    conjugate gradients to relative residual :data:`CG_RTOL` otherwise.

    References
    ----------
    .. [1] H. H. Bauschke and P. L. Combettes, *Convex Analysis and Monotone
       Operator Theory in Hilbert Spaces*, 2nd ed., Springer, 2017, ch. 24
       (proximal operators) and Cor. 18.17 (Lipschitz gradients).
    """

    def __init__(self, op: LinearOperator, y: ArrayLike, sigma: float = 1.0):
        if not isinstance(op, LinearOperator):
            raise TypeError(f"`op` must be a pnpguard LinearOperator, got {type(op).__name__}")
        sigma = positive_number(sigma, "sigma")
        data, kind = to_tensor(y, "y")
        check_image_shape(data, op.out_shape, "y", "operator's output shape")
        self.op = op
        self.sigma = sigma
        self.kind = kind
        self._y = data.clone()
        self._weight = 1.0 / self.sigma**2

    # --------------------------------------------------------------- shapes
    @property
    def y(self) -> torch.Tensor:
        """The data as a torch tensor (a private copy; do not write into it)."""
        return self._y

    @property
    def image_shape(self) -> tuple[int, ...]:
        """Full shape of the unknown image: the data's leading axes + ``op.in_shape``."""
        return tuple(self._y.shape[:-2]) + self.op.in_shape

    # ------------------------------------------------------------ constants
    @property
    def lipschitz(self) -> float:
        """Lipschitz constant of ``grad f``: ``||A||^2 / sigma^2`` from ``op.norm_bound()``.

        Exact where the operator's norm is exact; otherwise an upper bound
        (see :attr:`lipschitz_certified`).
        """
        return self.op.norm_bound().value ** 2 * self._weight

    @property
    def lipschitz_certified(self) -> bool:
        """True when :attr:`lipschitz` is a proven upper bound, not an estimate or a claim."""
        return self.op.norm_bound().certified

    @property
    def lipschitz_basis(self) -> str:
        """What :attr:`lipschitz` rests on: ``"certified"``, ``"estimated"`` (power iteration)
        or ``"claimed"`` (a norm the user gave, see :attr:`pnpguard.NormBound.basis`)."""
        return self.op.norm_bound().basis

    @property
    def strong_convexity(self) -> float:
        """Modulus ``mu = s_min(A)^2 / sigma^2``: exact where the structure gives it,
        otherwise a proven lower bound (0 when unknown or when ``A`` has a null space)."""
        return self.op.singular_value_lower_bound() ** 2 * self._weight

    # --------------------------------------------------------------- start
    def start_image(self) -> torch.Tensor:
        """The default first iterate ``A^T y / ||A||^2``: one gradient step of length ``1/L`` from 0.

        Returns
        -------
        torch.Tensor
            Shaped :attr:`image_shape`, in the data's dtype and on its device.
            ``||A||`` is the value of ``op.norm_bound()`` (see
            :attr:`lipschitz`); when that bound is 0 (``A = 0``) the result is
            ``A^T y`` (zero) instead.

        Notes
        -----
        With ``f(x) = ||A x - y||^2 / (2 sigma^2)``, ``grad f(0) = -A^T y / sigma^2``
        and ``L = ||A||^2 / sigma^2``, so ``0 - grad f(0) / L = A^T y / ||A||^2``
        whatever ``sigma``. It is the kind of image a denoiser meets in the
        first iterations, which is why checks sample around it.
        """
        back = self.op.apply_adjoint(self._y)
        bound = self.op.norm_bound().value
        return back / bound**2 if bound > 0 else back

    # --------------------------------------------------------------- public
    def _input(self, x: ArrayLike, name: str = "x") -> tuple[torch.Tensor, object]:
        tensor, kind = to_tensor(x, name)
        check_image_shape(tensor, self.op.in_shape, name, "operator's input shape")
        return tensor.to(dtype=self._y.dtype, device=self._y.device), kind

    def value(self, x: ArrayLike) -> float:
        """``f(x)``."""
        tensor, _ = self._input(x)
        return self._value(tensor)

    def grad(self, x: ArrayLike) -> ArrayLike:
        """``grad f(x) = A^T (A x - y) / sigma^2``, same kind as ``x``."""
        tensor, kind = self._input(x)
        return from_tensor(self._grad(tensor), kind)

    def prox(self, x: ArrayLike, step: float) -> ArrayLike:
        """``prox_{step f}(x)``, same kind as ``x``; ``step`` > 0."""
        step = positive_number(step, "step")
        tensor, kind = self._input(x)
        return from_tensor(self._prox(tensor, step), kind)

    # ------------------------------------------------------------ fast path
    def apply_value(self, t: torch.Tensor) -> float:
        """``f(t)`` on a tensor: the fast path used inside iterations.

        Unlike :meth:`value` nothing is checked or converted: ``t`` must be a
        tensor shaped :attr:`image_shape`, in the data's dtype and on its
        device. Never written into.
        """
        return self._value(t)

    def apply_grad(self, t: torch.Tensor) -> torch.Tensor:
        """``grad f(t) = A^T (A t - y) / sigma^2`` on a tensor, unchecked (see :meth:`apply_value`).

        Returns a tensor of ``t``'s shape, dtype and device.
        """
        return self._grad(t)

    def apply_prox(self, t: torch.Tensor, step: float) -> torch.Tensor:
        """``prox_{step f}(t)`` on a tensor, unchecked (see :meth:`apply_value`).

        ``step`` must be a positive float (not checked either). Returns a
        tensor of ``t``'s shape, dtype and device.
        """
        return self._prox(t, step)

    # ------------------------------------------------------------- internal
    def _value(self, x: torch.Tensor) -> float:
        residual = self.op.apply(x) - self._y
        return 0.5 * self._weight * float(torch.sum(residual * residual))

    def _grad(self, x: torch.Tensor) -> torch.Tensor:
        return self._weight * self.op.apply_adjoint(self.op.apply(x) - self._y)

    def _prox(self, v: torch.Tensor, step: float) -> torch.Tensor:
        shift = step * self._weight
        rhs = v + shift * self.op.apply_adjoint(self._y)
        closed = self.op._solve_shifted_normal(rhs, shift)
        if closed is not None:
            return closed
        solution, iterations, relative = conjugate_gradient(
            lambda d: d + shift * self.op.apply_normal(d),
            rhs,
            rtol=max(CG_RTOL, 10 * torch.finfo(rhs.dtype).eps),
        )
        if iterations == CG_MAX_ITER:
            warnings.warn(
                f"least-squares prox: conjugate gradients stopped after {CG_MAX_ITER} "
                f"iterations at relative residual {relative:.2e}",
                RuntimeWarning,
                stacklevel=3,
            )
        return solution

    def __repr__(self) -> str:
        return f"<LeastSquares {self.op!r}, sigma={self.sigma:g}>"
