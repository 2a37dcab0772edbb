"""Linear operator base class, lazy algebra (composition, scaling, sums) and norms.

Public ``forward``/``adjoint`` validate and convert; the public fast path
``apply``/``apply_adjoint``/``apply_normal`` takes tensors as they are, for
use inside iterations. Subclasses implement the private ``_forward``/``_adjoint``
on tensors whose trailing two axes are the image and whose leading axes are
batch axes. The adjoint of a composite operator is derived from its parts,
never written by hand.
"""

from __future__ import annotations

import abc
import math
from dataclasses import dataclass

import torch

from .._arrays import ArrayLike, check_image_shape, from_tensor, to_tensor
from .._validation import image_shape, is_real

Shape = tuple[int, int]

#: Relative tolerance of the power iteration used when no exact norm is known.
POWER_ITERATION_RTOL = 1e-6
#: Iteration cap of that power iteration.
POWER_ITERATION_MAX_ITER = 2000


@dataclass(frozen=True)
class NormBound:
    """An upper bound on an operator 2-norm and how it was obtained.

    Attributes
    ----------
    value : float
        The bound.
    certified : bool
        True when ``value`` is a proven upper bound (exact structure, the
        Collatz-Wielandt bound of a nonnegative operator, or bounds combined by
        the triangle and submultiplicative inequalities). False when it is a
        power-iteration estimate, which can undershoot.
    method : str
        How the bound was obtained, in words.
    claimed : bool
        True when the value is the user's word (a norm given to
        :func:`pnpguard.as_operator`), never together with ``certified``.
        Composites of a claimed part are estimated by power iteration.
    """

    value: float
    certified: bool
    method: str
    claimed: bool = False

    @property
    def basis(self) -> str:
        """``"certified"``, ``"claimed"`` or ``"estimated"``: what the value rests on."""
        if self.certified:
            return "certified"
        return "claimed" if self.claimed else "estimated"


def _shape_text(shape: Shape) -> str:
    return f"{shape[0]}x{shape[1]}"


class LinearOperator(abc.ABC):
    """A linear map between images of fixed shape.

    Parameters
    ----------
    in_shape : tuple of int
        ``(H, W)`` of the images the operator accepts.
    out_shape : tuple of int
        ``(M, P)`` of the data it produces.

    Notes
    -----
    Inputs may be ``(H, W)`` or ``(N, C, H, W)``, numpy or torch; results come
    back as the same kind, dtype and device. Compose with ``A @ B``, scale with
    ``c * A``, add with ``A + B``; ``A.T`` is the adjoint operator.
    """

    def __init__(self, in_shape: Shape, out_shape: Shape):
        self._in_shape = image_shape(in_shape, "in_shape")
        self._out_shape = image_shape(out_shape, "out_shape")
        self._norm_cache: float | None = None
        self._bound_cache: NormBound | None = None

    # ------------------------------------------------------------------ shapes
    @property
    def in_shape(self) -> Shape:
        """``(H, W)`` of the operator's input images."""
        return self._in_shape

    @property
    def out_shape(self) -> Shape:
        """``(M, P)`` of the operator's output data."""
        return self._out_shape

    # ------------------------------------------------------------ application
    def forward(self, x: ArrayLike) -> ArrayLike:
        """Apply the operator to ``x`` (shape ``in_shape`` in the last two axes)."""
        tensor, kind = to_tensor(x, "x")
        check_image_shape(tensor, self.in_shape, "x", "operator's input shape")
        return from_tensor(self._forward(tensor), kind)

    def adjoint(self, y: ArrayLike) -> ArrayLike:
        """Apply the adjoint to ``y`` (shape ``out_shape`` in the last two axes)."""
        tensor, kind = to_tensor(y, "y")
        check_image_shape(tensor, self.out_shape, "y", "operator's output shape")
        return from_tensor(self._adjoint(tensor), kind)

    def __call__(self, x: ArrayLike) -> ArrayLike:
        return self.forward(x)

    def apply(self, t: torch.Tensor) -> torch.Tensor:
        """``A t`` on a tensor: the fast path used inside iterations.

        Unlike :meth:`forward` nothing is checked or converted, so the caller
        guarantees what :meth:`forward` would check.

        Parameters
        ----------
        t : torch.Tensor
            float32 or float64, shaped ``(..., H, W)`` with ``(H, W) =
            in_shape`` and any leading batch axes, on any device. Never
            written into.

        Returns
        -------
        torch.Tensor
            ``(..., M, P)`` with ``(M, P) = out_shape``, same leading axes,
            dtype and device.
        """
        return self._forward(t)

    def apply_adjoint(self, t: torch.Tensor) -> torch.Tensor:
        """``A^T t`` on a tensor ``(..., M, P)`` (``out_shape``): the fast path of :meth:`adjoint`.

        Nothing is checked or converted (see :meth:`apply`); returns
        ``(..., H, W)`` in ``t``'s dtype and on its device.
        """
        return self._adjoint(t)

    def apply_normal(self, t: torch.Tensor) -> torch.Tensor:
        """``A^T A t`` on a tensor ``(..., H, W)`` (``in_shape``), unchecked (see :meth:`apply`).

        Equal to ``apply_adjoint(apply(t))``; operators with a cheaper form
        (masks: ``m^2 t``) use it.
        """
        return self._normal(t)

    @abc.abstractmethod
    def _forward(self, x: torch.Tensor) -> torch.Tensor:
        """Forward map on a validated tensor ``(..., H, W)``; must not write into ``x``."""

    @abc.abstractmethod
    def _adjoint(self, y: torch.Tensor) -> torch.Tensor:
        """Adjoint map on a validated tensor ``(..., M, P)``; must not write into ``y``."""

    def _normal(self, x: torch.Tensor) -> torch.Tensor:
        """``A^T A x``; subclasses with a cheaper form override it."""
        return self._adjoint(self._forward(x))

    # ------------------------------------------------------------ structure
    @property
    def nonnegative(self) -> bool:
        """True when every entry of the operator's matrix is >= 0."""
        return False

    def _exact_norm(self) -> float | None:
        """The exact 2-norm when the structure gives it, else None."""
        return None

    def smallest_singular_value(self) -> float | None:
        """Exact ``min ||A x|| / ||x||`` over all nonzero ``x``, or None when unknown.

        Zero means the operator has a null space.
        """
        return None

    def singular_value_lower_bound(self) -> float:
        """A proven lower bound on the smallest singular value (0 when unknown)."""
        exact = self.smallest_singular_value()
        return 0.0 if exact is None else exact

    # ------------------------------------------------------------------ norms
    def norm(self) -> float:
        """The operator 2-norm ``max ||A x|| / ||x||``.

        Exact where the structure gives it (see each operator), otherwise a
        power iteration on ``A^T A`` in float64 stopped when the relative change
        eigen-residual falls below :data:`POWER_ITERATION_RTOL` times the estimate; such an
        estimate approaches the norm from below. :meth:`norm_bound` gives an upper bound.
        """
        exact = self._exact_norm()
        if exact is not None:
            return exact
        if self._norm_cache is None:
            self._norm_cache, _ = power_iteration(self)
        return self._norm_cache

    def norm_bound(self) -> NormBound:
        """An upper bound on :meth:`norm`, certified where possible.

        Order of preference: the exact norm; the Collatz-Wielandt bound for
        operators with nonnegative entries; the structural bound of
        :meth:`_structural_bound`; otherwise the power-iteration estimate,
        marked as not certified.

        References
        ----------
        .. [1] R. A. Horn and C. R. Johnson, *Matrix Analysis*, 2nd ed.,
           Cambridge University Press, 2013, Sec. 8.1 (Collatz-Wielandt bound:
           for nonnegative M and positive p, rho(M) <= max_i (M p)_i / p_i).
        """
        if self._bound_cache is not None:
            return self._bound_cache
        exact = self._exact_norm()
        if exact is not None:
            bound = NormBound(exact, True, "exact (from the operator's structure)")
        else:
            candidates = []
            if self.nonnegative:
                candidates.append(collatz_wielandt_bound(self))
            composite = self._structural_bound()
            if composite is not None:
                candidates.append(composite)
            certified = [c for c in candidates if c.certified]
            if certified:
                bound = min(certified, key=lambda c: c.value)
            else:
                bound = NormBound(
                    self.norm(),
                    False,
                    f"power-iteration estimate (eigen-residual < {POWER_ITERATION_RTOL:g} relative)",
                )
        self._bound_cache = bound
        return bound

    def _structural_bound(self) -> NormBound | None:
        """A bound from the operator's structure or from its parts' bounds."""
        return None

    def _solve_shifted_normal(self, v: torch.Tensor, t: float) -> torch.Tensor | None:
        """``(I + t A^T A)^{-1} v`` in closed form, or None when there is none.

        Used by least-squares proximal operators; operators with diagonalising
        structure (FFT, masks, polyphase decimation) override it.
        """
        return None

    # ---------------------------------------------------------------- algebra
    @property
    def T(self) -> LinearOperator:
        """The adjoint operator."""
        return _Adjoint(self)

    def __matmul__(self, other: LinearOperator) -> LinearOperator:
        if not isinstance(other, LinearOperator):
            return NotImplemented
        return _Composition(self, other)

    def __mul__(self, scalar: float) -> LinearOperator:
        if not is_real(scalar):
            return NotImplemented
        return _Scaled(self, float(scalar))

    __rmul__ = __mul__

    def __neg__(self) -> LinearOperator:
        return _Scaled(self, -1.0)

    def __add__(self, other: LinearOperator) -> LinearOperator:
        if not isinstance(other, LinearOperator):
            return NotImplemented
        return _Sum(self, other)

    def __sub__(self, other: LinearOperator) -> LinearOperator:
        if not isinstance(other, LinearOperator):
            return NotImplemented
        return _Sum(self, _Scaled(other, -1.0))

    # ------------------------------------------------------------------- repr
    def _describe(self) -> str:
        """Extra words for the repr (boundary mode, factor, ...)."""
        return ""

    def __repr__(self) -> str:
        extra = self._describe()
        extra = f", {extra}" if extra else ""
        return (
            f"<{type(self).__name__.lstrip('_')} {_shape_text(self.in_shape)} -> "
            f"{_shape_text(self.out_shape)}{extra}>"
        )


class _Adjoint(LinearOperator):
    def __init__(self, op: LinearOperator):
        super().__init__(op.out_shape, op.in_shape)
        self.op = op

    def _forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.op._adjoint(x)

    def _adjoint(self, y: torch.Tensor) -> torch.Tensor:
        return self.op._forward(y)

    @property
    def T(self) -> LinearOperator:
        return self.op

    @property
    def nonnegative(self) -> bool:
        return self.op.nonnegative

    def _exact_norm(self) -> float | None:
        return self.op._exact_norm()

    def norm(self) -> float:
        return self.op.norm()

    def norm_bound(self) -> NormBound:
        return self.op.norm_bound()

    def smallest_singular_value(self) -> float | None:
        # Square matrices share their singular values with their transposes.
        if self.in_shape == self.out_shape:
            return self.op.smallest_singular_value()
        return None

    def __repr__(self) -> str:
        return f"<Adjoint of {self.op!r}>"


class _Composition(LinearOperator):
    def __init__(self, outer: LinearOperator, inner: LinearOperator):
        if outer.in_shape != inner.out_shape:
            raise ValueError(
                f"cannot compose: the left operator takes {outer.in_shape} but the right "
                f"one produces {inner.out_shape}"
            )
        super().__init__(inner.in_shape, outer.out_shape)
        self.outer = outer
        self.inner = inner

    def _forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.outer._forward(self.inner._forward(x))

    def _adjoint(self, y: torch.Tensor) -> torch.Tensor:
        return self.inner._adjoint(self.outer._adjoint(y))

    @property
    def nonnegative(self) -> bool:
        return self.outer.nonnegative and self.inner.nonnegative

    def _structural_bound(self) -> NormBound:
        a, b = self.outer.norm_bound(), self.inner.norm_bound()
        return NormBound(
            a.value * b.value,
            a.certified and b.certified,
            "product of the factors' bounds (||AB|| <= ||A|| ||B||)",
        )

    def singular_value_lower_bound(self) -> float:
        # ||A B x|| >= s(A) ||B x|| >= s(A) s(B) ||x||.
        return self.outer.singular_value_lower_bound() * self.inner.singular_value_lower_bound()

    def __repr__(self) -> str:
        return f"<Composition {self.outer!r} @ {self.inner!r}>"


class _Scaled(LinearOperator):
    def __init__(self, op: LinearOperator, scale: float):
        if not math.isfinite(scale):
            raise ValueError(f"operator scale must be finite, got {scale}")
        super().__init__(op.in_shape, op.out_shape)
        self.op = op
        self.scale = scale

    def _forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.scale * self.op._forward(x)

    def _adjoint(self, y: torch.Tensor) -> torch.Tensor:
        return self.scale * self.op._adjoint(y)

    @property
    def nonnegative(self) -> bool:
        return self.scale >= 0 and self.op.nonnegative

    def _exact_norm(self) -> float | None:
        inner = self.op._exact_norm()
        return None if inner is None else abs(self.scale) * inner

    def _structural_bound(self) -> NormBound:
        inner = self.op.norm_bound()
        return NormBound(abs(self.scale) * inner.value, inner.certified, f"|scale| x ({inner.method})")

    def smallest_singular_value(self) -> float | None:
        inner = self.op.smallest_singular_value()
        return None if inner is None else abs(self.scale) * inner

    def _solve_shifted_normal(self, v: torch.Tensor, t: float) -> torch.Tensor | None:
        return self.op._solve_shifted_normal(v, t * self.scale**2)

    def singular_value_lower_bound(self) -> float:
        return abs(self.scale) * self.op.singular_value_lower_bound()

    def __repr__(self) -> str:
        return f"<{self.scale:g} * {self.op!r}>"


class _Sum(LinearOperator):
    def __init__(self, left: LinearOperator, right: LinearOperator):
        if left.in_shape != right.in_shape or left.out_shape != right.out_shape:
            raise ValueError(
                f"cannot add operators of shapes {left.in_shape} -> {left.out_shape} and "
                f"{right.in_shape} -> {right.out_shape}"
            )
        super().__init__(left.in_shape, left.out_shape)
        self.left = left
        self.right = right

    def _forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.left._forward(x) + self.right._forward(x)

    def _adjoint(self, y: torch.Tensor) -> torch.Tensor:
        return self.left._adjoint(y) + self.right._adjoint(y)

    @property
    def nonnegative(self) -> bool:
        return self.left.nonnegative and self.right.nonnegative

    def _structural_bound(self) -> NormBound:
        a, b = self.left.norm_bound(), self.right.norm_bound()
        return NormBound(
            a.value + b.value,
            a.certified and b.certified,
            "sum of the terms' bounds (triangle inequality)",
        )

    def __repr__(self) -> str:
        return f"<Sum {self.left!r} + {self.right!r}>"


def _random_start(op: LinearOperator, positive: bool, seed: int) -> torch.Tensor:
    generator = torch.Generator().manual_seed(seed)
    start = torch.rand(op.in_shape, generator=generator, dtype=torch.float64)
    if not positive:
        start = start - 0.5
    return start / torch.linalg.vector_norm(start)


def power_iteration(
    op: LinearOperator,
    *,
    rtol: float = POWER_ITERATION_RTOL,
    max_iter: int = POWER_ITERATION_MAX_ITER,
    seed: int = 0,
) -> tuple[float, torch.Tensor]:
    """Estimate ``||A||_2`` by power iteration on ``A^T A`` in float64.

    The estimate of ``||A||^2`` is the Rayleigh quotient ``<v, A^T A v>`` of the
    unit iterate ``v``, which never exceeds ``||A||^2`` (up to rounding) and
    converges at the rate ``(s_2 / s_1)^(4k)``. Stops when the eigen-residual
    ``||A^T A v - rho v||`` is below ``rtol * rho`` or after ``max_iter``
    iterations.

    Returns
    -------
    norm : float
        The estimate.
    vector : torch.Tensor
        The last unit iterate (approximate leading right singular vector).
    """
    vector = _random_start(op, op.nonnegative, seed)
    estimate = 0.0
    for _ in range(max_iter):
        image = op._normal(vector)
        estimate = float(torch.sum(vector * image))
        length = float(torch.linalg.vector_norm(image))
        if length == 0.0:
            return 0.0, vector
        residual = float(torch.linalg.vector_norm(image - estimate * vector))
        vector = image / length
        if residual <= rtol * estimate:
            break
    return math.sqrt(estimate), vector


def collatz_wielandt_bound(op: LinearOperator) -> NormBound:
    """Certified upper bound on ``||A||_2`` for an operator with nonnegative entries.

    ``A^T A`` is then entrywise nonnegative, and for any entrywise positive
    vector ``p``, ``||A||_2^2 = rho(A^T A) <= max_i (A^T A p)_i / p_i``. The
    vector ``p`` is the power-iteration vector lifted by a small positive
    floor, which makes the bound tight to about the power-iteration tolerance.
    A relative allowance of 1e-10 covers float64 rounding.

    References
    ----------
    .. [1] R. A. Horn and C. R. Johnson, *Matrix Analysis*, 2nd ed., Cambridge
       University Press, 2013, Thm. 8.1.26 (weighted row sums bound rho).
    """
    _, vector = power_iteration(op)
    vector = vector.abs()
    p = vector + 1e-6 * float(vector.max()) + 1e-300
    ratio = float((op._normal(p) / p).max())
    value = math.sqrt(max(ratio, 0.0) * (1.0 + 1e-10))
    return NormBound(value, True, "Collatz-Wielandt bound (nonnegative entries)")
