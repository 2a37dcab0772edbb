"""Guarded PnP solvers and the residual monitor, against independent solutions."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from sklearn.linear_model import Lasso

import pnpguard as pg
from tests.helpers import assert_close, dense_matrix

SHAPE = (8, 8)
RNG = np.random.default_rng(3)


def _soft(threshold):
    def soft(z):
        return torch.sign(z) * torch.clamp(z.abs() - threshold, min=0)

    return pg.as_denoiser(soft, name=f"soft({threshold:g})", backend="torch")


class _LinearFilter(pg.Denoiser):
    """``D = I - c Laplacian`` (periodic), spectrum [1 - 8c, 1], carried as a verified fact."""

    def __init__(self, c: float):
        super().__init__(
            name="smoothing filter",
            facts=[pg.Fact.linear_symmetric((1 - 8 * c, 1.0), "periodic Laplacian spectrum", verified=True)],
        )
        self.c = c

    def _denoise(self, t):
        laplacian = 4 * t - sum(torch.roll(t, s, d) for s in (1, -1) for d in (-1, -2))
        return t - self.c * laplacian


def _blur_problem(noise=0.05, shape=SHAPE):
    op = pg.Convolution(pg.gaussian_psf(3, 0.5), shape)
    truth = RNG.random(shape)
    y = op(truth) + noise * RNG.standard_normal(shape)
    return op, truth, y


@pytest.mark.parametrize("accelerate", [False, True])
def test_forward_backward_with_soft_thresholding_solves_the_lasso(accelerate):
    op, _, y = _blur_problem()
    sigma, threshold = 0.5, 0.02
    fidelity = pg.LeastSquares(op, y, sigma=sigma)
    result = pg.forward_backward(fidelity, _soft(threshold), max_iter=5000, tol=1e-11, accelerate=accelerate)
    assert result.converged and result.guarantee is not None
    step = result.step
    # FB with D = soft(t) and step eta minimises ||Ax - y||^2/(2 s^2) + (t/eta)||x||_1.
    # Reference: scikit-learn's Lasso, objective ||y - Xw||^2/(2 m) + alpha ||w||_1,
    # hence alpha = t s^2 / (eta m).
    m = y.size
    lasso = Lasso(alpha=threshold * sigma**2 / (step * m), fit_intercept=False, tol=1e-14, max_iter=200000)
    lasso.fit(dense_matrix(op), y.ravel())
    assert_close(result.x, lasso.coef_.reshape(SHAPE), rtol=0, atol=1e-6, what="PnP-FB vs Lasso")
    # Averaged iteration map: the fixed-point residual of the plain iteration never increases
    # (THEORY.md section 5); accelerated steps need not keep it monotone.
    residuals = result.residuals
    assert accelerate or np.all(np.diff(residuals) <= 1e-12 * residuals[0])
    assert not result.flags
    assert (result.accelerated > 0) == accelerate


def test_default_acceleration_is_on_only_for_guarded_runs_with_an_exact_denoiser():
    # accelerate="auto" (the default) accelerates where benchmarks/bench_anderson.py measured
    # a gain with the same fixed point and no new flags: guarded fixed-point runs whose
    # denoiser is exact. Inexact (iterative) proxes, unguarded runs and the descent scheme
    # stay plain.
    op, _, y = _blur_problem()
    fidelity = pg.LeastSquares(op, y, sigma=0.5)
    exact = pg.forward_backward(fidelity, _soft(0.02), max_iter=500, tol=1e-9)
    assert exact.report.tolerance == 0 and exact.accelerated > 0
    assert "accelerated run" in str(exact.guarantee)
    plain = pg.forward_backward(fidelity, _soft(0.02), max_iter=500, tol=1e-9, accelerate=False)
    assert plain.accelerated == 0 and plain.iterations > exact.iterations
    assert_close(exact.x, plain.x, rtol=0, atol=1e-6, what="auto-accelerated vs plain fixed point")
    assert pg.forward_backward(fidelity, _soft(0.02), max_iter=50, guard=False).accelerated == 0
    inexact = pg.forward_backward(fidelity, pg.TotalVariation(weight=0.05), max_iter=50, tol=1e-6)
    assert inexact.report.tolerance > 0 and inexact.accelerated == 0
    with pytest.raises(TypeError, match="accelerate"):
        pg.forward_backward(fidelity, _soft(0.02), accelerate="yes")


@pytest.mark.parametrize("accelerate", [False, True])
def test_linear_denoiser_fixed_point_matches_a_linear_solve(accelerate):
    op, _, y = _blur_problem()
    denoiser = _LinearFilter(0.1)
    fidelity = pg.LeastSquares(op, y, sigma=0.3)
    result = pg.forward_backward(fidelity, denoiser, max_iter=20000, tol=1e-12, accelerate=accelerate)
    assert result.converged and result.guarantee.status == "proved"
    # Fixed point x = G (x - eta A^T (A x - y) / s^2): (I - G + eta G A^T A / s^2) x = eta G A^T y / s^2.
    a = dense_matrix(op)
    basis = torch.eye(64, dtype=torch.float64).reshape(64, 1, *SHAPE)
    g = denoiser.apply(basis).reshape(64, 64).T.numpy()
    eta = result.step / 0.3**2
    x = np.linalg.solve(np.eye(64) - g + eta * g @ a.T @ a, eta * g @ a.T @ y.ravel())
    assert_close(result.x, x.reshape(SHAPE), rtol=0, atol=1e-8)


@pytest.mark.parametrize("accelerate", [False, True])
def test_fb_dr_and_admm_reach_the_same_minimiser(accelerate):
    op, _, y = _blur_problem()
    fidelity = pg.LeastSquares(op, y, sigma=0.2)
    denoiser = _soft(0.01)
    # The same prox parameter makes the three fixed points minimise the same convex
    # problem f + (0.01 / eta) ||x||_1, which is strictly convex here (mu > 0).
    assert fidelity.strong_convexity > 0
    eta = 1.0 / fidelity.lipschitz
    results = [
        solver(fidelity, denoiser, step=eta, max_iter=3000, tol=1e-12, accelerate=accelerate)
        for solver in (pg.forward_backward, pg.douglas_rachford, pg.admm)
    ]
    for result in results:
        assert result.converged
    assert_close(results[1].x, results[0].x, rtol=0, atol=1e-8, what="DR vs FB")
    assert_close(results[2].x, results[0].x, rtol=0, atol=1e-8, what="ADMM vs FB")


def test_admm_iterates_are_douglas_rachford_iterates_under_the_change_of_variables():
    op, _, y = _blur_problem()
    fidelity = pg.LeastSquares(op, y, sigma=0.2)
    denoiser = _soft(0.01)
    gamma = 1.0 / fidelity.lipschitz
    recorded = []
    pg.admm(
        fidelity, denoiser, step=gamma, max_iter=15, tol=0, accelerate=False,
        callback=lambda state: recorded.append(state.governing.clone()),
    )
    # Classical PnP-ADMM written out (Chan, Wang & Elgendy 2017, eq. (7)-(9)), from z0 = x0, u0 = 0.
    x0 = torch.from_numpy(op.adjoint(y))
    z, u = x0.clone(), torch.zeros_like(x0)
    w_sequence = []
    for _ in range(16):
        x = fidelity.apply_prox(z - u, gamma)
        w_sequence.append(x + u)
        z = denoiser.apply(x + u)
        u = u + x - z
    # The library's k-th governing iterate is w_k = x_(k+1) + u_k.
    for k, governing in enumerate(recorded):
        assert torch.allclose(governing, w_sequence[k + 1], atol=1e-12), k


def test_residual_sum_stays_below_the_averagedness_bound():
    op, _, y = _blur_problem()
    fidelity = pg.LeastSquares(op, y, sigma=0.3)
    denoiser = _LinearFilter(0.1)
    reference = pg.forward_backward(fidelity, denoiser, max_iter=20000, tol=1e-13)
    x_star = reference.x
    x0 = np.zeros(SHAPE)
    result = pg.forward_backward(fidelity, denoiser, x0=x0, max_iter=500, tol=0)
    alpha = result.guarantee.constant
    assert result.guarantee.status == "proved" and alpha < 1
    # THEORY.md section 5: sum_k ||x_k - T x_k||^2 <= alpha / (1 - alpha) ||x0 - x*||^2.
    bound = alpha / (1 - alpha) * np.sum((x0 - x_star) ** 2)
    assert np.sum(result.residuals**2) <= bound
    assert np.sum(result.residuals**2) >= 0.05 * bound  # the bound is not vacuous here


def test_expansive_denoiser_refused_when_guarded_and_stopped_when_not():
    op = pg.PixelMask(pg.random_pixel_mask(SHAPE, 0.5, seed=2))
    fidelity = pg.LeastSquares(op, RNG.random(SHAPE), sigma=0.1)
    expansive = pg.as_denoiser(lambda z: 1.5 * z, name="gain 1.5", backend="torch")
    with pytest.raises(pg.Refused) as caught:
        pg.forward_backward(fidelity, expansive)
    assert "expansive" in caught.value.reasons[0]
    result = pg.forward_backward(fidelity, expansive, guard=False, x0=RNG.random(SHAPE), max_iter=5000)
    assert result.guarantee is None and "NO GUARANTEE" in str(result)
    kinds = {flag.kind for flag in result.flags}
    assert "blow_up" in kinds and "residual_increase" in kinds
    assert np.isfinite(result.x).all()
    witness = next(flag for flag in result.flags if flag.kind == "residual_increase").witness
    first, second = witness
    # The witness pair is expanded by T = D (I - eta grad f): reproduce it.
    t = lambda v: expansive.apply(v - result.step * fidelity.apply_grad(v))  # noqa: E731
    assert float(torch.linalg.vector_norm(t(first) - t(second))) > float(torch.linalg.vector_norm(first - second))


def test_back_off_halves_the_relaxation_until_the_run_settles():
    op, _, y = _blur_problem()
    fidelity = pg.LeastSquares(op, y, sigma=0.2)
    # Step 3/L makes T = D (I - eta grad f) expansive (eigenvalue near 1 - 3 = -2); a
    # relaxation below 2/3 restores a nonexpansive relaxed map on those directions.
    policy = pg.Policy(residual_increase="back_off")
    result = pg.forward_backward(
        fidelity, _LinearFilter(0.0), guard=False, step=3.0 / fidelity.lipschitz,
        max_iter=3000, tol=1e-9, policy=policy,
    )
    assert result.back_offs >= 1 and result.relaxation <= 0.5
    assert result.converged


def test_callback_stop_equals_max_iter():
    op, _, y = _blur_problem()
    fidelity = pg.LeastSquares(op, y, sigma=0.2)
    denoiser = _soft(0.01)
    report = pg.check_denoiser(denoiser, y)
    stopped = pg.forward_backward(
        fidelity, denoiser, report=report, tol=0, callback=lambda state: state.iteration == 7
    )
    capped = pg.forward_backward(fidelity, denoiser, report=report, tol=0, max_iter=7)
    assert stopped.iterations == capped.iterations == 7
    assert np.array_equal(stopped.x, capped.x)


def test_reference_metrics_and_kinds():
    op, truth, y = _blur_problem(noise=0.01, shape=(16, 16))
    fidelity = pg.LeastSquares(op, torch.from_numpy(y).float(), sigma=0.05)
    result = pg.douglas_rachford(fidelity, _soft(0.001), reference=truth, max_iter=30)
    assert isinstance(result.x, torch.Tensor) and result.x.dtype == torch.float32
    assert result.metrics["psnr"].shape == (result.iterations,)
    assert result.metrics["psnr"][-1] > 20 and 0 < result.metrics["ssim"][-1] <= 1
    assert "guarantee" in str(result)


def test_user_parameters_outside_the_admissible_set_are_refused():
    op, _, y = _blur_problem()
    fidelity = pg.LeastSquares(op, y, sigma=0.2)
    with pytest.raises(pg.Refused, match="outside the admissible interval"):
        pg.forward_backward(fidelity, _LinearFilter(0.1), step=2.5 / fidelity.lipschitz)
    with pytest.raises(pg.Refused, match="relaxation"):
        pg.douglas_rachford(fidelity, _LinearFilter(0.05), relaxation=2.5)


@pytest.mark.parametrize(
    "kwargs, error, message",
    [
        ({"x0": np.zeros((4, 4))}, ValueError, r"`x0` has shape \(4, 4\)"),
        ({"step": -1.0}, ValueError, "`step` must be a positive"),
        ({"max_iter": 0}, ValueError, "`max_iter`"),
        ({"reference": np.full(SHAPE, np.nan)}, ValueError, "`reference` has .* non-finite"),
        ({"policy": "loose"}, TypeError, "`policy`"),
    ],
)
def test_bad_arguments_fail_before_iterating(kwargs, error, message):
    op, _, y = _blur_problem()
    fidelity = pg.LeastSquares(op, y)
    with pytest.raises(error, match=message):
        pg.forward_backward(fidelity, _LinearFilter(0.1), **kwargs)


def test_denoiser_with_the_wrong_output_shape_fails_clearly():
    op, _, y = _blur_problem()
    fidelity = pg.LeastSquares(op, y)
    broken = pg.as_denoiser(lambda z: z[..., :4, :], name="cropper", backend="torch")
    for guard in (True, False):
        with pytest.raises(pg.DenoiserError, match="cropper"):
            pg.forward_backward(fidelity, broken, guard=guard)


def test_a_report_for_another_denoiser_is_rejected():
    op, _, y = _blur_problem()
    report = pg.check_denoiser(_soft(0.5), y)
    with pytest.raises(ValueError, match="`report` checks denoiser 'soft\\(0.5\\)'"):
        pg.forward_backward(pg.LeastSquares(op, y), _soft(0.01), report=report)


def test_policy_validation():
    with pytest.raises(ValueError, match=r"valid: 'back_off', 'stop', 'warn'"):
        pg.Policy(stall="ignore")


def test_plot_run_draws_residual_and_metrics():
    import matplotlib

    matplotlib.use("Agg")
    op, truth, y = _blur_problem(shape=(16, 16))
    result = pg.forward_backward(pg.LeastSquares(op, y), _LinearFilter(0.1), reference=truth, max_iter=5)
    figure = pg.plot_run(result)
    assert len(figure.axes) == 3
    assert figure.axes[0].get_yscale() == "log"


def test_case_one_converges_and_just_outside_case_four_is_refused():
    op, _, y = _blur_problem()
    fidelity = pg.LeastSquares(op, y, sigma=0.2)
    assert fidelity.strong_convexity > 0
    # Case 1: forward-backward with a proved theta-averaged denoiser and the recommended step.
    case_one = pg.forward_backward(fidelity, _LinearFilter(0.1), max_iter=5000, tol=1e-10)
    assert case_one.converged and case_one.guarantee.route == "averaged"
    # Case 4: c = 0.15 gives the spectrum [-0.2, 1], theta = 0.6 > 1/2, so Douglas-Rachford
    # needs the strongly convex window of Giselsson & Boyd (2017).
    denoiser = _LinearFilter(0.15)
    report = pg.check_denoiser(denoiser, y)
    assert report.theta == pytest.approx(0.6)
    guarantee = pg.admissible("douglas_rachford", fidelity, report)
    low, high = guarantee.step_interval
    assert guarantee.route == "strongly convex" and low > 0
    inside = pg.douglas_rachford(fidelity, denoiser, report=report, step=0.5 * (low + high), max_iter=5000, tol=1e-10)
    assert inside.converged and not inside.flags
    with pytest.raises(pg.Refused, match="outside the admissible interval"):
        pg.douglas_rachford(fidelity, denoiser, report=report, step=high * 1.01)
    with pytest.raises(pg.Refused, match="outside the admissible interval"):
        pg.douglas_rachford(fidelity, denoiser, report=report, step=low * 0.99)


def test_the_stall_check_follows_the_lowest_residual_so_a_single_high_point_is_no_stall():
    from pnpguard.solvers._monitor import Monitor

    def flags(residuals):
        # fixed_point=False leaves the stall check alone (no step-to-step comparisons).
        monitor = Monitor(pg.Policy(stall_window=5), None, 1.0, 1.0, fixed_point=False)
        point = torch.zeros(2)
        found = []
        for k, r in enumerate(residuals):
            found += monitor.observe(k, point, 0.0, point, r)
        return [flag.kind for flag in found]

    before = [1.0, 0.5, 0.4, 0.3, 0.2]
    # An accepted accelerated point far above the lowest residual at the window's end: progress.
    assert flags(before + [0.1, 0.09, 0.08, 0.07, 9.0]) == []
    # The lowest residual did not fall 1 % below 0.2 over the window: a stall.
    assert flags(before + [0.2, 0.199, 0.3, 0.2, 0.25]) == ["stall"]
    # A monotone (plain) sequence is judged by its last residual against the one before the window.
    assert flags([1.0, 0.9, 0.8, 0.7, 0.6] + [0.6, 0.6, 0.6, 0.6, 0.595]) == ["stall"]
    assert flags([1.0, 0.9, 0.8, 0.7, 0.6] + [0.6, 0.6, 0.6, 0.6, 0.59]) == []


def test_a_map_without_fixed_point_stalls_and_the_policy_stops_it():
    # T x = D(x - eta grad f) with D a translation by 0.01 has no fixed point on the missing
    # pixels: the residual settles at the minimal displacement (Pazy 1971; THEORY.md section 5).
    op = pg.PixelMask(pg.random_pixel_mask(SHAPE, 0.5, seed=4))
    fidelity = pg.LeastSquares(op, RNG.random(SHAPE))
    shift = pg.as_denoiser(lambda z: z + 0.01, name="shift", backend="torch")
    policy = pg.Policy(stall="stop", stall_window=20)
    result = pg.forward_backward(fidelity, shift, guard=False, policy=policy, max_iter=1000, progress=True)
    assert not result.converged and result.iterations < 100
    assert result.flags[-1].kind == "stall" and "stopped by the monitor" in result.message


def test_non_finite_values_stop_the_run_even_under_a_warn_policy():
    op = pg.PixelMask(np.ones(SHAPE))
    fidelity = pg.LeastSquares(op, RNG.random(SHAPE))
    poison = pg.as_denoiser(lambda z: z if bool((z.abs() < 5).all()) else z * float("inf"), name="poison", backend="torch")
    policy = pg.Policy(blow_up="warn", blowup_ratio=1e9)
    result = pg.forward_backward(fidelity, poison, guard=False, step=3.0, x0=RNG.random(SHAPE), policy=policy, max_iter=200)
    assert np.isfinite(result.x).all()
    assert result.flags[-1].kind == "blow_up" and "stopped by the monitor" in result.message


@pytest.mark.parametrize("accelerate", [False, True])
def test_tv_deblurring_fixed_points_agree_across_fb_dr_and_admm(accelerate):
    # The TV prox makes the three fixed points minimisers of one strictly convex problem
    # f + (w / eta) TV (mu > 0 here) when the prox parameter equals the FB step; they agree up
    # to the inexactness of the TV solves.
    truth = pg.phantoms.shepp_logan(16)
    op = pg.Convolution(pg.gaussian_psf(3, 0.5), truth.shape)
    y = op(truth) + 0.02 * RNG.standard_normal(truth.shape)
    fidelity = pg.LeastSquares(op, y, sigma=0.05)
    tv = pg.TotalVariation(weight=0.002, max_iter=20000)  # tolerance driven from 1e-3 by the solvers
    eta = 1.0 / fidelity.lipschitz
    report = pg.check_denoiser(tv, y)
    results = [
        solver(fidelity, tv, report=report, step=eta, max_iter=3000, tol=1e-5, accelerate=accelerate)
        for solver in (pg.forward_backward, pg.douglas_rachford, pg.admm)
    ]
    assert report.verdict == "proved" and all(r.converged and not r.flags for r in results), [r.flags for r in results]
    assert_close(results[1].x, results[0].x, rtol=0, atol=2e-4, what="TV: DR vs FB")
    assert_close(results[2].x, results[0].x, rtol=0, atol=2e-4, what="TV: ADMM vs FB")


def _tv_deblurring_reference(matrix, y, noise, weight, iterations=40000):
    """argmin ||A x - y||^2 / (2 noise^2) + weight TV(x) by Chambolle-Pock (numpy, dense A).

    Independent of the library: Chambolle & Pock, J. Math. Imaging Vis. 40 (2011),
    Algorithm 1 with K = forward-difference gradient (Neumann), ||K||^2 <= 8,
    tau = sigma = 0.35, the quadratic's prox by numpy.linalg.solve.
    """
    n = y.shape[0]

    def grad(x):
        g = np.zeros((2, n, n))
        g[0, :-1] = x[1:] - x[:-1]
        g[1, :, :-1] = x[:, 1:] - x[:, :-1]
        return g

    def grad_t(p):
        out = np.zeros((n, n))
        out[:-1] -= p[0, :-1]
        out[1:] += p[0, :-1]
        out[:, :-1] -= p[1, :, :-1]
        out[:, 1:] += p[1, :, :-1]
        return out

    tau = sigma = 0.35
    inverse = np.linalg.inv(np.eye(n * n) + tau * matrix.T @ matrix / noise**2)
    back = tau * matrix.T @ y.ravel() / noise**2
    x = np.zeros((n, n))
    x_bar, p = x.copy(), np.zeros((2, n, n))
    for _ in range(iterations):
        p = p + sigma * grad(x_bar)
        p = p / np.maximum(1.0, np.sqrt(p[0] ** 2 + p[1] ** 2) / weight)
        x_new = (inverse @ ((x - tau * grad_t(p)).ravel() + back)).reshape(n, n)
        x_bar, x = 2 * x_new - x, x_new
    return x


@pytest.mark.parametrize("accelerate", [False, True])
def test_inexact_tv_prox_reaches_the_exact_minimiser(accelerate):
    # Krasnosel'skii-Mann with errors converges to the exact map's fixed point when the
    # errors are summable (Combettes, Optimization 53, 2004): the solver drives the TV
    # tolerance down. A fixed 1e-3 inner tolerance stalls measurably away from it.
    truth = pg.phantoms.shepp_logan(16)
    op = pg.Convolution(pg.gaussian_psf(3, 0.7), truth.shape)
    y = op(truth) + 0.02 * RNG.standard_normal(truth.shape)
    noise = 0.05
    fidelity = pg.LeastSquares(op, y, sigma=noise)
    eta = 1.0 / fidelity.lipschitz
    weight = 0.004
    exact = _tv_deblurring_reference(dense_matrix(op), y, noise, weight / eta)
    driven = pg.forward_backward(
        fidelity, pg.TotalVariation(weight=weight), step=eta, max_iter=3000, tol=1e-6, accelerate=accelerate
    )
    assert driven.converged and not driven.flags
    assert any("summable" in text for text in driven.guarantee.assumptions)
    error = np.linalg.norm(driven.x - exact) / np.linalg.norm(exact)
    assert error < 1e-4, error  # the reference itself moves by 1e-5 between 20000 and 40000 iterations

    class _FixedTolerance(pg.TotalVariation):
        def tolerance_driver(self):
            return None

    fixed = pg.forward_backward(fidelity, _FixedTolerance(weight=weight), step=eta, max_iter=3000, tol=1e-6)
    assert fixed.guarantee.status == "conditional" and not fixed.converged
    assert "cannot be established" in fixed.message
    assert np.linalg.norm(fixed.x - exact) / np.linalg.norm(exact) > 3 * error


def _optimistic_estimate():
    """A blur problem, a linear filter with theta = 0.9 in truth, and a report claiming 0.3."""
    op, _, y = _blur_problem()
    fidelity = pg.LeastSquares(op, y, sigma=0.2)
    denoiser = _LinearFilter(0.225)  # spectrum [-0.8, 1]: theta = 0.9 in truth
    optimistic = pg.CheckReport(
        denoiser=denoiser.name, theta=0.3, lipschitz=1.0, residual_lipschitz=0.6,
        verdict="estimated", refuted=None, witnesses={}, calls=0, seconds=0.0, method="a lucky search",
    )
    return fidelity, denoiser, optimistic


def test_an_optimistic_estimate_is_caught_by_the_monitor_with_a_witness():
    fidelity, denoiser, optimistic = _optimistic_estimate()
    result = pg.forward_backward(fidelity, denoiser, report=optimistic, x0=RNG.standard_normal(SHAPE), max_iter=50)
    broken = [flag for flag in result.flags if flag.kind == "assumption_broken"]
    assert broken and broken[0].value > result.guarantee.constant
    first, second = broken[0].witness
    # Reproduce: the pair (v, T v) of consecutive iterates violates the certified averagedness
    # of T = D (I - eta grad f) (THEORY.md section 1, pairwise statistic).
    t = lambda v: denoiser.apply(v - result.step * fidelity.apply_grad(v))  # noqa: E731
    a = first - second
    r = a - (t(first) - t(second))
    statistic = float(torch.sum(r * r) / (2 * torch.sum(a * r)))
    assert statistic == pytest.approx(broken[0].value, rel=1e-6)
    assert statistic > result.guarantee.constant


def test_callback_sees_the_iteration_that_converges():
    op, _, y = _blur_problem()
    fidelity = pg.LeastSquares(op, y, sigma=0.5)
    seen = []
    result = pg.forward_backward(fidelity, _soft(0.02), tol=1e-3, callback=lambda s: seen.append(s.iteration))
    assert result.converged
    assert seen[-1] == result.iterations


def test_unknown_option_is_named_with_a_hint():
    op, _, y = _blur_problem()
    with pytest.raises(TypeError, match="did you mean 'max_iter'"):
        pg.forward_backward(pg.LeastSquares(op, y), _soft(0.02), max_iters=3)
    import inspect

    assert "max_iter" in inspect.signature(pg.admm).parameters


def test_a_denoiser_that_does_nothing_is_flagged_as_a_trivial_fixed_point():
    # Inpainting from the zero-filled start A^T y: with a denoiser that does nothing the
    # start is already a fixed point of forward-backward (grad f vanishes there).
    shape = (16, 16)
    op = pg.PixelMask(pg.random_pixel_mask(shape, 0.5, seed=2))
    fidelity = pg.LeastSquares(op, op(RNG.random(shape)))
    result = pg.forward_backward(fidelity, pg.NonLocalMeans(sigma=1e-4), guard=False, max_iter=20)
    assert result.converged
    assert [flag.kind for flag in result.flags] == ["trivial_fixed_point"]
    assert "prior did nothing" in str(result)
    working = pg.forward_backward(fidelity, _soft(0.05), guard=False, max_iter=20)
    assert not any(flag.kind == "trivial_fixed_point" for flag in working.flags)


def test_printout_summarises_many_flags():
    op = pg.PixelMask(pg.random_pixel_mask(SHAPE, 0.5, seed=2))
    fidelity = pg.LeastSquares(op, RNG.random(SHAPE), sigma=0.1)
    expanding = pg.as_denoiser(lambda z: 1.05 * z, name="expander", backend="torch")
    result = pg.forward_backward(fidelity, expanding, guard=False, x0=RNG.random(SHAPE), max_iter=200, tol=0)
    increases = [flag for flag in result.flags if flag.kind == "residual_increase"]
    assert len(increases) > 20
    text = str(result)
    assert f"residual_increase: {len(increases)}" in text
    assert len(text.splitlines()) < 20


def test_interpolated_start_fills_missing_pixels_like_scipy():
    # The observed pixels are kept; the missing ones are scipy.interpolate.griddata's
    # linear interpolation (Delaunay), nearest outside the hull.
    from scipy.interpolate import griddata

    shape = (16, 16)
    truth = pg.phantoms.cells(16, seed=2)
    mask = pg.random_pixel_mask(shape, 0.6, seed=4)
    fidelity = pg.LeastSquares(pg.PixelMask(mask), pg.PixelMask(mask)(truth))
    start = pg.interpolated_start(fidelity)
    rows, cols = np.nonzero(mask)
    grid = tuple(np.mgrid[:16, :16])
    reference = griddata(np.column_stack([rows, cols]), truth[mask], grid, method="linear")
    inside = ~np.isnan(reference)
    assert_close(start[inside], reference[inside], rtol=0, atol=1e-12, what="interpolated start vs griddata")
    assert_close(start[mask], truth[mask], rtol=0, atol=1e-12, what="observed pixels kept")
    tensor_start = pg.interpolated_start(pg.LeastSquares(pg.PixelMask(mask), torch.from_numpy(truth * mask)))
    assert isinstance(tensor_start, torch.Tensor)
    blur = pg.LeastSquares(pg.Convolution(pg.gaussian_psf(3, 0.5), shape), truth)
    with pytest.raises(TypeError, match="needs a PixelMask"):
        pg.interpolated_start(blur)


def test_the_safeguard_rejects_an_anderson_step_that_increases_the_residual():
    from pnpguard.solvers._anderson import Anderson

    # Constructed case: the forward-backward map of a 2-D Lasso, T x = soft_0.7(x - A^T (A x - y)),
    # averaged (||A||^2 = 1.008 < 2). From x0 = (2, 2) the first type-I Anderson candidate lands
    # where the residual is larger than at the point it was proposed from.
    a = torch.tensor([[0.6, -0.8], [0.15, 0.0]], dtype=torch.float64)
    y = torch.tensor([-0.3, 0.6], dtype=torch.float64)

    def step(x):
        z = x - a.T @ (a @ x - y)
        return torch.sign(z) * torch.clamp(z.abs() - 0.7, min=0) - x

    # D = 1 makes the bound ||f_0|| (n + 1)^-(1 + eps) tight enough for the constructed increase
    # to exceed it (the shipped D = 1e6 is the paper's loose value).
    anderson = Anderson(3, safeguard=1.0)
    x = torch.tensor([2.0, 2.0], dtype=torch.float64)
    f = step(x)
    raw_rises = []
    for _ in range(200):
        candidate = anderson.propose(x, f, float(torch.linalg.vector_norm(f)))
        if candidate is None:
            x = x + f
        else:
            f_candidate = step(candidate)
            raw_rises.append(float(torch.linalg.vector_norm(f_candidate)) > float(torch.linalg.vector_norm(f)))
            x = candidate if anderson.admits(float(torch.linalg.vector_norm(f_candidate))) else x + f
        f = step(x)
        if float(torch.linalg.vector_norm(f)) < 1e-13:
            break
    assert raw_rises[0] and anderson.rejected >= 1  # the raw step raised the residual and was turned down
    assert anderson.accepted >= 1
    # The safeguarded iteration still reaches the Lasso solution. Reference: scikit-learn's Lasso,
    # objective ||y - Xw||^2 / (2 m) + alpha ||w||_1 with m = 2, so alpha = 0.7 / 2.
    lasso = Lasso(alpha=0.35, fit_intercept=False, tol=1e-14, max_iter=100000).fit(a.numpy(), y.numpy())
    np.testing.assert_allclose(x.numpy(), lasso.coef_, atol=1e-8)


def test_acceleration_ends_above_the_start_or_when_idle_at_the_point_of_lowest_residual():
    from pnpguard.solvers._anderson import ABOVE_START, IDLE_LIMIT, PROGRESS, Anderson

    # Above the start: after a lower point, ABOVE_START residuals in a row above the first one.
    anderson = Anderson(3)
    points = [torch.full((2,), float(k)) for k in range(ABOVE_START + 2)]
    residuals = [1.0, 0.8] + [1.3] * ABOVE_START
    ends = [anderson.stagnated(p, r) for p, r in zip(points, residuals)]
    assert ends[:-1] == [None] * (ABOVE_START + 1) and ends[-1] is points[1]
    assert anderson.ended_at == ABOVE_START + 2 and "above the first" in anderson.end_reason
    assert anderson.propose(points[-1], torch.ones(2), 1.0) is None  # no more candidates
    # Residuals above the lowest one but not above the first do not end it before IDLE_LIMIT.
    anderson = Anderson(3)
    points = [torch.full((2,), float(k)) for k in range(IDLE_LIMIT + 3)]
    # The lowest residual (0.4975) is not a 1 % fall from 0.5: idle from the third point on.
    residuals = [1.0, 0.5, 0.5 * (1 - PROGRESS / 2)] + [0.9] * (IDLE_LIMIT - 1)
    ends = [anderson.stagnated(p, r) for p, r in zip(points, residuals)]
    assert ends[:-1] == [None] * (IDLE_LIMIT + 1) and ends[-1] is points[2]
    assert "without a 1% fall" in anderson.end_reason
    # Ending at the lowest point itself needs no jump.
    anderson = Anderson(3)
    assert [anderson.stagnated(points[0], 1.0) for _ in range(IDLE_LIMIT + 1)] == [None] * (IDLE_LIMIT + 1)
    assert anderson.ended_at == IDLE_LIMIT + 1


def test_an_accelerated_run_that_drifts_returns_to_the_plain_iteration_and_its_fixed_point(monkeypatch):
    import pnpguard.solvers._anderson as anderson_module
    from pnpguard.bench import get_denoiser, get_suite

    # The quick suite's inpainting task (50 % missing pixels, 64 x 64) with wavelet shrinkage:
    # Douglas-Rachford's Anderson candidates raise the residual, pass the (loose) safeguard and
    # leave the iterate where the plain map barely moves (measured with benchmarks/bench_anderson.py).
    task = next(t for t in get_suite("quick").tasks if t.name == "inpaint-random50")
    problem = task.problem((64, 64))
    denoiser = get_denoiser("wavelet").make(0.0025, problem.shape)
    report = pg.check_denoiser(denoiser, problem.start(), budget=20, seed=0)
    runs = {
        accelerate: pg.douglas_rachford(problem.fidelity, denoiser, report=report, max_iter=1000, tol=1e-4,
                                        accelerate=accelerate)
        for accelerate in (False, True)
    }
    plain, fast = runs[False], runs[True]
    assert plain.converged and fast.converged and fast.accelerated > 0
    assert any("acceleration ended" in note for note in fast.notes)
    assert not [flag for flag in fast.flags if flag.kind == "stall"]
    assert_close(fast.x, plain.x, rtol=0, atol=2e-3, what="accelerated vs plain end point")
    # Without the end rule the same run drifts: it stalls and never reaches the tolerance.
    monkeypatch.setattr(anderson_module, "ABOVE_START", 10**9)
    drifting = pg.douglas_rachford(problem.fidelity, denoiser, report=report, max_iter=300, tol=1e-4,
                                   accelerate=True)
    assert not drifting.converged and any(flag.kind == "stall" for flag in drifting.flags)


def test_gamma_and_the_denoiser_strength_set_the_douglas_rachford_fixed_point_together():
    op, _, y = _blur_problem()
    fidelity = pg.LeastSquares(op, y, sigma=0.2)
    mu, lipschitz = fidelity.strong_convexity, fidelity.lipschitz
    assert mu > 0
    gamma, threshold = 1.0 / lipschitz, 0.01
    best = 1.0 / np.sqrt(mu * lipschitz)  # Giselsson & Boyd 2017, Thm. 1: minimiser of the reflected prox's constant
    slow = pg.douglas_rachford(fidelity, _soft(threshold), step=gamma, max_iter=20000, tol=1e-12)
    # soft_t = prox of t ||.||_1: the fixed point minimises f + (t / gamma) ||x||_1, so t / gamma fixes it.
    fast = pg.douglas_rachford(fidelity, _soft(threshold * best / gamma), step=best, max_iter=20000, tol=1e-12)
    assert slow.converged and fast.converged
    assert_close(fast.x, slow.x, rtol=0, atol=1e-8, what="same t / gamma, same fixed point")
    assert fast.iterations < slow.iterations
    # Reference for both: scikit-learn's Lasso on ||y - Xw||^2 / (2 m) + alpha ||w||_1 with
    # alpha = (t / gamma) s^2 / m.
    lasso = Lasso(alpha=threshold / gamma * 0.2**2 / y.size, fit_intercept=False, tol=1e-14, max_iter=200000)
    lasso.fit(dense_matrix(op), y.ravel())
    assert_close(slow.x, lasso.coef_.reshape(SHAPE), rtol=0, atol=1e-6, what="DR vs Lasso")
    # The guarantee says so, with the same numbers.
    text = " ".join(slow.guarantee.assumptions)
    assert "f + (lam / gamma) R" in text and f"gamma = {best:.4g}" in text


def test_threads_option_sets_torch_threads_for_the_run_and_restores_them():
    import pnpguard._threads as threads_module

    op, _, y = _blur_problem()
    fidelity = pg.LeastSquares(op, y, sigma=0.5)
    seen = []
    before = torch.get_num_threads()
    pg.forward_backward(fidelity, _soft(0.02), max_iter=3, threads=2, callback=lambda s: seen.append(torch.get_num_threads()))
    assert seen == [2, 2, 2] and torch.get_num_threads() == before
    with pytest.raises(ValueError, match="threads"):
        pg.forward_backward(fidelity, _soft(0.02), threads=0)
    # The default never exceeds the caller's setting, and counts busy CPUs out.
    threads_module._cache = (float("inf"), 0)  # a measurement that found no idle CPU
    try:
        assert threads_module.default_threads() == 1
    finally:
        threads_module._cache = None
    assert 1 <= threads_module.default_threads() <= torch.get_num_threads()


def test_an_accelerated_run_still_catches_an_optimistic_estimate_with_reproducible_witnesses():
    fidelity, denoiser, optimistic = _optimistic_estimate()
    result = pg.forward_backward(
        fidelity, denoiser, report=optimistic, x0=RNG.standard_normal(SHAPE), max_iter=50, accelerate=True
    )
    assert result.accelerated > 0
    broken = [flag for flag in result.flags if flag.kind == "assumption_broken"]
    assert any("accepted points" in flag.message for flag in broken)  # pairs joined by accelerated steps
    lam = result.relaxation

    def relaxed_map(v):
        return v + lam * (denoiser.apply(v - result.step * fidelity.apply_grad(v)) - v)

    for flag in broken:
        # Whether the two accepted points are joined by a plain step or not, the pair's
        # statistic for T_lam (THEORY.md section 2) is the one the monitor reports.
        first, second = flag.witness
        a = first - second
        r = a - (relaxed_map(first) - relaxed_map(second))
        statistic = float(torch.sum(r * r) / (2 * torch.sum(a * r)))
        assert statistic == pytest.approx(flag.value, rel=1e-5)
        assert statistic > result.guarantee.constant
