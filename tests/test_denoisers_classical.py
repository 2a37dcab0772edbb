"""Classical denoisers against outside references and the facts they carry."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
import pywt
import torch
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.ndimage import gaussian_filter
from skimage.restoration import denoise_nl_means, denoise_tv_chambolle

from pnpguard import (
    GaussianSmoothing,
    NonLocalMeans,
    TotalVariation,
    WaveletShrinkage,
    relaxed,
)
from pnpguard.denoisers._tv import (
    forward_gradient,
    gradient_adjoint,
    rof_objective,
    solve_rof,
)

DTYPES = [np.float32, np.float64]
RTOL = {np.float32: 1e-5, np.float64: 1e-12}


def _image(shape, seed=0):
    """A smooth ramp plus noise, so that thresholds and TV both act."""
    rng = np.random.default_rng(seed)
    rows, cols = np.mgrid[: shape[-2], : shape[-1]]
    smooth = 0.5 + 0.3 * np.sin(rows / 3.0) * np.cos(cols / 5.0)
    return smooth + 0.1 * rng.standard_normal(shape)


def _dense_matrix(den, shape):
    """The matrix of a linear denoiser, column by column, in float64."""
    n = shape[0] * shape[1]
    basis = torch.eye(n, dtype=torch.float64).reshape(n, 1, *shape)
    return den.apply(basis).reshape(n, n).T.numpy()


def _soft(c, t):
    # closed-form prox of t|.| (Bauschke & Combettes 2017, Example 24.20, from memory):
    # sign(c) max(|c| - t, 0)
    return np.sign(c) * np.maximum(np.abs(c) - t, 0.0)


# ================================================================== wavelets
@pytest.mark.filterwarnings("ignore:Level value")  # pywt warns about long filters; still orthogonal
@pytest.mark.parametrize("wavelet", ["haar", "db2", "db4", "sym8"])
@pytest.mark.parametrize("shape, level", [((32, 32), 2), ((64, 48), 3), ((16, 40), 3)])
def test_periodised_transform_is_orthogonal(wavelet, shape, level):
    # Parseval identity of an orthonormal basis, with PyWavelets' own transform
    x = _image(shape, seed=1)
    coeffs = pywt.wavedec2(x, wavelet, mode="periodization", level=level)
    array, _ = pywt.coeffs_to_array(coeffs)
    assert array.size == x.size
    assert np.sum(array**2) == pytest.approx(np.sum(x**2), rel=1e-12)


def test_odd_sizes_break_orthogonality_so_they_are_rejected():
    # Why WaveletShrinkage insists on sides divisible by 2**levels
    x = _image((30, 30), seed=2)
    coeffs = pywt.wavedec2(x, "db4", mode="periodization", level=2)
    array, _ = pywt.coeffs_to_array(coeffs)
    assert abs(np.sum(array**2) - np.sum(x**2)) > 1e-6 * np.sum(x**2)
    with pytest.raises(ValueError, match=r"not divisible by 2\*\*levels = 4"):
        WaveletShrinkage(sigma=0.1, levels=2)(x)
    with pytest.raises(ValueError, match="admits no decomposition level"):
        WaveletShrinkage(sigma=0.1)(np.zeros((15, 16)))


@pytest.mark.filterwarnings("ignore:Level value")
@pytest.mark.parametrize("wavelet", ["haar", "db4"])
@pytest.mark.parametrize("dtype", DTYPES)
def test_wavelet_shrinkage_is_the_l1_prox_in_the_orthonormal_basis(wavelet, dtype):
    shape, sigma = (16, 16), 0.08
    den = WaveletShrinkage(sigma=sigma, wavelet=wavelet, levels=2)
    t = den.threshold
    x = _image(shape, seed=3)
    out = den(x.astype(dtype))
    assert out.dtype == dtype
    # 1) PyWavelets directly: wavedec2 / threshold(mode="soft") / waverec2
    coeffs = pywt.wavedec2(x, wavelet, mode="periodization", level=2)
    coeffs = [coeffs[0]] + [tuple(pywt.threshold(b, t, mode="soft") for b in d) for d in coeffs[1:]]
    direct = pywt.waverec2(coeffs, wavelet, mode="periodization")
    np.testing.assert_allclose(out, direct, rtol=0, atol=20 * np.finfo(dtype).eps)
    # 2) the dense orthogonal matrix W of the transform and the closed-form prox
    n = x.size
    rows = []
    for k in range(n):
        e = np.zeros(n)
        e[k] = 1.0
        array, slices = pywt.coeffs_to_array(
            pywt.wavedec2(e.reshape(shape), wavelet, mode="periodization", level=2)
        )
        rows.append(array.ravel())
    matrix = np.array(rows).T  # coefficients = matrix @ image
    np.testing.assert_allclose(matrix @ matrix.T, np.eye(n), atol=1e-12)
    detail = np.ones(array.shape, dtype=bool)
    detail[slices[0]] = False
    detail = detail.ravel()
    c = matrix @ x.ravel()
    c[detail] = _soft(c[detail], t)
    np.testing.assert_allclose(out.ravel(), matrix.T @ c, atol=20 * np.finfo(dtype).eps)
    # 3) optimality (Fermat's rule): u = W (x - D x) is a subgradient of
    #    t ||(W z)_detail||_1 at D x: zero on the approximation band, t sign(c)
    #    where c != 0, |u| <= t elsewhere
    if dtype == np.float64:
        u = matrix @ (x.ravel() - out.ravel())
        np.testing.assert_allclose(u[~detail], 0.0, atol=1e-12)
        active = np.abs(c) > 0
        np.testing.assert_allclose(u[detail & active], t * np.sign(c[detail & active]), atol=1e-12)
        assert np.all(np.abs(u[detail & ~active]) <= t + 1e-12)


def test_wavelet_keeps_the_approximation_and_spins_cycles():
    den = WaveletShrinkage(sigma=0.2, wavelet="haar", levels=3)
    flat = np.full((16, 24), 0.37)
    np.testing.assert_allclose(den(flat), flat, atol=1e-14)  # details are zero, approximation kept
    spun = WaveletShrinkage(sigma=0.2, wavelet="haar", levels=3, cycle_spins=3)
    x = _image((2, 1, 16, 24), seed=4)
    expected = np.mean(
        [
            np.roll(den(np.roll(x, (i, j), axis=(-2, -1))), (-i, -j), axis=(-2, -1))
            for i in range(3)
            for j in range(3)
        ],
        axis=0,
    )
    np.testing.assert_allclose(spun(x), expected, atol=1e-13)
    assert spun.facts[0].kind == "proximal" and spun.facts[0].verified


def test_wavelet_argument_errors_and_torch_round_trip():
    with pytest.raises(ValueError, match="not orthogonal"):
        WaveletShrinkage(sigma=0.1, wavelet="bior2.2")
    with pytest.raises(ValueError, match="discrete wavelet"):
        WaveletShrinkage(sigma=0.1, wavelet="mexh")
    with pytest.raises(TypeError, match="`sigma` must be a positive finite number, got None"):
        WaveletShrinkage(sigma=None)
    den = WaveletShrinkage(sigma=0.1)
    assert den.levels_for((512, 512)) == pywt.dwt_max_level(512, 8)
    x = torch.from_numpy(_image((1, 2, 32, 32), seed=5)).float()
    out = den(x)
    assert isinstance(out, torch.Tensor) and out.dtype == torch.float32 and out.shape == x.shape
    assert not den.differentiable


# ================================================================== gaussian
@pytest.mark.parametrize("width", [0.7, 1.5, 3.0])
@pytest.mark.parametrize("dtype", DTYPES)
@pytest.mark.parametrize("shape", [(20, 28), (2, 1, 9, 13)])
def test_gaussian_matches_scipy_wrap(width, dtype, shape):
    # scipy.ndimage.gaussian_filter with mode="wrap" and the same truncation
    x = _image(shape, seed=6).astype(dtype)
    out = GaussianSmoothing(width)(x)
    axes = (-2, -1)
    expected = gaussian_filter(x.astype(np.float64), width, mode="wrap", truncate=4.0, axes=axes)
    assert out.dtype == dtype
    np.testing.assert_allclose(out, expected, rtol=0, atol=50 * np.finfo(dtype).eps)


@pytest.mark.parametrize("width", [0.5, 1.0, 2.0])
@pytest.mark.parametrize("shape", [(6, 8), (5, 7)])
def test_gaussian_spectrum_fact_matches_dense_eigenvalues(width, shape):
    den = GaussianSmoothing(width, shape=shape)
    matrix = _dense_matrix(den, shape)
    np.testing.assert_allclose(matrix, matrix.T, atol=1e-14)
    eig = np.linalg.eigvalsh(matrix)  # numpy.linalg.eigvalsh as the reference
    (fact,) = den.facts
    assert fact.kind == "linear_symmetric" and fact.verified
    np.testing.assert_allclose(fact.spectrum, (eig[0], eig[-1]), atol=1e-12)
    assert fact.lipschitz == pytest.approx(np.abs(eig).max(), abs=1e-12)
    assert fact.theta == pytest.approx((1 - eig[0]) / 2, abs=1e-12)
    # the size-independent enclosure contains this spectrum
    low, high = GaussianSmoothing(width).facts[0].spectrum
    assert low <= eig[0] + 1e-12 and eig[-1] <= high + 1e-12


@pytest.mark.parametrize("width", [0.3, 0.5, 0.8, 2.0])
def test_gaussian_enclosure_holds_for_every_size_and_is_tight(width):
    den = GaussianSmoothing(width)
    low, high = den.facts[0].spectrum
    exact_lows = []
    for n in range(2, 80):
        freqs = np.fft.fft(_folded_taps(width, n)).real  # numpy FFT of the wrapped kernel
        products = np.outer(freqs, freqs)
        exact_lows.append(products.min())
        assert low <= products.min() + 1e-12 and products.max() <= high + 1e-12
    assert min(exact_lows) - low < 1e-5  # the bound is not loose


def _folded_taps(width, n):
    radius = int(4.0 * width + 0.5)
    taps = np.exp(-0.5 * (np.arange(-radius, radius + 1) / width) ** 2)
    folded = np.zeros(n)
    for k, value in zip(range(-radius, radius + 1), taps / taps.sum()):
        folded[k % n] += value
    return folded


def test_gaussian_is_differentiable_and_checks_its_shape():
    shape = (5, 6)
    den = GaussianSmoothing(1.2, shape=shape)
    x = torch.rand(shape, dtype=torch.float64, generator=torch.Generator().manual_seed(0))
    jacobian = torch.func.jacrev(den.apply_traced)(x).reshape(30, 30).numpy()
    np.testing.assert_allclose(jacobian, _dense_matrix(den, shape), atol=1e-13)
    with pytest.raises(ValueError, match=r"\(5, 6\)"):
        den(np.zeros((6, 5)))


# ======================================================================= TV
def test_gradient_adjoint_dot_test():
    rng = np.random.default_rng(7)
    x = torch.from_numpy(rng.standard_normal((2, 1, 9, 11)))
    p, q = (torch.from_numpy(rng.standard_normal((2, 1, 9, 11))) for _ in range(2))
    gx, gy = forward_gradient(x)
    lhs = (gx * p).sum() + (gy * q).sum()
    rhs = (x * gradient_adjoint(p, q)).sum()
    assert float(lhs) == pytest.approx(float(rhs), rel=1e-12)
    # the last row / column of the gradient is zero (Neumann boundary, as in
    # skimage.restoration.denoise_tv_chambolle: np.diff padded with zeros)
    assert float(gx[..., -1, :].abs().max()) == 0.0 and float(gy[..., -1].abs().max()) == 0.0


@pytest.mark.parametrize("weight", [0.05, 0.2])
@pytest.mark.parametrize("dtype", DTYPES)
def test_tv_meets_its_tolerance_and_agrees_with_scikit_image(weight, dtype):
    shape, tol = (24, 20), 1e-3
    f = _image(shape, seed=8)
    den = TotalVariation(weight=weight, tol=tol)
    out = den(f.astype(dtype))
    assert out.dtype == dtype
    # long reference solve, within 1e-6 * sqrt(480) ~ 2e-5 of the minimiser
    ref = solve_rof(torch.from_numpy(f), weight, tol=1e-6, max_iter=100_000)
    assert ref.converged
    x_ref = ref.x.numpy()
    bound = tol * math.sqrt(f.size)
    ref_error = 1e-6 * math.sqrt(f.size)
    assert np.linalg.norm(out - x_ref) <= bound + ref_error
    objective = float(rof_objective(torch.from_numpy(out.astype(np.float64)), torch.from_numpy(f), weight))
    best = float(rof_objective(ref.x, torch.from_numpy(f), weight))
    assert best - 1e-9 <= objective <= best + 0.5 * bound**2 + 1e-9
    # scikit-image's objective is sum |grad u| + (1 / (2 weight)) (f - u)^2, i.e.
    # ours divided by `weight`, with the same forward differences: same minimiser
    # (skimage.restoration.denoise_tv_chambolle docstring and source)
    skimage_x = denoise_tv_chambolle(f, weight=weight, eps=1e-12, max_num_iter=10_000)
    skimage_objective = float(rof_objective(torch.from_numpy(skimage_x), torch.from_numpy(f), weight))
    assert best <= skimage_objective + 1e-9  # our reference is at least as good
    np.testing.assert_allclose(skimage_x, x_ref, atol=2e-4)


def test_tv_gap_bounds_the_distance_to_the_minimiser():
    f = torch.from_numpy(_image((2, 1, 16, 16), seed=9))
    ref = solve_rof(f, 0.1, tol=1e-6, max_iter=100_000)
    assert ref.converged
    ref_error = torch.sqrt(2 * ref.gap).reshape(-1)
    for max_iter in (10, 30, 100):
        rough = solve_rof(f, 0.1, tol=1e-9, max_iter=max_iter)
        assert not rough.converged and rough.iterations == max_iter
        distance = torch.linalg.vector_norm(rough.x - ref.x, dim=(-2, -1)).reshape(-1)
        # 1-strong convexity: ||x - x*||^2 / 2 <= gap, with ||x - x*|| >= distance - ref_error
        assert torch.all((distance - ref_error) ** 2 / 2 <= rough.gap.reshape(-1))


def test_tv_batches_like_single_images_and_warns_when_capped():
    x = _image((2, 3, 12, 10), seed=10)
    den = TotalVariation(sigma=0.1, tol=1e-4)
    batch = den(x)
    single = np.stack([[den(x[n, c]) for c in range(3)] for n in range(2)])
    assert np.linalg.norm(batch - single) <= 2 * 1e-4 * math.sqrt(120)
    capped = TotalVariation(sigma=0.1, tol=1e-6, max_iter=5)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        capped(x)
    assert any("max_iter=5" in str(w.message) for w in caught)
    assert den.facts[0].tolerance == 1e-4 and den.facts[0].verified
    with pytest.raises(ValueError, match="`sigma`.*`weight`"):
        TotalVariation()


# ======================================================= firm nonexpansiveness
def _pair_excess(den, x, y):
    """||Dx - Dy||^2 - 2 theta <Dx - Dy, x - y> with theta = 1/2, and ||x - y||."""
    dx, dy = den(x), den(y)
    diff, a = (dx - dy).ravel(), (x - y).ravel()
    return float(diff @ diff - diff @ a), float(np.linalg.norm(a))


SHAPES = st.sampled_from([(16, 16), (32, 16), (1, 2, 16, 32)])


@settings(max_examples=12, deadline=None)
@given(
    shape=SHAPES,
    sigma=st.floats(0.01, 0.5),
    wavelet=st.sampled_from(["haar", "db2", "sym4"]),
    spins=st.sampled_from([1, 2]),
    seed=st.integers(0, 2**31),
    scale=st.floats(0.01, 3.0),
)
def test_wavelet_is_firmly_nonexpansive_on_random_pairs(shape, sigma, wavelet, spins, seed, scale):
    # firm nonexpansiveness ||Dx - Dy||^2 <= <Dx - Dy, x - y> (prox of a convex
    # function, Bauschke & Combettes 2017, Prop. 12.28, from memory)
    rng = np.random.default_rng(seed)
    x = rng.random(shape)
    y = x + scale * sigma * rng.standard_normal(shape)
    den = WaveletShrinkage(sigma=sigma, wavelet=wavelet, cycle_spins=spins)
    excess, norm = _pair_excess(den, x, y)
    assert excess <= 1e-12 * max(norm**2, 1.0)


@settings(max_examples=8, deadline=None)
@given(
    shape=st.sampled_from([(12, 12), (16, 10), (1, 2, 8, 12)]),
    weight=st.floats(0.02, 0.5),
    seed=st.integers(0, 2**31),
    scale=st.floats(0.01, 1.0),
)
def test_tv_is_firmly_nonexpansive_up_to_its_tolerance(shape, weight, seed, scale):
    rng = np.random.default_rng(seed)
    x = rng.random(shape)
    y = x + scale * rng.standard_normal(shape)
    tol = 1e-4
    # Enough inner iterations for the stated tolerance to hold on every draw (the default cap
    # left an RMS error bound of 1.7e-4 on one draw, with a warning saying so).
    den = TotalVariation(weight=weight, tol=tol, max_iter=50000)
    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)  # a call that misses tol fails the test
        excess, norm = _pair_excess(den, x, y)
    # D = P + e with ||e|| <= delta per image gives excess <= 6 delta ||a|| + 4 delta^2
    images = int(np.prod(shape[:-2]))
    delta = tol * math.sqrt(shape[-2] * shape[-1]) * math.sqrt(images)
    assert excess <= 6 * delta * norm + 4 * delta**2


@settings(max_examples=10, deadline=None)
@given(width=st.floats(0.3, 3.0), s=st.floats(0.1, 1.0), seed=st.integers(0, 2**31))
def test_relaxed_gaussian_pairs_respect_the_fact_theta(width, s, seed):
    # theta-averaged <=> ||r||^2 <= 2 theta <a, r> with r = (I - D)x - (I - D)y
    # (Bauschke & Combettes 2017, Prop. 4.35, from memory)
    den = relaxed(GaussianSmoothing(width, shape=(16, 16)), s)
    theta = den.facts[0].theta
    rng = np.random.default_rng(seed)
    x, y = rng.random((16, 16)), rng.random((16, 16))
    a = (x - y).ravel()
    r = a - (den(x) - den(y)).ravel()
    assert r @ r <= 2 * theta * (a @ r) + 1e-12


# ====================================================================== NLM
def test_nlm_matches_scikit_image_and_has_no_facts():
    sigma = 0.08
    x = np.clip(_image((2, 1, 24, 24), seed=11), 0, 1)
    den = NonLocalMeans(sigma=sigma)
    out = den(x.astype(np.float32))
    assert out.dtype == np.float32 and out.shape == x.shape
    for n in range(2):
        expected = denoise_nl_means(
            x[n, 0].astype(np.float32), patch_size=5, patch_distance=6, h=0.8 * sigma,
            fast_mode=True, sigma=sigma, preserve_range=True,
        )
        np.testing.assert_allclose(out[n, 0], expected, rtol=1e-6)
    assert den.facts == () and not den.differentiable
    with pytest.raises(TypeError, match="not differentiable"):
        den.apply_traced(torch.zeros(8, 8))


def test_tv_warm_start_keeps_the_certified_accuracy():
    # The duality-gap certificate holds whatever the dual start (Chambolle & Pock 2011:
    # weak duality), so a warm start, even a deliberately infeasible one (projected onto
    # |y_ij| <= weight), gives the same prox to the stated tolerance, in fewer iterations.
    from pnpguard.denoisers._tv import solve_rof

    rng = np.random.default_rng(4)
    from pnpguard.phantoms import cells

    f = torch.from_numpy(cells(32, seed=1) + 0.05 * rng.standard_normal((32, 32)))
    tol, weight = 1e-4, 0.05
    cold = solve_rof(f, weight, tol=1e-6, max_iter=50000)
    nearby = solve_rof(f + 1e-3 * torch.from_numpy(rng.standard_normal((32, 32))), weight, tol=tol, max_iter=50000)
    warm = solve_rof(f, weight, tol=tol, max_iter=50000, dual=nearby.dual)
    wild = solve_rof(f, weight, tol=tol, max_iter=50000, dual=(10 * torch.ones_like(f), -10 * torch.ones_like(f)))
    bound = (tol + 1e-6) * 32
    for solution in (warm, wild):
        assert solution.converged
        assert float(torch.linalg.vector_norm(solution.x - cold.x)) <= bound
    cold_at_tol = solve_rof(f, weight, tol=tol, max_iter=50000)
    assert warm.iterations < cold_at_tol.iterations
