"""Operators from users' objects: matrices, scipy operators, torch sparse tensors, function pairs."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse
import scipy.sparse.linalg
import torch

import pnpguard as pg
from pnpguard.guarantee import DEFAULT_MARGIN

from .helpers import assert_close

IN, OUT = (8, 6), (5, 7)


def _signed_sparse(seed: int = 0) -> scipy.sparse.csr_matrix:
    rng = np.random.default_rng(seed)
    return scipy.sparse.random(35, 48, density=0.15, random_state=rng, data_rvs=rng.standard_normal).tocsr()


def _nonnegative_sparse(seed: int = 1) -> scipy.sparse.csr_matrix:
    return scipy.sparse.random(35, 48, density=0.15, random_state=seed).tocsr()


def _torch_coo(matrix: scipy.sparse.csr_matrix) -> torch.Tensor:
    coo = matrix.tocoo()
    return torch.sparse_coo_tensor(np.vstack([coo.row, coo.col]), coo.data, coo.shape, check_invariants=True)


def _builders():
    """(label, build(matrix) -> operator) for every accepted kind of object."""
    return [
        ("dense", lambda m: pg.as_operator(m.toarray(), IN, OUT)),
        ("scipy csr_matrix", lambda m: pg.as_operator(m, IN, OUT)),
        ("scipy csr_array", lambda m: pg.as_operator(scipy.sparse.csr_array(m), IN, OUT)),
        ("scipy coo_array", lambda m: pg.as_operator(scipy.sparse.coo_array(m), IN, OUT)),
        ("torch coo", lambda m: pg.as_operator(_torch_coo(m), IN, OUT)),
        ("torch csr", lambda m: pg.as_operator(_torch_coo(m).to_sparse_csr(), IN, OUT)),
        ("scipy LinearOperator", lambda m: pg.as_operator(scipy.sparse.linalg.aslinearoperator(m), IN, OUT)),
        (
            "numpy functions",
            lambda m: pg.as_operator(
                lambda x: (m @ x.ravel()).reshape(OUT), IN, OUT, adjoint=lambda y: (m.T @ y.ravel()).reshape(IN)
            ),
        ),
        (
            "torch functions",
            lambda m: pg.as_operator(
                lambda x: (x.reshape(-1, 48) @ torch.from_numpy(m.toarray().T).to(x.dtype)).reshape(*x.shape[:-2], *OUT),
                IN,
                OUT,
                adjoint=lambda y: (y.reshape(-1, 35) @ torch.from_numpy(m.toarray()).to(y.dtype)).reshape(
                    *y.shape[:-2], *IN
                ),
                backend="torch",
            ),
        ),
    ]


@pytest.mark.parametrize("label,build", _builders(), ids=[label for label, _ in _builders()])
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_products_match_scipy_and_keep_the_array_kind(label, build, dtype):
    matrix = _signed_sparse()
    op = build(matrix)
    rng = np.random.default_rng(3)
    x = rng.standard_normal((2, 3, *IN)).astype(dtype)
    y = rng.standard_normal((2, 3, *OUT)).astype(dtype)
    x_before, y_before = x.copy(), y.copy()
    forward, adjoint = op.forward(x), op.adjoint(y)
    assert isinstance(forward, np.ndarray) and forward.dtype == dtype and forward.shape == (2, 3, *OUT)
    rtol = 1e-5 if dtype == np.float32 else 1e-12
    # Reference: scipy.sparse's own products on the row-major flattened images.
    expected_forward = (matrix @ x.reshape(6, -1).astype(np.float64).T).T.reshape(2, 3, *OUT)
    expected_adjoint = (matrix.T @ y.reshape(6, -1).astype(np.float64).T).T.reshape(2, 3, *IN)
    assert_close(forward, expected_forward, rtol=rtol, atol=rtol * 10, what=f"{label} forward")
    assert_close(adjoint, expected_adjoint, rtol=rtol, atol=rtol * 10, what=f"{label} adjoint")
    np.testing.assert_array_equal(x, x_before)
    np.testing.assert_array_equal(y, y_before)
    tensor = op.forward(torch.from_numpy(x[0, 0]))
    assert isinstance(tensor, torch.Tensor) and tensor.dtype == torch.from_numpy(x).dtype
    assert_close(tensor.numpy(), expected_forward[0, 0], rtol=rtol, atol=rtol * 10, what=f"{label} torch")


@pytest.mark.parametrize("label,build", _builders(), ids=[label for label, _ in _builders()])
def test_norm_against_the_dense_svd(label, build):
    for matrix in (_signed_sparse(), _nonnegative_sparse()):
        op = build(matrix)
        largest = np.linalg.svd(matrix.toarray(), compute_uv=False)[0]  # reference: numpy.linalg.svd
        bound = op.norm_bound()
        assert abs(op.norm() - largest) <= 1e-5 * largest, label
        if bound.certified:
            assert largest <= bound.value <= largest * (1 + 1e-4), label
        else:
            assert bound.basis == "estimated" and "power-iteration" in bound.method
            assert abs(bound.value - largest) <= 1e-5 * largest


def test_what_the_norm_rests_on():
    signed, nonnegative = _signed_sparse(), _nonnegative_sparse()
    assert pg.as_operator(signed, IN, OUT).norm_bound().basis == "estimated"
    assert "Collatz-Wielandt" in pg.as_operator(nonnegative, IN, OUT).norm_bound().method
    assert "Gram matrix" in pg.as_operator(signed.toarray(), IN, OUT).norm_bound().method
    functions = pg.as_operator(
        lambda x: (nonnegative @ x.ravel()).reshape(OUT), IN, OUT,
        adjoint=lambda y: (nonnegative.T @ y.ravel()).reshape(IN),
    )
    assert functions.norm_bound().basis == "estimated"  # nothing known of a function's entries


def test_orthogonal_structure_gives_the_exact_norm():
    # A signed selection with weights (one nonzero per row): A^T A is diagonal, so the norm
    # is the largest column norm (analytic); a row-binning matrix (one nonzero per column)
    # has A A^T diagonal and the largest row norm.
    rng = np.random.default_rng(0)
    picked = rng.choice(48, size=35, replace=False)
    weights = rng.standard_normal(35)
    selection = scipy.sparse.csr_matrix((weights, (np.arange(35), picked)), shape=(35, 48))
    bound = pg.as_operator(selection, IN, OUT).norm_bound()
    assert bound.method == "exact (from the operator's structure)"
    assert_close(bound.value, np.abs(weights).max(), rtol=1e-11, what="selection norm")
    binning = scipy.sparse.csr_matrix((-np.ones(48), (np.arange(48) // 2, np.arange(48))), shape=(24, 48))
    bound = pg.as_operator(binning, IN, (4, 6)).norm_bound()
    assert bound.certified
    assert_close(bound.value, np.sqrt(2.0), rtol=1e-11, what="binning norm")


def test_a_wrong_adjoint_is_refused_with_the_measured_error():
    matrix = _signed_sparse().toarray()
    with pytest.raises(ValueError, match=r"differ by a relative 0\.\d+.*transposition.*centring.*layout"):
        pg.as_operator(
            lambda x: (matrix @ x.ravel()).reshape(OUT), IN, OUT,
            adjoint=lambda y: (matrix.T @ y.ravel()).reshape(IN[::-1]).T,  # column-major by mistake
        )
    square = np.random.default_rng(0).standard_normal((36, 36))
    with pytest.raises(ValueError, match="adjoint does not match"):
        pg.as_operator(lambda x: (square @ x.ravel()).reshape(6, 6), (6, 6), (6, 6),
                       adjoint=lambda y: (square @ y.ravel()).reshape(6, 6))  # not transposed


def test_a_claimed_norm_is_a_claim_and_a_false_one_is_refused():
    matrix = _signed_sparse()
    largest = np.linalg.svd(matrix.toarray(), compute_uv=False)[0]  # reference: numpy.linalg.svd
    op = pg.as_operator(matrix, IN, OUT, norm=1.5 * largest)
    bound = op.norm_bound()
    assert bound.basis == "claimed" and not bound.certified and bound.value == 1.5 * largest
    assert "claimed by the user" in bound.method
    with pytest.raises(ValueError, match="`norm` claims"):
        pg.as_operator(matrix, IN, OUT, norm=0.9 * largest)


@pytest.mark.parametrize(
    "call, error, pattern",
    [
        (lambda: pg.as_operator(np.ones((35, 47)), IN, OUT), ValueError, r"`matrix` has shape \(35, 47\).*\(35, 48\)"),
        (lambda: pg.as_operator(scipy.sparse.eye(48, format="csr"), IN, OUT), ValueError, "`matrix` has shape"),
        (lambda: pg.as_operator(np.full((35, 48), np.nan), IN, OUT), ValueError, "`matrix` has 1680 non-finite"),
        (
            lambda: pg.as_operator(scipy.sparse.csr_matrix(([np.inf], ([0], [0])), shape=(35, 48)), IN, OUT),
            ValueError,
            "`matrix` has 1 non-finite",
        ),
        (lambda: pg.as_operator(np.ones((35, 48), dtype=complex), IN, OUT), TypeError, "real numbers"),
        (lambda: pg.as_operator("A.npy", IN, OUT), TypeError, "`matrix` must be"),
        (lambda: pg.as_operator(lambda x: x, IN, IN), ValueError, "needs its adjoint"),
        (
            lambda: pg.as_operator(scipy.sparse.linalg.LinearOperator((48, 48), matvec=lambda v: v), IN, IN),
            ValueError,
            "has no adjoint",
        ),
        (lambda: pg.as_operator(np.ones((35, 48)), (8, 6.0), OUT), TypeError, "`in_shape`"),
        (lambda: pg.as_operator(np.ones((35, 48)), IN, OUT, norm=-1.0), ValueError, "`norm`"),
        (lambda: pg.as_operator(np.ones((35, 48)), IN, OUT, backend="torch"), ValueError, "`backend`"),
        (
            lambda: pg.as_operator(lambda x: x, IN, IN, adjoint=lambda y: y, backend="jax"),
            ValueError,
            "unknown `backend`",
        ),
        (
            lambda: pg.as_operator(lambda x: x[:-1], IN, IN, adjoint=lambda y: y),
            ValueError,
            r"forward function returned shape \(7, 6\)",
        ),
    ],
)
def test_bad_input_names_the_argument(call, error, pattern):
    with pytest.raises(error, match=pattern):
        call()


def _proved_report(fidelity):
    return pg.check_denoiser(pg.WaveletShrinkage(sigma=0.02), fidelity.start_image())


def test_guarantee_says_what_the_norm_rests_on():
    rng = np.random.default_rng(0)
    matrix = scipy.sparse.random(120, 256, density=0.05, random_state=rng, data_rvs=rng.standard_normal).tocsr()
    image, data_shape = (16, 16), (10, 12)
    data = (matrix @ pg.phantoms.cells(16, seed=0).ravel()).reshape(data_shape)
    certified = pg.LeastSquares(pg.as_operator(matrix.toarray(), image, data_shape), data, sigma=0.1)
    estimated = pg.LeastSquares(pg.as_operator(matrix, image, data_shape), data, sigma=0.1)
    dense = matrix.toarray()
    claimed_norm = 1.2 * np.sqrt(np.linalg.eigvalsh(dense @ dense.T)[-1])  # reference: numpy.linalg.eigvalsh
    claimed = pg.LeastSquares(pg.as_operator(matrix, image, data_shape, norm=claimed_norm), data, sigma=0.1)
    report = _proved_report(certified)
    assert report.verdict == "proved"

    proved = pg.admissible("forward_backward", certified, report)
    assert proved.status == "proved"

    from_estimate = pg.admissible("forward_backward", estimated, report)
    assert from_estimate.status == "conditional"
    # The estimated L is inflated by the margin, as estimated denoiser constants are.
    assert_close(from_estimate.lipschitz, estimated.lipschitz * (1 + DEFAULT_MARGIN), rtol=1e-12, what="L")
    assert any("power-iteration estimate" in text and "not a proof" in text for text in from_estimate.assumptions)

    from_claim = pg.admissible("forward_backward", claimed, report)
    assert from_claim.status == "conditional"
    assert_close(from_claim.lipschitz, claimed_norm**2 / 0.01, rtol=1e-12, what="claimed L")
    assert any("claimed: not verified" in text for text in from_claim.assumptions)
    assert "CONDITIONAL" in str(from_claim)

    run = pg.forward_backward(estimated, pg.WaveletShrinkage(sigma=0.02), max_iter=5)
    assert run.guarantee.status == "conditional"


@pytest.mark.parametrize("shape", [(35, 48), (48, 35)])
def test_the_dense_gram_bound_is_above_the_svd_and_tight(shape):
    rng = np.random.default_rng(4)
    matrix = rng.standard_normal(shape) * np.logspace(0, 6, shape[1])  # columns of very different sizes
    largest = np.linalg.svd(matrix, compute_uv=False)[0]  # reference: numpy.linalg.svd
    bound = pg.as_operator(matrix, (shape[1], 1), (shape[0], 1)).norm_bound()
    assert bound.certified and largest <= bound.value <= largest * (1 + 1e-9)
