"""Operators from what users have: matrices (dense, sparse, torch sparse), scipy operators, function pairs.

:func:`as_operator` wraps the object, checks its shapes and entries, runs a
randomized adjoint (dot) test and settles what is known of its norm: certified
(exact for orthogonal rows or columns, exact to rounding for small dense
matrices, the Collatz-Wielandt bound of the base class for nonnegative
matrices), estimated by power iteration, or the user's claim (checked against
the power iteration, which bounds the norm from below).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import numpy as np
import scipy.sparse
import scipy.sparse.linalg
import torch

from .._validation import choice, image_shape, nonnegative_int, positive_number
from ._base import POWER_ITERATION_RTOL, LinearOperator, NormBound, Shape, power_iteration
from ._cache import TransferCache
from ._sparse import MatrixCache, apply_matrix, to_torch_csr

#: Largest relative mismatch ``|<A x, y> - <x, A^T y>| / (||A x|| ||y|| + ||x|| ||A^T y||)``
#: the adjoint test accepts: float32 rounding of sums of up to 10^6 terms stays below it
#: (unit roundoff 6e-8 times sqrt(10^6) accumulated error, common practice), while a
#: transposed, shifted or re-ordered adjoint misses by orders of magnitude more.
ADJOINT_RTOL = 1e-5
#: Random pairs of the adjoint test.
ADJOINT_PAIRS = 3
#: Dense matrices with at most this many rows or columns get a certified norm from the
#: largest eigenvalue of their smaller Gram matrix (``numpy.linalg.eigvalsh``).
DENSE_GRAM_LIMIT = 2048
#: Relative allowance added to norms computed in float64 from column or row norms:
#: a few thousand units of roundoff (common practice).
_ROUNDING = 1e-12


def _flat(shape: Shape) -> int:
    return shape[0] * shape[1]


def _matrix_shape_error(shape: tuple[int, ...], in_shape: Shape, out_shape: Shape) -> ValueError:
    rows, columns = _flat(out_shape), _flat(in_shape)
    return ValueError(
        f"`matrix` has shape {tuple(shape)} but out_shape {out_shape} and in_shape {in_shape} need "
        f"({rows}, {columns}) (rows: data entries, columns: pixels, both row-major)"
    )


def _sparse_from_torch(tensor: torch.Tensor) -> scipy.sparse.csr_array:
    """A torch sparse tensor (COO or CSR, 2-D) as a scipy CSR array, float64."""
    if tensor.layout == torch.sparse_coo:
        coo = tensor.detach().coalesce().cpu()
        rows, cols = coo.indices().numpy()
        values = coo.values().to(torch.float64).numpy()
        return scipy.sparse.csr_array((values, (rows, cols)), shape=tuple(coo.shape))
    if tensor.layout == torch.sparse_csr:
        csr = tensor.detach().cpu()
        return scipy.sparse.csr_array(
            (
                csr.values().to(torch.float64).numpy(),
                csr.col_indices().numpy(),
                csr.crow_indices().numpy(),
            ),
            shape=tuple(csr.shape),
        )
    raise TypeError(
        f"`matrix` is a torch tensor with layout {tensor.layout}; expected torch.sparse_coo or "
        "torch.sparse_csr (pass a dense matrix as a numpy array)"
    )


def _check_entries(values: np.ndarray) -> None:
    if values.dtype.kind not in "biuf":
        raise TypeError(f"`matrix` must hold real numbers, got dtype {values.dtype}")
    bad = int(values.size - np.count_nonzero(np.isfinite(values)))
    if bad:
        raise ValueError(f"`matrix` has {bad} non-finite entries (NaN or inf); expected finite numbers")


class MatrixOperator(LinearOperator):
    """An explicit matrix (dense or sparse) acting on row-major flattened images.

    Built by :func:`as_operator`; see there for the parameters.

    Notes
    -----
    The image ``x`` of shape ``in_shape`` is flattened row-major
    (``numpy.ravel``), multiplied by the matrix and reshaped row-major to
    ``out_shape``. The adjoint is the exact transpose.

    Norm, in order of preference: exact when every row or every column has at
    most one nonzero (then ``A A^T`` or ``A^T A`` is diagonal and the norm is
    the largest row or column 2-norm: masks, subsampling, binning); for dense
    matrices with at most :data:`DENSE_GRAM_LIMIT` rows or columns, the
    largest eigenvalue of the smaller Gram matrix ``G`` plus its rounding
    bound (see :func:`gram_norm_bound`); the certified Collatz-Wielandt bound
    when every entry is >= 0; otherwise a power-iteration estimate, marked as
    such.
    """

    def __init__(self, matrix: Any, in_shape: Shape, out_shape: Shape, *, name: str):
        super().__init__(in_shape, out_shape)
        self.name = name
        if isinstance(matrix, np.ndarray):
            dense = np.asarray(matrix)
            _check_entries(dense)
            if dense.shape != (_flat(out_shape), _flat(in_shape)):
                raise _matrix_shape_error(dense.shape, self.in_shape, self.out_shape)
            dense = dense.astype(np.float64)
            sparse = scipy.sparse.csr_array(dense)
            self._storage = "dense"
            self._dense = TransferCache(torch.from_numpy(dense))
            self._dense_t = TransferCache(torch.from_numpy(np.ascontiguousarray(dense.T)))
        else:
            sparse = _sparse_from_torch(matrix) if isinstance(matrix, torch.Tensor) else scipy.sparse.csr_array(matrix)
            _check_entries(sparse.data)
            if sparse.shape != (_flat(out_shape), _flat(in_shape)):
                raise _matrix_shape_error(sparse.shape, self.in_shape, self.out_shape)
            sparse = sparse.astype(np.float64)
            sparse.sum_duplicates()
            self._storage = "sparse"
            self._matrix = MatrixCache(to_torch_csr(scipy.sparse.csr_matrix(sparse)))
            self._transposed = MatrixCache(to_torch_csr(scipy.sparse.csr_matrix(sparse.T.tocsr())))
        self.nnz = int(sparse.count_nonzero())
        self._nonnegative = bool((sparse.data >= 0).all())
        self._exact = _orthogonal_norm(sparse)
        self._gram_bound = None
        if self._exact is None and self._storage == "dense" and min(sparse.shape) <= DENSE_GRAM_LIMIT:
            self._gram_bound = gram_norm_bound(dense)

    def _forward(self, x: torch.Tensor) -> torch.Tensor:
        matrix = self._dense.like_real(x) if self._storage == "dense" else self._matrix.like(x)
        return apply_matrix(matrix, x, self.out_shape)

    def _adjoint(self, y: torch.Tensor) -> torch.Tensor:
        matrix = self._dense_t.like_real(y) if self._storage == "dense" else self._transposed.like(y)
        return apply_matrix(matrix, y, self.in_shape)

    @property
    def nonnegative(self) -> bool:
        return self._nonnegative

    def _exact_norm(self) -> float | None:
        return self._exact

    def _structural_bound(self) -> NormBound | None:
        if self._gram_bound is None:
            return None
        return NormBound(
            self._gram_bound,
            True,
            "largest eigenvalue of the dense matrix's Gram matrix (LAPACK), plus its rounding bound",
        )

    def _describe(self) -> str:
        return f"{self.name}, {self._storage}, {self.nnz} nonzeros"


def gram_norm_bound(matrix: np.ndarray) -> float:
    """A certified upper bound on ``||A||_2`` of a dense float64 matrix from its Gram matrix.

    ``G = A^T A`` (or ``A A^T``, whichever is smaller) is formed in float64
    and ``||A||^2 = lambda_max(G)``. The computed product differs from ``G``
    by at most ``gamma_n |A|^T |A|`` entrywise, ``gamma_n = n u / (1 - n u)``
    with ``n`` the inner dimension and ``u`` the unit roundoff [1]_, whose
    2-norm is at most ``gamma_n ||A||_F^2``; the symmetric eigensolver is
    backward stable with error ``O(m u ||G||)`` [2]_. The bound is
    ``sqrt(lambda + (gamma_n + 10 m u) ||A||_F^2)``, ``m`` the order of ``G``
    (the factor 10 for the solver's constant is our generous choice).

    References
    ----------
    .. [1] N. J. Higham, *Accuracy and Stability of Numerical Algorithms*,
       2nd ed., SIAM, 2002, Sec. 3.5 (matrix multiplication).
    .. [2] G. H. Golub and C. F. Van Loan, *Matrix Computations*, 4th ed.,
       Johns Hopkins, 2013, Sec. 8.1.2 and 8.3 (symmetric QR, Weyl).
    """
    inner = max(matrix.shape)
    gram = matrix @ matrix.T if matrix.shape[0] <= matrix.shape[1] else matrix.T @ matrix
    unit = np.finfo(np.float64).eps / 2
    gamma = inner * unit / (1.0 - inner * unit)
    largest = float(np.linalg.eigvalsh(gram)[-1])
    frobenius = float(np.sum(matrix * matrix))
    return math.sqrt(max(largest, 0.0) + (gamma + 10.0 * gram.shape[0] * unit) * frobenius)


def _orthogonal_norm(sparse: scipy.sparse.csr_array) -> float | None:
    """The exact norm when rows or columns have disjoint supports, else None."""
    pattern = sparse.copy()
    pattern.eliminate_zeros()
    squared = pattern.multiply(pattern)
    if pattern.nnz == 0:
        return 0.0
    per_row = np.diff(pattern.indptr)
    if per_row.max() <= 1:
        # At most one nonzero per row: columns have disjoint supports, A^T A is diagonal.
        return float(np.sqrt(np.max(squared.sum(axis=0)))) * (1.0 + _ROUNDING)
    per_column = np.bincount(pattern.indices, minlength=sparse.shape[1])
    if per_column.max() <= 1:
        # At most one nonzero per column: A A^T is diagonal.
        return float(np.sqrt(np.max(squared.sum(axis=1)))) * (1.0 + _ROUNDING)
    return None


class FunctionOperator(LinearOperator):
    """A forward map and its adjoint given as functions (or a scipy ``LinearOperator``).

    Built by :func:`as_operator`; see there for the parameters. Nothing is
    known of the structure: the norm is a power-iteration estimate unless
    the user claims one.
    """

    def __init__(
        self,
        forward: Callable[[Any], Any],
        adjoint: Callable[[Any], Any],
        in_shape: Shape,
        out_shape: Shape,
        *,
        backend: str,
        name: str,
    ):
        super().__init__(in_shape, out_shape)
        self._forward_fn = forward
        self._adjoint_fn = adjoint
        self.backend = backend
        self.name = name

    def _call(self, function: Callable[[Any], Any], t: torch.Tensor, shape: Shape, what: str) -> torch.Tensor:
        if self.backend == "torch":
            result = function(t)
            if not isinstance(result, torch.Tensor):
                raise TypeError(f"the {what} function returned {type(result).__name__}; expected a torch tensor")
            expected = (*t.shape[:-2], *shape)
            if tuple(result.shape) != expected:
                raise ValueError(f"the {what} function returned shape {tuple(result.shape)}; expected {expected}")
            return result.to(dtype=t.dtype, device=t.device)
        images = t.detach().reshape(-1, *t.shape[-2:]).to(torch.float64).cpu().numpy()
        outputs = []
        for image in images:
            output = np.asarray(function(image.copy()), dtype=np.float64)
            if output.shape != shape:
                raise ValueError(f"the {what} function returned shape {output.shape}; expected {shape}")
            outputs.append(output)
        result = torch.from_numpy(np.stack(outputs)).to(dtype=t.dtype, device=t.device)
        return result.reshape(*t.shape[:-2], *shape)

    def _forward(self, x: torch.Tensor) -> torch.Tensor:
        return self._call(self._forward_fn, x, self.out_shape, "forward")

    def _adjoint(self, y: torch.Tensor) -> torch.Tensor:
        return self._call(self._adjoint_fn, y, self.in_shape, "adjoint")

    def _describe(self) -> str:
        return f"{self.name}, {self.backend} functions"


class _ClaimedNorm(LinearOperator):
    """An operator whose norm bound is the user's claim (checked against the power iteration)."""

    def __init__(self, op: LinearOperator, claimed: float, estimate: float):
        super().__init__(op.in_shape, op.out_shape)
        self.op = op
        self.claimed = claimed
        self.estimate = estimate

    def _forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.op._forward(x)

    def _adjoint(self, y: torch.Tensor) -> torch.Tensor:
        return self.op._adjoint(y)

    def _normal(self, x: torch.Tensor) -> torch.Tensor:
        return self.op._normal(x)

    @property
    def nonnegative(self) -> bool:
        return self.op.nonnegative

    def norm(self) -> float:
        return self.estimate

    def norm_bound(self) -> NormBound:
        return NormBound(
            self.claimed,
            False,
            f"claimed by the user (not verified; power iteration finds {self.estimate:.6g}, "
            "consistent with the claim)",
            claimed=True,
        )

    def __repr__(self) -> str:
        return f"<{self.op!r} with claimed norm {self.claimed:g}>"


def adjoint_mismatch(op: LinearOperator, *, pairs: int = ADJOINT_PAIRS, seed: int = 0) -> float:
    """The largest relative mismatch of ``<A x, y>`` and ``<x, A^T y>`` over random pairs.

    Each pair is standard normal (float64, from ``torch.Generator`` seeded
    with ``seed``); the mismatch of a pair is
    ``|<A x, y> - <x, A^T y>| / (||A x|| ||y|| + ||x|| ||A^T y||)``, which is
    0 for an exact adjoint and of order 1 for an unrelated map.

    References
    ----------
    .. [1] J. F. Claerbout, *Earth Soundings Analysis: Processing versus
       Inversion*, Blackwell, 1992, Sec. 5.6 (the dot-product test).
    """
    generator = torch.Generator().manual_seed(seed)
    worst = 0.0
    for _ in range(pairs):
        x = torch.randn(op.in_shape, generator=generator, dtype=torch.float64)
        y = torch.randn(op.out_shape, generator=generator, dtype=torch.float64)
        ax, aty = op.apply(x), op.apply_adjoint(y)
        left, right = float(torch.sum(ax * y)), float(torch.sum(x * aty))
        scale = float(torch.linalg.vector_norm(ax) * torch.linalg.vector_norm(y)) + float(
            torch.linalg.vector_norm(x) * torch.linalg.vector_norm(aty)
        )
        if scale > 0:
            worst = max(worst, abs(left - right) / scale)
    return worst


def _wrap(
    obj: Any, in_shape: Shape, out_shape: Shape, adjoint: Any, backend: str | None, name: str
) -> LinearOperator:
    if isinstance(obj, scipy.sparse.linalg.LinearOperator):
        if adjoint is not None or backend is not None:
            raise ValueError("`adjoint` and `backend` apply to a pair of functions, not to a scipy LinearOperator")
        if obj.shape != (_flat(out_shape), _flat(in_shape)):
            raise ValueError(
                f"the scipy LinearOperator has shape {obj.shape} but out_shape {out_shape} and in_shape "
                f"{in_shape} need ({_flat(out_shape)}, {_flat(in_shape)})"
            )
        return FunctionOperator(
            lambda x: obj.matvec(x.ravel()).reshape(out_shape),
            lambda y: obj.rmatvec(y.ravel()).reshape(in_shape),
            in_shape,
            out_shape,
            backend="numpy",
            name=name,
        )
    if isinstance(obj, np.ndarray) or scipy.sparse.issparse(obj) or isinstance(obj, torch.Tensor):
        if adjoint is not None or backend is not None:
            raise ValueError("`adjoint` and `backend` apply to a pair of functions; a matrix's adjoint is its transpose")
        if isinstance(obj, np.ndarray) and obj.ndim != 2:
            raise ValueError(f"`matrix` must be 2-D (rows: data entries, columns: pixels), got shape {obj.shape}")
        if isinstance(obj, torch.Tensor) and obj.layout == torch.strided:
            raise TypeError("`matrix` is a dense torch tensor; pass a numpy array (matrix.numpy()) or a sparse tensor")
        return MatrixOperator(obj, in_shape, out_shape, name=name)
    if callable(obj):
        if adjoint is None:
            raise ValueError("a forward function needs its adjoint: pass `adjoint=`, a function of the data")
        if not callable(adjoint):
            raise TypeError(f"`adjoint` must be a function, got {type(adjoint).__name__}")
        backend = choice("numpy" if backend is None else backend, "backend", ("numpy", "torch"))
        return FunctionOperator(obj, adjoint, in_shape, out_shape, backend=backend, name=name)
    raise TypeError(
        f"`matrix` must be a numpy array, a scipy.sparse matrix or array, a scipy.sparse.linalg."
        f"LinearOperator, a torch sparse tensor or a forward function, got {type(obj).__name__}"
    )


def as_operator(
    matrix: Any,
    in_shape: Shape,
    out_shape: Shape,
    *,
    adjoint: Callable[[Any], Any] | None = None,
    backend: str | None = None,
    norm: float | None = None,
    name: str = "user operator",
    seed: int = 0,
) -> LinearOperator:
    """A pnpguard operator from a user's matrix, scipy operator or pair of functions.

    Parameters
    ----------
    matrix : numpy.ndarray, scipy.sparse matrix or array, scipy.sparse.linalg.LinearOperator, torch sparse tensor or callable
        The forward model. A matrix has ``M P`` rows (data entries) and
        ``H W`` columns (pixels), both flattened row-major, with
        ``(H, W) = in_shape`` and ``(M, P) = out_shape``; entries real and
        finite. A callable is the forward map and needs ``adjoint``.
    in_shape, out_shape : tuple of int
        Image and data shapes.
    adjoint : callable, optional
        The adjoint map, for a forward function only.
    backend : {"numpy", "torch"}, optional
        For functions only: ``"numpy"`` (default) calls them on one float64
        ``(H, W)`` array at a time; ``"torch"`` on tensors ``(..., H, W)``
        with any leading batch axes, in the caller's dtype and device.
    norm : float, optional
        The user's claim of the operator 2-norm. It is recorded as a claim
        (``norm_bound().basis == "claimed"``), never as a proof, and refused
        when the power iteration already finds a larger value.
    name : str, optional
        Shown in the repr and in reports.
    seed : int, optional
        Seed of the adjoint test's random pairs.

    Returns
    -------
    LinearOperator
        Takes numpy or torch, ``(H, W)`` or ``(N, C, H, W)``, and returns
        the same kind, as every operator.

    Raises
    ------
    TypeError
        If ``matrix`` is none of the accepted kinds or holds non-real
        numbers.
    ValueError
        If the shapes do not match, an entry is not finite, the adjoint
        fails the dot test (the message gives the measured mismatch), or a
        claimed norm is below the power iteration's value.

    Notes
    -----
    The adjoint (dot) test of :func:`adjoint_mismatch` runs on construction
    for every kind (for matrices it checks our flattening convention) and
    refuses a mismatch above :data:`ADJOINT_RTOL`. What the norm rests on is
    in ``norm_bound()``: see :class:`MatrixOperator` for the certified
    cases; functions and scipy operators get a power-iteration estimate,
    which a guarantee reports as an estimate.

    Examples
    --------
    >>> import numpy as np, scipy.sparse, pnpguard as pg
    >>> rows = scipy.sparse.random(40, 64, density=0.2, random_state=0)   # nonnegative entries
    >>> op = pg.as_operator(rows, (8, 8), (5, 8))
    >>> op.norm_bound().basis
    'certified'
    >>> y = op.forward(np.ones((8, 8)))
    >>> bool(np.allclose(y.ravel(), rows @ np.ones(64)))
    True
    """
    in_shape = image_shape(in_shape, "in_shape")
    out_shape = image_shape(out_shape, "out_shape")
    seed = nonnegative_int(seed, "seed")
    if not isinstance(name, str):
        raise TypeError(f"`name` must be a string, got {type(name).__name__}")
    op = _wrap(matrix, in_shape, out_shape, adjoint, backend, name)
    try:
        mismatch = adjoint_mismatch(op, seed=seed)
    except NotImplementedError as error:
        # scipy's LinearOperator without rmatvec/rmatmat.
        raise ValueError(f"the operator has no adjoint: {error}; define rmatvec (the transpose product)") from None
    if not mismatch <= ADJOINT_RTOL:
        raise ValueError(
            f"the adjoint does not match the forward map: <A x, y> and <x, A^T y> differ by a relative "
            f"{mismatch:.3g} on random pairs (allowed {ADJOINT_RTOL:g}); check transposition (rows vs "
            "columns), centring (a kernel flipped about the wrong centre) and layout (row-major vs "
            "column-major flattening, the order of the data axes)"
        )
    if norm is None:
        return op
    claimed = positive_number(norm, "norm")
    estimate, _ = power_iteration(op, seed=seed)
    if estimate > claimed * (1.0 + POWER_ITERATION_RTOL):
        raise ValueError(
            f"`norm` claims {claimed:g} but the power iteration already finds ||A|| >= {estimate:.6g} "
            "(a Rayleigh quotient never exceeds the norm); leave `norm` out to use the estimate"
        )
    return _ClaimedNorm(op, claimed, estimate)
