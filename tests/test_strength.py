"""Strength without ground truth (discrepancy, SURE) and strength sweeps of the check."""

from __future__ import annotations

import json

import numpy as np
import pytest
import scipy.ndimage
import skimage.data
import skimage.transform

import pnpguard as pg
from pnpguard import bench


def _picture(name: str, side: int = 48) -> np.ndarray:
    image = getattr(skimage.data, name)().astype(np.float64)
    return skimage.transform.resize(image / image.max(), (side, side), anti_aliasing=True)


def _identity_problem(name: str, noise: float, seed: int = 0):
    truth = _picture(name)
    data = truth + noise * np.random.default_rng(seed).standard_normal(truth.shape)
    identity = pg.PixelMask(np.ones(truth.shape, dtype=bool))  # A = I
    return truth, pg.LeastSquares(identity, data, sigma=noise)


def _wavelet(strength: float):
    return pg.WaveletShrinkage(sigma=strength)


# -------------------------------------------------------- choose_strength
@pytest.mark.parametrize("name", ["camera", "moon"])
def test_sure_tracks_the_true_error_when_denoising(name):
    truth, fidelity = _identity_problem(name, 0.1)
    chosen = pg.choose_strength(fidelity, _wavelet, "fb", (1e-3, 0.5), rule="sure", points=8, refine=2,
                                max_iter=50)
    strengths = [row.strength for row in chosen.rows]
    sure = np.array([row.value for row in chosen.rows])
    mse = np.array([
        np.mean((pg.reconstruct("fb", fidelity, _wavelet(s), max_iter=50).x - truth) ** 2) for s in strengths
    ])
    # Pearson correlation by numpy.corrcoef; SURE is unbiased for the MSE (Stein 1981).
    assert np.corrcoef(sure, mse)[0, 1] > 0.95
    assert abs(strengths.index(chosen.strength) - int(np.argmin(mse))) <= 1
    np.testing.assert_allclose(sure, mse, atol=0.1 * 0.1**2)  # within a tenth of the noise variance
    assert chosen.x.shape == truth.shape and all(row.guarantee == "proved" for row in chosen.rows)


def test_discrepancy_on_a_blur_task_is_within_one_db_of_the_oracle():
    problem = bench.get_task("deblur-gaussian-5pct").problem((48, 48))
    options = {"max_iter": 100}
    chosen = pg.choose_strength(problem.fidelity, _wavelet, "fb", (1e-4, 1e-1), rule="discrepancy",
                                points=7, refine=3, **options)
    quality = {
        row.strength: pg.psnr(pg.reconstruct("fb", problem.fidelity, _wavelet(row.strength), **options).x,
                              problem.truth, data_range=1.0)
        for row in chosen.rows
    }
    assert max(quality.values()) - quality[chosen.strength] < 1.0
    # The rule itself: the chosen residual is within the noise energy (tau = 1), the next is not.
    values = [row.value for row in chosen.rows]
    at = [row.strength for row in chosen.rows].index(chosen.strength)
    assert values[at] <= 1.0 and (at == len(values) - 1 or values[at + 1] > 1.0)


def test_refused_strengths_stay_in_the_table_and_are_never_chosen():
    truth = _picture("camera", 32)
    mask = pg.PixelMask(pg.random_pixel_mask(truth.shape, 0.5, seed=0))  # a null space: mu = 0
    fidelity = pg.LeastSquares(mask, mask.forward(truth), sigma=0.1)

    def scaling(s):  # x -> s x: expansive (refused) for s > 1
        return pg.as_denoiser(lambda x: s * x, name=f"scale {s:g}")

    chosen = pg.choose_strength(fidelity, scaling, "fb", (0.25, 4.0), rule="discrepancy", points=5,
                                refine=0, max_iter=20, check_budget=20)
    refused = [row.strength for row in chosen.rows if row.guarantee == "refused"]
    assert refused == pytest.approx([2.0, 4.0])
    assert all(row.value is None and row.verdict == "refuted" for row in chosen.rows if row.strength > 1)
    assert chosen.strength <= 1.0
    assert "refused" in chosen.table() and json.dumps(chosen.as_dict())


@pytest.mark.parametrize("call, message", [
    (lambda f: pg.choose_strength(f, _wavelet, "fb", (0.1, 0.01)), "low < high"),
    (lambda f: pg.choose_strength(f, _wavelet, "fb", (0.01, 0.1), rule="oracle"), "rule"),
    (lambda f: pg.choose_strength(f, _wavelet, "fb", (0.0, 0.1)), r"strengths\[0\]"),
    (lambda f: pg.choose_strength(f, _wavelet, "fb", (0.01, 0.1), points=1), "points"),
])
def test_choose_strength_names_the_bad_argument(call, message):
    _, fidelity = _identity_problem("camera", 0.1)
    with pytest.raises(ValueError, match=message):
        call(fidelity)


def test_sure_on_a_mask_estimates_the_error_on_the_observed_pixels():
    # Generalised SURE with P = the mask (A^+ = A^T): the value estimates ||P (x_hat - x)||^2 / n.
    truth = _picture("camera")
    mask = pg.random_pixel_mask(truth.shape, 0.5, seed=1)
    op = pg.PixelMask(mask)
    noise = 0.05
    data = op.forward(truth) + noise * np.random.default_rng(2).standard_normal(truth.shape)
    fidelity = pg.LeastSquares(op, data, sigma=noise)
    chosen = pg.choose_strength(fidelity, _wavelet, "fb", (1e-4, 0.1), rule="sure", points=5, refine=0,
                                max_iter=60)
    for row in chosen.rows:
        x = pg.reconstruct("fb", fidelity, _wavelet(row.strength), max_iter=60).x
        projected = np.sum((mask * (x - truth)) ** 2) / truth.size
        assert row.value == pytest.approx(projected, abs=0.2 * noise**2)


def test_generalised_sure_is_unbiased_for_a_linear_estimator_under_decimation():
    # A = 2x2 box average + subsampling (a null space of 3/4 of the image). For the linear
    # estimator x_hat(y) = (A^T A + lam I)^-1 A^T y the projected risk has the closed form
    # E ||P (x_hat - x)||^2 = ||P (W A x - x)||^2 + s^2 tr(W^T P W), W = (A^T A + lam I)^-1 A^T,
    # P = A^+ A (numpy.linalg.pinv); generalised SURE (Eldar 2009, eq. 24) estimates it up to the
    # constant ||P x||^2, unbiasedly: the mean over noise draws must match within its standard error.
    import torch
    from pnpguard.strength._rules import SureProbe

    truth = _picture("camera", side=16)
    op = pg.Decimation(2, truth.shape)
    n = truth.size
    matrix = np.stack([np.asarray(op.forward(e.reshape(truth.shape))).ravel() for e in np.eye(n)], axis=1)
    projection = np.linalg.pinv(matrix) @ matrix
    noise, lam = 0.05, 0.05
    solve = np.linalg.inv(matrix.T @ matrix + lam * np.eye(n)) @ matrix.T
    x_vec = truth.ravel()
    bias = projection @ (solve @ matrix @ x_vec - x_vec)
    exact = (bias @ bias + noise**2 * np.trace(solve.T @ projection @ solve)) / n
    constant = (projection @ x_vec) @ (projection @ x_vec) / n
    rng = np.random.default_rng(5)
    estimates = []
    for draw in range(300):
        data = matrix @ x_vec + noise * rng.standard_normal(matrix.shape[0])
        fidelity = pg.LeastSquares(op, data.reshape(op.out_shape), sigma=noise)
        probe = SureProbe.build(fidelity, noise, seed=draw)
        x_hat = torch.as_tensor((solve @ data).reshape(truth.shape))
        shifted = data + probe.delta * probe.probe.numpy().ravel()
        x_shifted = torch.as_tensor((solve @ shifted).reshape(truth.shape))
        estimates.append(probe.value(op, x_hat, x_shifted) + constant)
    error = np.std(estimates) / np.sqrt(len(estimates))
    assert abs(np.mean(estimates) - exact) < 4 * error, (np.mean(estimates), exact, error)
    assert error < 0.2 * exact  # the test can tell a biased estimate from an unbiased one


# ------------------------------------------------------------ sweep_check
@pytest.fixture(scope="module")
def fidelity16():
    frame = pg.phantoms.cells(16, seed=0)
    blur = pg.Convolution(pg.gaussian_psf(5, 1.0), frame.shape)
    return pg.LeastSquares(blur, blur(frame), sigma=0.01)


def _dense_gaussian_smallest_eigenvalue(width: float, side: int) -> float:
    # The operator as scipy.ndimage.gaussian_filter with periodic ('wrap') boundary and the
    # same truncation (4 widths), applied to every unit image; eigenvalues by numpy.linalg.eigvalsh.
    columns = []
    for k in range(side * side):
        unit = np.zeros(side * side)
        unit[k] = 1.0
        columns.append(scipy.ndimage.gaussian_filter(unit.reshape(side, side), width, mode="wrap",
                                                     truncate=4.0).ravel())
    return float(np.linalg.eigvalsh(np.array(columns).T).min())


def test_sweep_of_gaussian_smoothing_matches_its_spectrum(fidelity16):
    widths = [0.3, 0.6, 1.0]
    sweep = pg.sweep_check(lambda w: pg.GaussianSmoothing(w, shape=(16, 16)), fidelity16, widths,
                           algorithms=["fb"])
    for point, width in zip(sweep.points, widths):
        smallest = _dense_gaussian_smallest_eigenvalue(width, 16)
        # Symmetric linear D with spectrum [l, 1]: theta = (1 - l) / 2, ||D|| = 1, ||I - D|| = 1 - l.
        assert point.verdict == "proved"
        assert point.theta == pytest.approx((1 - smallest) / 2, abs=1e-9)
        assert point.residual_lipschitz == pytest.approx(1 - smallest, abs=1e-9)
        assert point.lipschitz == pytest.approx(1.0, abs=1e-12)


def test_sweep_of_relaxed_soft_thresholding_follows_the_relaxation(fidelity16):
    factors = [0.2, 0.5, 1.0]
    sweep = pg.sweep_check(lambda s: pg.relaxed(pg.WaveletShrinkage(sigma=0.05), s), fidelity16, factors)
    # Soft thresholding is a proximal operator, so firmly nonexpansive (theta = 1/2) with a firmly
    # nonexpansive residual; (1 - s) I + s D is then s/2-averaged with ||I - D_s|| <= s
    # (Bauschke & Combettes 2017, Prop. 12.28 and Prop. 4.40).
    assert [p.theta for p in sweep.points] == pytest.approx([s / 2 for s in factors])
    assert [p.residual_lipschitz for p in sweep.points] == pytest.approx(factors)
    # Forward-backward with an averaged denoiser: steps in (0, 2 / L) (Combettes & Yamada 2015).
    for point in sweep.points:
        assert point.windows["forward_backward"] == pytest.approx((0.0, 2 / fidelity16.lipschitz))
        assert point.windows["proximal_gradient"] is None
    assert sweep.refused("pgd") == tuple(factors)


def test_sweep_of_soft_thresholding_is_constant_in_strength_and_matches_admissible(fidelity16):
    strengths = [0.001, 0.01, 0.1]
    sweep = pg.sweep_check(_wavelet, fidelity16, strengths, algorithms=["fb", "dr"])
    assert [p.theta for p in sweep.points] == pytest.approx([0.5] * 3)
    for point in sweep.points:
        report = pg.check_denoiser(_wavelet(point.strength), fidelity16.start_image())
        for name in ("forward_backward", "douglas_rachford"):
            assert point.windows[name] == pg.admissible(name, fidelity16, report).step_interval


def test_sweep_json_figure_and_failed_strengths(fidelity16, tmp_path):
    sweep = pg.sweep_check(lambda s: pg.relaxed(pg.WaveletShrinkage(sigma=0.05), s), fidelity16,
                           [0.5, 1.0, 1.5], algorithms=["fb", "pgd"])
    failed = sweep.points[-1]
    assert failed.verdict is None and "`s` must be" in failed.error
    document = json.loads(sweep.save(tmp_path / "sweep.json").read_text())
    assert document["format"] == "pnpguard-strength-sweep"
    assert [p["strength"] for p in document["points"]] == [0.5, 1.0, 1.5]
    assert document["points"][0]["windows"]["proximal_gradient"] is None
    figure = sweep.plot(title="relaxed soft thresholding")
    assert len(figure.axes) == 3
    crosses = [line for axis in figure.axes[1:] for line in axis.get_lines() if line.get_marker() == "x"]
    assert sorted(x for line in crosses for x in line.get_xdata()) == [0.5, 1.0, 1.5, 1.5]


def test_the_sweep_verb_writes_json_and_a_figure(tmp_path):
    from pnpguard.cli import main

    image = tmp_path / "frame.npy"
    np.save(image, pg.phantoms.cells(32, seed=0))
    out, figure = tmp_path / "sweep.json", tmp_path / "sweep.png"
    status = main(["sweep", "wavelet", str(image), "--strengths", "0.001", "0.01",
                   "--algorithms", "fb", "-o", str(out), "--figure", str(figure)])
    assert status == 0
    document = json.loads(out.read_text())
    assert [p["verdict"] for p in document["points"]] == ["proved", "proved"]
    assert figure.stat().st_size > 0


def test_sweep_margin_is_validated_like_admissible(fidelity16):
    with pytest.raises(TypeError, match="`margin`"):
        pg.sweep_check(_wavelet, fidelity16, [0.1], margin=False)
    with pytest.raises(ValueError, match="`margin`"):
        pg.sweep_check(_wavelet, fidelity16, [0.1], margin=1.0)


@pytest.mark.parametrize("arguments, message", [
    (["wavelet", "--range", "0.1", "0.01"], "--range: expected LOW < HIGH"),
    (["wavelett"], "did you mean"),
    (["wavelet", "--strengths", "0"], "--strengths: expected a positive number"),
])
def test_the_sweep_verb_refuses_bad_arguments(arguments, message, tmp_path, capsys):
    from pnpguard.cli import main

    image = tmp_path / "frame.npy"
    np.save(image, pg.phantoms.cells(16, seed=0))
    name, *options = arguments
    assert main(["sweep", name, str(image), *options]) == 2
    assert message in capsys.readouterr().err
