"""Least-squares data term: gradient, constants and proximal operator."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
import torch

import pnpguard as pg
from tests.helpers import assert_close, dense_matrix

RNG = np.random.default_rng(7)

SHAPE = (8, 10)
OPERATORS = [
    pg.Convolution(pg.gaussian_psf(3, 0.6), SHAPE),  # periodic: FFT closed form
    pg.Convolution(pg.motion_psf(5, 20), SHAPE, "zero", output="full"),  # conjugate gradients
    pg.PixelMask(RNG.random(SHAPE) > 0.5),  # element-wise closed form
    pg.Decimation(2, SHAPE, psf=pg.gaussian_psf(3, 0.9)),  # polyphase closed form
    0.7 * pg.Decimation(2, SHAPE),  # scaled closed form
    pg.Decimation(2, SHAPE) @ pg.PixelMask(RNG.random(SHAPE) > 0.3),  # composition: CG
]


def _fidelity(op, sigma=0.3):
    y = RNG.standard_normal(op.out_shape)
    return pg.LeastSquares(op, y, sigma=sigma), y


@pytest.mark.parametrize("op", OPERATORS, ids=repr)
def test_prox_matches_dense_linear_solve(op):
    fidelity, y = _fidelity(op)
    v = RNG.standard_normal(SHAPE)
    step = 0.37
    matrix = dense_matrix(op)
    weight = step / fidelity.sigma**2
    # Reference: scipy.linalg.solve of (I + t A^T A / s^2) x = v + t A^T y / s^2
    # (optimality condition of the prox, Bauschke & Combettes 2017, Prop. 12.26).
    system = np.eye(matrix.shape[1]) + weight * matrix.T @ matrix
    expected = scipy.linalg.solve(system, v.ravel() + weight * matrix.T @ y.ravel())
    assert_close(fidelity.prox(v, step), expected.reshape(SHAPE), rtol=1e-8, atol=1e-9)


@pytest.mark.parametrize("op", OPERATORS, ids=repr)
def test_gradient_matches_central_differences(op):
    fidelity, _ = _fidelity(op, sigma=1.3)
    x = RNG.standard_normal(SHAPE)
    direction = RNG.standard_normal(SHAPE)
    h = 1e-5
    # Reference: central finite difference of the value (exact up to O(h^2); f is quadratic,
    # so only rounding remains).
    numeric = (fidelity.value(x + h * direction) - fidelity.value(x - h * direction)) / (2 * h)
    analytic = float(np.sum(fidelity.grad(x) * direction))
    assert analytic == pytest.approx(numeric, rel=1e-6, abs=1e-7)


@pytest.mark.parametrize("op", OPERATORS, ids=repr)
def test_constants_match_singular_values(op):
    sigma = 0.5
    fidelity, _ = _fidelity(op, sigma=sigma)
    # Reference: numpy.linalg.svd of the dense matrix; L = s_max^2 / sigma^2.
    singular = np.linalg.svd(dense_matrix(op), compute_uv=False)
    assert fidelity.lipschitz >= singular.max() ** 2 / sigma**2 * (1 - 1e-10)
    assert fidelity.lipschitz == pytest.approx(singular.max() ** 2 / sigma**2, rel=1e-3)
    smallest = singular.min() if op.in_shape == op.out_shape and len(singular) == op.in_shape[0] * op.in_shape[1] else 0.0
    # mu is a lower bound, exact where the structure gives it.
    assert fidelity.strong_convexity <= smallest**2 / sigma**2 + 1e-10


def test_strong_convexity_is_exact_for_an_invertible_periodic_blur():
    op = pg.Convolution(pg.gaussian_psf(3, 0.6), SHAPE)
    fidelity, _ = _fidelity(op, sigma=0.5)
    singular = np.linalg.svd(dense_matrix(op), compute_uv=False)
    assert singular.min() > 0.1
    assert fidelity.strong_convexity == pytest.approx(singular.min() ** 2 / 0.25, rel=1e-10)
    assert fidelity.lipschitz_certified


def test_prox_of_the_gradient_step_fixed_point_is_the_least_squares_solution():
    # For an invertible periodic blur the minimiser is A^{-1} y; it is a fixed point of
    # prox_{t f} (Bauschke & Combettes 2017, Prop. 12.29: Fix prox_f = argmin f).
    op = pg.Convolution(pg.gaussian_psf(3, 0.6), SHAPE)
    fidelity, y = _fidelity(op)
    solution = scipy.linalg.solve(dense_matrix(op), y.ravel()).reshape(SHAPE)
    assert_close(fidelity.prox(solution, 2.0), solution, rtol=1e-8, atol=1e-9)
    assert_close(fidelity.grad(solution), np.zeros(SHAPE), rtol=0, atol=1e-8)


@pytest.mark.parametrize("op", OPERATORS, ids=repr)
def test_start_image_is_the_gradient_step_from_zero(op):
    fidelity, y = _fidelity(op)
    start = fidelity.start_image()
    # Reference: A^T y / ||A||^2 with the dense matrix and numpy.linalg.norm(., 2) (largest
    # singular value); the library divides by its norm bound, within 1e-3 of it (as above).
    matrix = dense_matrix(op)
    expected = (matrix.T @ y.ravel()).reshape(SHAPE) / np.linalg.norm(matrix, 2) ** 2
    assert isinstance(start, torch.Tensor) and start.dtype == torch.float64
    assert_close(start, expected, rtol=2e-3, atol=1e-12, what="A^T y / ||A||^2")
    # Exactly the bound the Lipschitz constant uses: start = -grad f(0) / L.
    step = -fidelity.grad(np.zeros(SHAPE)) / fidelity.lipschitz
    assert_close(start, step, rtol=1e-12, atol=1e-14, what="-grad f(0) / L")


@pytest.mark.parametrize("op", OPERATORS, ids=repr)
def test_fast_path_equals_the_public_path(op):
    fidelity, y = _fidelity(op)
    x = torch.from_numpy(RNG.standard_normal(SHAPE))
    before = x.clone()
    value = fidelity.apply_value(x)
    # f(x) = ||A x - y||^2 / (2 sigma^2) with the dense matrix in numpy (definition).
    residual = dense_matrix(op) @ x.numpy().ravel() - y.ravel()
    assert value == pytest.approx(0.5 * residual @ residual / 0.3**2, rel=1e-12)
    assert value == fidelity.value(x)
    assert torch.equal(fidelity.apply_grad(x), fidelity.grad(x))
    assert torch.equal(fidelity.apply_prox(x, 0.37), fidelity.prox(x, 0.37))
    assert torch.equal(x, before)


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_start_image_follows_the_data_and_a_zero_operator_gives_zero(dtype):
    y = torch.randn(2, 1, 4, 5, dtype=dtype)
    start = pg.LeastSquares(pg.Decimation(2, SHAPE), y, sigma=0.1).start_image()
    assert start.dtype == dtype and start.shape == (2, 1, *SHAPE)
    zero = pg.LeastSquares(0.0 * pg.Decimation(2, SHAPE), y).start_image()
    assert zero.dtype == dtype and not zero.any() and bool(torch.isfinite(zero).all())


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_kinds_are_preserved_and_batches_work(dtype):
    op = pg.Decimation(2, SHAPE)
    y = torch.randn(2, 1, 4, 5, dtype=dtype)
    fidelity = pg.LeastSquares(op, y, sigma=0.1)
    x = torch.randn(2, 1, *SHAPE, dtype=dtype)
    for out in (fidelity.grad(x), fidelity.prox(x, 0.5)):
        assert isinstance(out, torch.Tensor) and out.dtype == dtype and out.shape == x.shape
    assert fidelity.image_shape == (2, 1, *SHAPE)
    numpy_out = fidelity.prox(x.numpy(), 0.5)
    assert isinstance(numpy_out, np.ndarray) and numpy_out.dtype == x.numpy().dtype


def test_data_is_copied_not_shared():
    op = pg.PixelMask(np.ones(SHAPE))
    y = RNG.standard_normal(SHAPE)
    fidelity = pg.LeastSquares(op, y)
    y[:] = 0.0
    assert float(fidelity.y.abs().sum()) > 0


@pytest.mark.parametrize(
    "args, message",
    [
        ((np.ones((4, 4)),), r"`y` has shape \(4, 4\) but the operator's output shape is \(8, 10\)"),
        ((np.full(SHAPE, np.nan),), "`y` has .* non-finite"),
        ((np.ones(SHAPE), -1.0), "`sigma` must be a positive"),
        ((np.ones(SHAPE, dtype=np.int32),), "`y` has dtype int32"),
    ],
)
def test_bad_data_is_named(args, message):
    with pytest.raises((TypeError, ValueError), match=message):
        pg.LeastSquares(pg.PixelMask(np.ones(SHAPE)), *args)


def test_bad_step_and_operator():
    fidelity = pg.LeastSquares(pg.PixelMask(np.ones(SHAPE)), np.ones(SHAPE))
    with pytest.raises(ValueError, match="`step` must be a positive"):
        fidelity.prox(np.ones(SHAPE), -0.1)
    with pytest.raises(TypeError, match="`op` must be a pnpguard LinearOperator"):
        pg.LeastSquares(np.eye(3), np.ones((3, 3)))
