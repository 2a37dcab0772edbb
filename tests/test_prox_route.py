"""The smoothness estimate, the weakly convex prox behind a gradient-step denoiser, and the prox route."""

from __future__ import annotations

import numpy as np
import pytest
import torch

import pnpguard as pg
from pnpguard.denoisers import GradientStepDenoiser
from pnpguard.guarantee import _theorems as th

RNG = np.random.default_rng(7)
SIDE = 6  # 36 pixels: dense matrices stay small


def _symmetric(spectrum: np.ndarray, seed: int) -> np.ndarray:
    """A symmetric matrix with the given eigenvalues and a random orthogonal basis (numpy.linalg.qr)."""
    basis, _ = np.linalg.qr(np.random.default_rng(seed).standard_normal((spectrum.size, spectrum.size)))
    return (basis * spectrum) @ basis.T


def _quadratic(matrix: np.ndarray):
    """g(x) = <x, Q x> / 2 on (N, 1, SIDE, SIDE) images, so grad g = Q x and Lip(grad g) = ||Q||."""
    q = torch.from_numpy(matrix)

    def potential(x: torch.Tensor) -> torch.Tensor:
        flat = x.reshape(x.shape[0], -1)
        return 0.5 * torch.einsum("ni,ij,nj->n", flat, q.to(x.dtype), flat)

    return potential


def _periodic(c: float, s: float):
    """g(x) = (c s^2 / 2) sum sin^2(x / s): Hessian diag(c cos(2 x / s)), so Lip(grad g) = c exactly
    (attained at pixels equal to 0); g is bounded and nonconvex."""

    def potential(x: torch.Tensor) -> torch.Tensor:
        return 0.5 * c * s * s * torch.sin(x / s).square().flatten(1).sum(1)

    return potential


def _blur_problem(side: int = 16):
    truth = pg.phantoms.make_phantom("cells", (side, side), seed=3)
    op = pg.Convolution(pg.gaussian_psf(5, 1.0), (side, side))
    y = op.forward(truth) + 0.01 * np.random.default_rng(3).standard_normal((side, side))
    return pg.LeastSquares(op, y, sigma=0.01)


# ------------------------------------------------------------------- the estimate
def test_smoothness_estimate_matches_a_known_spectral_norm_from_below():
    # Reference: numpy.linalg.eigvalsh of the symmetric Q (Golub & Van Loan, Sec. 8.6: power
    # iteration converges to the largest singular value).
    spectrum = np.linspace(-0.7, 0.45, SIDE * SIDE)
    matrix = _symmetric(spectrum, seed=1)
    exact = np.abs(np.linalg.eigvalsh(matrix)).max()
    denoiser = GradientStepDenoiser(_quadratic(matrix), name="quadratic")
    estimate = pg.estimate_smoothness(denoiser, RNG.random((SIDE, SIDE)), budget=60)
    assert estimate.value <= exact * (1 + 1e-9)
    assert estimate.value == pytest.approx(exact, rel=1e-3)
    # The witness reproduces the value: ||(I - J) v|| = ||Q v|| at the recorded direction.
    v = estimate.direction.reshape(-1).numpy()
    assert np.linalg.norm(matrix @ v) == pytest.approx(estimate.value, rel=1e-9)


def test_smoothness_estimate_of_a_nonquadratic_potential():
    # Lip(grad g) = c for the periodic potential (derived above); the sample has zero pixels
    # where the Hessian attains it.
    c = 0.8
    denoiser = GradientStepDenoiser(_periodic(c, 0.05), name="periodic")
    sample = np.zeros((12, 12))
    sample[3:9, 3:9] = 0.5
    estimate = pg.estimate_smoothness(denoiser, sample, budget=40)
    assert c * 0.98 <= estimate.value <= c * (1 + 1e-9)


def test_smoothness_estimate_rejects_what_it_cannot_measure():
    with pytest.raises(TypeError, match="not differentiable"):
        pg.estimate_smoothness(pg.as_denoiser(lambda x: 0.5 * x), np.ones((8, 8)))
    with pytest.raises(ValueError, match="budget"):
        pg.estimate_smoothness(pg.as_denoiser(lambda x: 0.5 * x, differentiable=True), np.ones((8, 8)), budget=2)


# --------------------------------------------------- the weakly convex prox (definition)
def test_phi_along_the_iterates_is_the_quadratic_prox_potential():
    # For g = <x, Q x>/2 with ||Q|| < 1, D = I - Q = prox_phi with phi(x) = <x, Q (I - Q)^-1 x>/2
    # (derived: (I + P)^-1 = I - Q for P = Q (I - Q)^-1). The library's phi(D(z)) = g(z) -
    # ||grad g(z)||^2 / 2 must equal it; reference numpy.linalg.solve.
    matrix = _symmetric(np.linspace(-0.6, 0.6, SIDE * SIDE), seed=2)
    denoiser = GradientStepDenoiser(_quadratic(matrix), name="quadratic")
    for _ in range(3):
        z = torch.from_numpy(RNG.standard_normal((SIDE, SIDE)))
        point = denoiser.potential_at(z)
        x = (z - point.gradient()).reshape(-1).numpy()
        library = point.total - 0.5 * float(point.gradient().square().sum())
        identity = np.eye(SIDE * SIDE)
        closed = 0.5 * x @ (matrix @ np.linalg.solve(identity - matrix, x))
        assert library == pytest.approx(closed, rel=1e-10, abs=1e-12)


def test_the_denoiser_minimises_phi_plus_the_distance_among_its_outputs():
    # Definition of prox_phi: D(z) minimises phi(u) + ||u - z||^2 / 2. phi is finite on the
    # image of D, where phi(D(w)) = g(w) - ||grad g(w)||^2 / 2; compare D(z) with many D(w).
    denoiser = GradientStepDenoiser(_periodic(0.6, 0.3), name="periodic")

    def phi_and_output(w: torch.Tensor) -> tuple[float, torch.Tensor]:
        point = denoiser.potential_at(w)
        gradient = point.gradient()
        return point.total - 0.5 * float(gradient.square().sum()), w - gradient

    for _ in range(3):
        z = torch.from_numpy(RNG.standard_normal((5, 5)))
        phi, x = phi_and_output(z)
        best = phi + 0.5 * float((x - z).square().sum())
        for scale in (1e-3, 1e-2, 0.1, 1.0):
            for _ in range(20):
                other_phi, other = phi_and_output(z + scale * torch.from_numpy(RNG.standard_normal((5, 5))))
                assert other_phi + 0.5 * float((other - z).square().sum()) >= best - 1e-12


def test_weak_convexity_constant_is_the_most_negative_curvature_of_phi():
    # P = Q (I - Q)^-1 for Q with eigenvalue -L: min eig(P) = -L / (1 + L) (numpy.linalg.eigvalsh).
    for smoothness in (0.2, 0.5, 0.9):
        matrix = _symmetric(np.linspace(-smoothness, 0.3, 16), seed=3)
        curvature = np.linalg.eigvalsh(matrix @ np.linalg.inv(np.eye(16) - matrix)).min()
        assert th.prox_weak_convexity(smoothness) == pytest.approx(-curvature, rel=1e-9)


def test_one_step_decreases_step_f_plus_phi_by_the_stated_amount():
    # Quadratic case, everything in numpy: F = step f + phi with f(x) = ||A x - y||^2 / 2,
    # x+ = (I - Q)(x - step A^T (A x - y)); F(x+) <= F(x) - c ||x+ - x||^2 for c of the theorem
    # (docs/theory.md section 15), on random points and steps inside the window.
    n = 16
    smoothness = 0.7
    matrix = _symmetric(np.linspace(-smoothness, smoothness, n), seed=4)
    phi_matrix = matrix @ np.linalg.inv(np.eye(n) - matrix)
    a = np.random.default_rng(5).standard_normal((10, n))
    y = np.random.default_rng(6).standard_normal(10)
    lipschitz = np.linalg.norm(a, 2) ** 2
    weak = th.prox_weak_convexity(smoothness)

    def objective(x, step):
        return step * 0.5 * np.sum((a @ x - y) ** 2) + 0.5 * x @ phi_matrix @ x

    for fraction in (0.3, 0.7, 0.99):
        step = fraction * (2 - weak) / lipschitz
        c = th.prox_descent_constant(weak, step, lipschitz)
        assert c > 0
        for _ in range(20):
            x = (np.eye(n) - matrix) @ RNG.standard_normal(n)  # a point in the image of D
            after = (np.eye(n) - matrix) @ (x - step * a.T @ (a @ x - y))
            assert objective(after, step) <= objective(x, step) - c * np.sum((after - x) ** 2) + 1e-9


# -------------------------------------------------------------------------- the route
def test_prox_route_admits_an_expansive_gradient_step_and_the_run_decreases_its_objective():
    fidelity = _blur_problem()
    denoiser = GradientStepDenoiser(_periodic(0.5, 0.05), name="periodic", sigma=0.05)
    report = pg.check_denoiser(denoiser, fidelity.start_image(), budget=60)
    assert report.lipschitz > 1  # D itself expands: no averagedness route applies
    guarantee = pg.admissible("forward_backward", fidelity, report)
    assert guarantee.route == "weakly convex prox"
    assert guarantee.status == "conditional"  # rests on an estimated Lip(grad g)
    weak = th.prox_weak_convexity(guarantee.smoothness)
    assert guarantee.step_interval[1] == pytest.approx((2 - weak) / fidelity.lipschitz)
    assert "Lip(grad g)" in str(guarantee) and "step f + phi" in str(guarantee)
    result = pg.forward_backward(fidelity, denoiser, report=report, max_iter=300, tol=1e-7)
    assert result.converged and not [f for f in result.flags if f.kind == "assumption_broken"]
    values = result.objectives
    assert values.size == result.iterations
    assert np.all(np.diff(values) <= 1e-12 * np.abs(values[:-1]))
    # Independent evaluation of the last objective value: step f(x) + phi(x) at x = D(z).
    z = torch.from_numpy(result.x) - result.step * torch.as_tensor(fidelity.grad(result.x))
    point = denoiser.potential_at(z)
    x = z - point.gradient()
    phi = point.total - 0.5 * float(point.gradient().square().sum())
    assert values[-1] == pytest.approx(result.step * fidelity.value(x.numpy()) + phi, rel=1e-6)


def test_prox_route_refuses_a_potential_with_lipschitz_gradient_above_one():
    fidelity = _blur_problem()
    denoiser = GradientStepDenoiser(_periodic(1.5, 0.05), name="periodic", sigma=0.05)
    report = pg.check_denoiser(denoiser, fidelity.start_image(), budget=60)
    with pytest.raises(pg.Refused) as refusal:
        pg.admissible("forward_backward", fidelity, report)
    assert any("prox route" in reason and "< 1" in reason for reason in refusal.value.reasons)


def test_prox_route_for_the_shipped_gradient_step_network_is_refused_with_the_measured_constant():
    from pnpguard.learned import gradient_step_cnn

    sample = pg.phantoms.make_phantom("cells", (32, 32), seed=4)
    fidelity = pg.LeastSquares(pg.Convolution(pg.gaussian_psf(5, 1.0), (32, 32)), sample, sigma=0.01)
    report = pg.check_denoiser(gradient_step_cnn(0.05), sample + 0.05 * RNG.standard_normal((32, 32)), budget=40)
    with pytest.raises(pg.Refused) as refusal:
        pg.admissible("forward_backward", fidelity, report)
    reasons = " ".join(refusal.value.reasons)
    assert "prox route" in reasons
    smoothness = report.smoothness.value if report.smoothness is not None else report.residual_lipschitz
    assert smoothness >= 1.0


def test_a_false_potential_claim_on_the_prox_route_is_caught_by_the_monitor():
    # The user's map is D(x) = x - grad g(x) - K x with K skew-symmetric (||K|| = 0.3): not a
    # gradient step on g. The route admits it on the claim; the objective step f + phi then
    # fails its sufficient decrease, and the monitor says so with the pair of iterates.
    fidelity = _blur_problem(side=SIDE)
    skew = np.random.default_rng(9).standard_normal((SIDE * SIDE,) * 2)
    skew = torch.from_numpy(0.3 * (skew - skew.T) / np.linalg.norm(skew - skew.T, 2))
    honest = GradientStepDenoiser(_periodic(0.5, 0.05), name="periodic")

    def user_map(x):  # (H, W) images or (N, C, H, W) batches
        drift = (x.reshape(-1, SIDE * SIDE) @ skew.to(x.dtype).T).reshape(x.shape)
        return honest.apply_traced(x) - drift

    claimed = pg.with_potential(pg.as_denoiser(user_map, differentiable=True, name="user"), _periodic(0.5, 0.05))
    report = pg.check_denoiser(claimed, fidelity.start_image(), budget=60)
    guarantee = pg.admissible("forward_backward", fidelity, report)
    assert guarantee.route == "weakly convex prox" and "claim" in " ".join(guarantee.assumptions)
    result = pg.forward_backward(fidelity, claimed, report=report, max_iter=20, tol=1e-12)
    broken = [f for f in result.flags if f.kind == "assumption_broken"]
    assert broken and broken[0].witness is not None
    before, after = broken[0].witness
    assert not torch.equal(before, after)
    # Reproducible: the same run flags the same first iteration.
    again = pg.forward_backward(fidelity, claimed, report=report, max_iter=20, tol=1e-12)
    assert next(f for f in again.flags if f.kind == "assumption_broken").iteration == broken[0].iteration
