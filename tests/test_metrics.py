"""PSNR and SSIM against scikit-image and closed forms."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
import torch
from skimage.metrics import peak_signal_noise_ratio, structural_similarity

import pnpguard as pg
from pnpguard.metrics import _psnr
from pnpguard.phantoms import natural_image

# skimage.metrics.structural_similarity documents these settings as reproducing
# Wang, Bovik, Sheikh & Simoncelli, IEEE TIP 13(4) 2004.
PAPER = dict(gaussian_weights=True, sigma=1.5, use_sample_covariance=False)
SSIM_TOL = {np.float32: 1e-5, np.float64: 1e-12}
PSNR_TOL = {np.float32: 1e-4, np.float64: 1e-10}  # decibels


def _noisy_pair(name: str, shape, sigma: float, seed: int):
    reference = natural_image(name, shape)
    noise = np.random.default_rng(seed).standard_normal(reference.shape)
    return reference + sigma * noise, reference


def _as(kind: str, array: np.ndarray, dtype):
    array = array.astype(dtype)
    return torch.from_numpy(array) if kind == "torch" else array


@pytest.mark.parametrize("name, sigma", [("camera", 0.05), ("moon", 0.1), ("coins", 0.02),
                                         ("cell", 0.2)])
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
@pytest.mark.parametrize("kind", ["numpy", "torch"])
def test_against_scikit_image(name, sigma, dtype, kind):
    x, reference = _noisy_pair(name, (72, 90), sigma, seed=len(name))
    x32, ref32 = x.astype(dtype), reference.astype(dtype)
    # skimage.metrics.peak_signal_noise_ratio(image_true, image_test, data_range=R).
    expected_psnr = peak_signal_noise_ratio(ref32, x32, data_range=1.0)
    # skimage.metrics.structural_similarity with the paper's settings (in the input
    # precision; ours computes in float64, hence the float32 tolerance).
    expected_ssim = structural_similarity(ref32, x32, data_range=1.0, **PAPER)
    got_psnr = pg.psnr(_as(kind, x, dtype), _as(kind, reference, dtype), data_range=1.0)
    got_ssim = pg.ssim(_as(kind, x, dtype), _as(kind, reference, dtype), data_range=1.0)
    assert isinstance(got_psnr, float) and isinstance(got_ssim, float)
    assert abs(got_psnr - expected_psnr) < PSNR_TOL[dtype], (got_psnr, expected_psnr)
    assert abs(got_ssim - expected_ssim) < SSIM_TOL[dtype], (got_ssim, expected_ssim)


def test_data_range_scales_out():
    x, reference = _noisy_pair("gravel", 64, 0.1, seed=1)
    for metric in (pg.psnr, pg.ssim):
        unit = metric(x, reference, data_range=1.0)
        assert abs(metric(255 * x, 255 * reference, data_range=255.0) - unit) < 1e-10
    # A wrong range changes PSNR by 20 log10 of the ratio (definition).
    assert abs(pg.psnr(x, reference, data_range=2.0) - pg.psnr(x, reference, data_range=1.0)
               - 20 * math.log10(2)) < 1e-10
    assert pg.ssim(x, reference, data_range=255.0) > pg.ssim(x, reference, data_range=1.0)


def test_closed_forms():
    reference = natural_image("brick", 32)
    # A constant error e gives MSE = e^2, PSNR = -20 log10(e) for R = 1.
    assert abs(pg.psnr(reference + 0.01, reference, data_range=1.0) - 40.0) < 1e-10
    assert pg.psnr(reference, reference, data_range=1.0) == math.inf
    assert pg.ssim(reference, reference, data_range=1.0) == 1.0
    # Constant images (no variance): SSIM = (2 a b + C1) / (a^2 + b^2 + C1), C1 = (K1 R)^2
    # with K1 = 0.01 (Wang et al. 2004, eq. 13 with sigma = 0).
    a, b, c1 = 0.5, 0.3, 0.01**2
    expected = (2 * a * b + c1) / (a * a + b * b + c1)
    assert abs(pg.ssim(np.full((20, 20), b), np.full((20, 20), a), data_range=1.0)
               - expected) < 1e-12


def test_negated_checkerboard_closed_form():
    # Checkerboard p = (-1)^(i+j) against x = -p, data range R = 2. With separable window
    # weights w_k proportional to exp(-k^2 / (2 * 1.5^2)), |k| <= 5, every local mean is
    # +-m with m = (sum_k w_k (-1)^k)^2 and the local variance is 1 - m^2, so each
    # position gives ((-2 m^2 + C1) / (2 m^2 + C1)) * ((-2 (1 - m^2) + C2) / (2 (1 - m^2) + C2))
    # with C1 = (0.01 R)^2, C2 = (0.03 R)^2 (Wang et al. 2004, eqs. 6 and 13).
    k = np.arange(-5, 6)
    w = np.exp(-(k**2) / (2 * 1.5**2))
    m = (np.sum(w / w.sum() * (-1.0) ** k)) ** 2
    c1, c2 = (0.01 * 2) ** 2, (0.03 * 2) ** 2
    luminance = (-2 * m * m + c1) / (2 * m * m + c1)
    structure = (-2 * (1 - m * m) + c2) / (2 * (1 - m * m) + c2)
    expected = luminance * structure
    checker = (-1.0) ** np.add.outer(np.arange(24), np.arange(30))
    assert abs(pg.ssim(-checker, checker, data_range=2.0) - expected) < 1e-12


def test_batches_give_one_value_per_image():
    pairs = [_noisy_pair(name, 40, s, seed=k) for k, (name, s) in
             enumerate([("camera", 0.05), ("text", 0.1), ("grass", 0.2)])]
    x = np.stack([np.stack([p[0], p[0][::-1]]) for p in pairs])  # (3, 2, 40, 40)
    reference = np.stack([np.stack([p[1], p[1][::-1]]) for p in pairs])
    for kind in ("numpy", "torch"):
        got_psnr = pg.psnr(_as(kind, x, np.float64), _as(kind, reference, np.float64),
                           data_range=1.0)
        got_ssim = pg.ssim(_as(kind, x, np.float64), _as(kind, reference, np.float64),
                           data_range=1.0)
        assert isinstance(got_psnr, np.ndarray) and got_psnr.shape == (3,)
        assert isinstance(got_ssim, np.ndarray) and got_ssim.shape == (3,)
        for n in range(3):
            # Over all channels of image n: skimage on the (C, H, W) stack.
            expected = peak_signal_noise_ratio(reference[n], x[n], data_range=1.0)
            assert abs(got_psnr[n] - expected) < 1e-10
            expected = structural_similarity(reference[n], x[n], data_range=1.0,
                                             channel_axis=0, **PAPER)
            assert abs(got_ssim[n] - expected) < 1e-12
    identical = pg.psnr(reference, reference.copy(), data_range=1.0)
    assert np.all(np.isinf(identical))


def test_smallest_image_and_non_square():
    rng = np.random.default_rng(3)
    for shape in [(11, 11), (11, 30), (25, 13)]:
        reference, x = rng.random(shape), rng.random(shape)
        expected = structural_similarity(reference, x, data_range=1.0, **PAPER)
        assert abs(pg.ssim(x, reference, data_range=1.0) - expected) < 1e-12, shape
    with pytest.raises(ValueError, match="at least 11 x 11"):
        pg.ssim(rng.random((10, 40)), rng.random((10, 40)), data_range=1.0)


def test_inputs_are_not_modified():
    x, reference = _noisy_pair("moon", 32, 0.1, seed=2)
    x_t = torch.from_numpy(x.copy())
    before_x, before_ref = x_t.clone(), reference.copy()
    pg.ssim(x_t, reference, data_range=1.0)
    pg.psnr(x_t, reference, data_range=1.0)
    assert torch.equal(x_t, before_x) and np.array_equal(reference, before_ref)


@pytest.mark.parametrize("metric", [pg.psnr, pg.ssim])
def test_bad_input_is_rejected(metric):
    good = np.random.default_rng(0).random((16, 16))
    with pytest.raises(ValueError, match=r"`x` has shape \(16, 16\) but `reference` has shape"):
        metric(good, good[:15], data_range=1.0)
    for bad in (0.0, -1.0, math.nan, math.inf):
        with pytest.raises(ValueError, match="`data_range` must be a positive finite number"):
            metric(good, good, data_range=bad)
    for bad in (True, "1", None):
        with pytest.raises(TypeError, match="`data_range` must be a positive finite number"):
            metric(good, good, data_range=bad)
    with pytest.raises(TypeError, match="data_range"):
        metric(good, good)  # the range is required
    with pytest.raises(TypeError, match="`x` has dtype uint8"):
        metric((good * 255).astype(np.uint8), good, data_range=255.0)
    with pytest.raises(ValueError, match="`reference` has 1 non-finite"):
        nan = good.copy()
        nan[3, 3] = np.nan
        metric(good, nan, data_range=1.0)
    with pytest.raises(ValueError, match="`x` must be shaped"):
        metric(good[None], good[None], data_range=1.0)


def test_identical_images_have_infinite_psnr_without_warning():
    reference = natural_image("coins", (24, 20))
    batch = np.stack([reference, reference + 0.1])[:, None]
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no division warning either
        assert pg.psnr(reference, reference, data_range=1.0) == math.inf
        values = pg.psnr(torch.from_numpy(batch), torch.from_numpy(np.stack([reference] * 2)[:, None]),
                         data_range=1.0)
        exact = _psnr(torch.from_numpy(batch), torch.from_numpy(batch), 1.0)
    # Image 0 equals its reference; image 1 differs by 0.1 everywhere: 20 dB (definition).
    assert values[0] == math.inf and abs(values[1] - 20.0) < 1e-10
    assert float(exact) == math.inf


@pytest.mark.parametrize("dims", [None, (1, 2, 3)])
def test_psnr_kernel_against_scikit_image(dims):
    truth = np.stack([natural_image(name, (16, 18)) for name in ("camera", "moon", "cell")])[:, None]
    noise = np.random.default_rng(3).standard_normal(truth.shape)
    estimate = truth + 0.05 * noise * np.arange(1, 4)[:, None, None, None]
    got = _psnr(torch.from_numpy(estimate), torch.from_numpy(truth), 2.0, dims).numpy()
    # skimage.metrics.peak_signal_noise_ratio(image_true, image_test, data_range=R): the MSE
    # over every entry it is given (the whole batch, or one image).
    if dims is None:
        expected = peak_signal_noise_ratio(truth, estimate, data_range=2.0)
    else:
        expected = [peak_signal_noise_ratio(t, e, data_range=2.0) for t, e in zip(truth, estimate)]
    np.testing.assert_allclose(got, expected, rtol=0, atol=1e-10)
