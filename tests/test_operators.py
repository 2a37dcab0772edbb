"""Forward models: against scipy, dense linear algebra and the adjoint identity."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.ndimage
import scipy.signal
import torch
from hypothesis import given, settings
from hypothesis import strategies as st

import pnpguard as pg
from tests.helpers import assert_close, dense_matrix

RNG = np.random.default_rng(1234)


def _inner(a, b) -> float:
    return float(np.sum(np.asarray(a, dtype=np.float64) * np.asarray(b, dtype=np.float64)))


def _dot_test(op, seed: int) -> None:
    # Adjoint identity <A x, y> = <x, A^T y> (definition of the adjoint; the classical
    # "dot test" of geophysical inversion, J. Claerbout, Earth Soundings Analysis, 1992).
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(op.in_shape)
    y = rng.standard_normal(op.out_shape)
    left, right = _inner(op(x), y), _inner(x, op.adjoint(y))
    assert abs(left - right) <= 1e-10 * max(abs(left), abs(right), 1.0), (op, left, right)


def _operators(shape, kernel_shape, factor, seed):
    rng = np.random.default_rng(seed)
    psf = rng.random(kernel_shape) + 0.05
    signed = rng.standard_normal(kernel_shape)
    signed[0, 0] = abs(signed).sum() + 1.0  # keep the sum positive
    mask = rng.random(shape) > 0.4
    ops = [
        pg.Convolution(psf, shape),
        pg.Convolution(signed, shape),
        pg.Convolution(psf, shape, "zero", output="same"),
        pg.Convolution(signed, shape, "zero", output="full"),
        pg.PixelMask(mask),
    ]
    if shape[0] % factor == 0 and shape[1] % factor == 0:
        ops.append(pg.Decimation(factor, shape))
        ops.append(pg.Decimation(factor, shape, psf=pg.gaussian_psf(3, 0.8)) @ pg.PixelMask(mask))
    blur = pg.Convolution(psf, shape)
    ops += [
        2.5 * blur,
        blur.T,
        blur.T @ pg.Convolution(psf, shape, "zero", output="same"),
        blur + pg.PixelMask(mask),
        blur - 0.5 * pg.PixelMask(mask),
        -blur,
        pg.Convolution(psf, shape, "zero", output="full") @ pg.PixelMask(mask),
    ]
    return ops


@settings(max_examples=15, deadline=None)
@given(
    height=st.integers(4, 14),
    width=st.integers(4, 14),
    kh=st.integers(1, 4),
    kw=st.integers(1, 4),
    factor=st.sampled_from([2, 3]),
    seed=st.integers(0, 2**16),
)
def test_adjoint_identity_for_every_operator_and_composition(height, width, kh, kw, factor, seed):
    for op in _operators((height, width), (kh, kw), factor, seed):
        _dot_test(op, seed)


FAST_PATH_OPERATORS = _operators((12, 10), (3, 4), 2, 5) + [
    pg.ParallelProjection((12, 10), [0.0, 30.0, 100.0]),
    pg.ParallelProjection((12, 10), [0.0, 30.0, 100.0]).T @ pg.ParallelProjection((12, 10), [45.0, 90.0, 135.0]),
]


@pytest.mark.parametrize("op", FAST_PATH_OPERATORS, ids=repr)
@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_fast_path_equals_the_public_path_and_passes_the_dot_test(op, dtype):
    generator = torch.Generator().manual_seed(3)
    x = torch.randn(2, 1, *op.in_shape, generator=generator, dtype=dtype)
    y = torch.randn(2, 1, *op.out_shape, generator=generator, dtype=dtype)
    x_before, y_before = x.clone(), y.clone()
    ax, aty, normal = op.apply(x), op.apply_adjoint(y), op.apply_normal(x)
    assert ax.shape == (2, 1, *op.out_shape) and aty.shape == (2, 1, *op.in_shape)
    assert ax.dtype == aty.dtype == normal.dtype == dtype
    # The same arithmetic as the validating public path, to the bit.
    assert torch.equal(ax, op.forward(x)) and torch.equal(aty, op.adjoint(y))
    torch.testing.assert_close(normal, op.apply_adjoint(ax))  # A^T A x, in one go or in two
    assert torch.equal(x, x_before) and torch.equal(y, y_before)  # inputs untouched
    # Dot test <A x, y> = <x, A^T y> through the fast path alone (Claerbout 1992, as above).
    left, right = float(torch.sum(ax.double() * y.double())), float(torch.sum(x.double() * aty.double()))
    tolerance = 1e-10 if dtype == torch.float64 else 1e-4
    assert abs(left - right) <= tolerance * max(abs(left), abs(right), 1.0), (left, right)


@pytest.mark.parametrize("kernel_shape", [(5, 5), (4, 6), (1, 3), (7, 2)])
def test_periodic_blur_matches_scipy_convolve_wrap(kernel_shape):
    x = RNG.standard_normal((17, 20))
    psf = RNG.random(kernel_shape)
    # Reference: scipy.ndimage.convolve with mode="wrap" (same centring rule k // 2).
    expected = scipy.ndimage.convolve(x, psf, mode="wrap")
    assert_close(pg.Convolution(psf, x.shape)(x), expected, rtol=0, atol=1e-12)


@pytest.mark.parametrize("output", ["same", "full"])
@pytest.mark.parametrize("kernel_shape", [(5, 5), (4, 6), (3, 1)])
def test_zero_boundary_blur_matches_scipy_convolve2d(output, kernel_shape):
    x = RNG.standard_normal((13, 16))
    psf = RNG.random(kernel_shape)
    # Reference: scipy.signal.convolve2d(mode="full" / "same"), zero fill outside.
    expected = scipy.signal.convolve2d(x, psf, mode=output)
    assert_close(pg.Convolution(psf, x.shape, "zero", output=output)(x), expected, rtol=0, atol=1e-12)


def _svd(op) -> np.ndarray:
    # Reference singular values: numpy.linalg.svd of the dense matrix.
    return np.linalg.svd(dense_matrix(op), compute_uv=False)


@pytest.mark.parametrize(
    "op",
    [
        pg.Convolution(pg.gaussian_psf(5, 1.0), (12, 10)),
        pg.Convolution(np.array([[0.0, -1.0, 0.0], [-1.0, 5.0, -1.0], [0.0, -1.0, 0.0]]), (9, 11)),
        pg.Decimation(2, (12, 10)),
        pg.Decimation(3, (9, 12), psf=pg.gaussian_psf(5, 1.2)),
        pg.PixelMask(RNG.random((8, 9)) > 0.5),
        pg.PixelMask(np.ones((6, 7))),
    ],
    ids=repr,
)
def test_exact_norm_and_smallest_singular_value_match_svd(op):
    singular = _svd(op)
    assert op.norm() == pytest.approx(singular.max(), rel=1e-10)
    bound = op.norm_bound()
    assert bound.certified and bound.value == pytest.approx(singular.max(), rel=1e-10)
    # Square operators: the smallest singular value; wide ones (decimation) have a null space.
    smallest = singular.min() if op.in_shape == op.out_shape else 0.0
    assert op.smallest_singular_value() == pytest.approx(smallest, abs=1e-10)


@pytest.mark.parametrize(
    "op",
    [
        pg.Convolution(pg.disk_psf(2.0), (11, 13), "zero", output="full"),
        pg.Convolution(pg.motion_psf(5, 30), (12, 12), "zero", output="same"),
        pg.Convolution(np.array([[1.0, -0.5], [0.3, 0.9]]), (10, 9), "zero"),
        pg.Decimation(2, (10, 12)) @ pg.Convolution(pg.gaussian_psf(3, 1), (10, 12), "zero"),
        pg.PixelMask(RNG.random((9, 9)) > 0.3) + 0.5 * pg.Convolution(pg.gaussian_psf(3, 1), (9, 9)),
    ],
    ids=repr,
)
def test_estimated_norm_and_certified_bound_bracket_the_svd_norm(op):
    top = _svd(op).max()
    assert op.norm() == pytest.approx(top, rel=1e-5)
    bound = op.norm_bound()
    assert bound.certified
    assert top * (1 - 1e-12) <= bound.value


def test_collatz_wielandt_bound_is_tight_for_nonnegative_operators():
    op = pg.Convolution(pg.disk_psf(2.0), (11, 13), "zero", output="full")
    top = _svd(op).max()
    assert op.nonnegative
    assert "Collatz" in op.norm_bound().method
    assert op.norm_bound().value <= top * (1 + 1e-3)


def test_scaled_and_adjoint_operators_inherit_exact_constants():
    blur = pg.Convolution(pg.gaussian_psf(3, 0.7), (8, 8))
    assert (-3.0 * blur).norm() == pytest.approx(3.0 * blur.norm())
    assert (-3.0 * blur).smallest_singular_value() == pytest.approx(3.0 * blur.smallest_singular_value())
    assert blur.T.norm() == blur.norm()
    assert blur.T.T is blur


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_numpy_in_numpy_out_and_input_untouched(dtype):
    op = pg.Convolution(pg.gaussian_psf(3, 1.0), (8, 9))
    x = RNG.standard_normal((8, 9)).astype(dtype)
    before = x.copy()
    y = op(x)
    assert isinstance(y, np.ndarray) and y.dtype == dtype and y.shape == (8, 9)
    assert np.array_equal(x, before)
    assert isinstance(op.adjoint(y), np.ndarray) and op.adjoint(y).dtype == dtype


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64])
def test_torch_batched_in_torch_out(dtype):
    op = pg.Decimation(2, (8, 10)) @ pg.Convolution(pg.gaussian_psf(3, 1.0), (8, 10))
    x = torch.randn(3, 2, 8, 10, dtype=dtype)
    y = op(x)
    assert isinstance(y, torch.Tensor) and y.dtype == dtype and y.shape == (3, 2, 4, 5)
    # Each image of the batch is mapped on its own.
    single = op(x[1, 1])
    tolerance = 1e-5 if dtype == torch.float32 else 1e-12
    assert torch.allclose(y[1, 1], single, atol=tolerance)


def test_float32_matches_float64():
    op = pg.Convolution(pg.motion_psf(9, 45), (32, 32), "zero", output="same")
    x = RNG.random((32, 32))
    assert_close(op(x.astype(np.float32)), op(x), rtol=0, atol=1e-5)


@pytest.mark.parametrize(
    "bad, message",
    [
        (np.ones((4, 4), dtype=np.int64), "float32 or float64"),
        (np.ones((4, 4), dtype=bool), "float32 or float64"),
        (np.ones((2, 4, 4)), r"\(H, W\) or \(N, C, H, W\)"),
        (np.full((4, 4), np.nan), "non-finite"),
        (np.ones((5, 4)), r"input shape is \(4, 4\)"),
        ([[1.0]], "numpy array or a torch tensor"),
    ],
)
def test_bad_inputs_are_named(bad, message):
    op = pg.Convolution(pg.gaussian_psf(3, 1.0), (4, 4))
    with pytest.raises((TypeError, ValueError), match=message):
        op(bad)


@pytest.mark.parametrize(
    "psf, message",
    [
        (np.array([[np.inf]]), "non-finite"),
        (np.zeros((0, 3)), "empty"),
        (np.ones((9, 2)), "larger than the image"),
        (-np.ones((3, 3)), "positive sum"),
        (np.ones(3), "2-D"),
    ],
)
def test_bad_psfs_are_rejected(psf, message):
    with pytest.raises(ValueError, match=message):
        pg.Convolution(psf, (8, 8))


def test_bad_options_list_the_valid_choices():
    with pytest.raises(ValueError, match="^unknown `boundary` 'reflect'; valid: 'periodic', 'zero'$"):
        pg.Convolution(np.ones((3, 3)), (8, 8), boundary="reflect")
    with pytest.raises(ValueError, match="divisible"):
        pg.Decimation(3, (8, 8))
    with pytest.raises(ValueError, match="cannot compose"):
        pg.Decimation(2, (8, 8)) @ pg.Decimation(2, (8, 8))
    with pytest.raises(ValueError, match="0/1"):
        pg.PixelMask(np.full((3, 3), 0.5))


def test_psf_builders_are_normalised_and_oriented():
    for psf in (pg.gaussian_psf(7, 1.3), pg.disk_psf(3.2), pg.motion_psf(9, 0), pg.motion_psf(6, 135)):
        assert psf.sum() == pytest.approx(1.0) and (psf >= 0).all()
        assert psf.shape[0] % 2 == 1 and psf.shape[0] == psf.shape[1]
    horizontal = pg.motion_psf(9, 0)
    centre = horizontal.shape[0] // 2
    assert horizontal[centre].sum() == pytest.approx(1.0)  # all mass on the middle row
    diagonal = pg.motion_psf(9, 45)
    assert np.allclose(diagonal, diagonal[::-1, ::-1])  # symmetric about the centre
    assert diagonal[1, -2] > 0 and diagonal[1, 1] == 0  # 45 degrees counter-clockwise: up and to the right
    # The Gaussian PSF matches scipy.ndimage.gaussian_filter's sampled kernel (impulse response).
    impulse = np.zeros((7, 7))
    impulse[3, 3] = 1.0
    reference = scipy.ndimage.gaussian_filter(impulse, 1.3, mode="constant", truncate=3 / 1.3)
    assert_close(pg.gaussian_psf(7, 1.3), reference / reference.sum(), rtol=1e-10)
    # Disk area: the weights before normalisation approximate pi r^2 (analytic area of a disk).
    with pytest.raises(ValueError, match="odd"):
        pg.gaussian_psf(4, 1.0)


def test_mask_builders():
    mask = pg.random_pixel_mask((40, 50), 0.8, seed=3)
    assert mask.dtype == bool and (~mask).sum() == 1600
    assert np.array_equal(mask, pg.random_pixel_mask((40, 50), 0.8, seed=3))
    assert not np.array_equal(mask, pg.random_pixel_mask((40, 50), 0.8, seed=4))
    lines = pg.dead_lines_mask((10, 12), rows=[2, 7], columns=[0])
    assert (~lines).sum() == 2 * 12 + 10 - 2
    scratches = pg.scratch_mask((64, 64), 3, width=2.0, seed=1)
    assert 0 < (~scratches).sum() < 0.2 * scratches.size
    with pytest.raises(ValueError, match="missing"):
        pg.random_pixel_mask((4, 4), 1.5)
    with pytest.raises(ValueError, match="rows"):
        pg.dead_lines_mask((4, 4), rows=[9])


def test_repr_says_what_it_is():
    assert repr(pg.Convolution(pg.gaussian_psf(5, 1), (64, 32))) == (
        "<Convolution 64x32 -> 64x32, psf 5x5, periodic>"
    )
    assert "factor 4" in repr(pg.Decimation(4, (64, 32)))
