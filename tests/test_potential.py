"""Gradient-step denoisers, the potential route and the objective monitor."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy.ndimage import uniform_filter

import pnpguard as pg
from pnpguard.learned import GradientStepNetwork
from tests.helpers import dense_matrix

RNG = np.random.default_rng(21)


class _SmoothNet(torch.nn.Module):
    """A small softplus network ``N(x, sigma)`` (random weights, float64)."""

    def __init__(self, seed: int = 0):
        super().__init__()
        generator = torch.Generator().manual_seed(seed)
        self.first = torch.nn.Conv2d(1, 6, 3, padding=1)
        self.second = torch.nn.Conv2d(6, 1, 3, padding=1)
        with torch.no_grad():
            for parameter in self.parameters():
                parameter.copy_(0.3 * torch.randn(parameter.shape, generator=generator))

    def forward(self, x, sigma):
        return x - 0.2 * self.second(torch.nn.functional.softplus(self.first(x)))


class _Averaging(torch.nn.Module):
    """A linear network: 3x3 box average (zero padding, counted), so g is a quadratic."""

    def forward(self, x, sigma):
        return torch.nn.functional.avg_pool2d(x, 3, stride=1, padding=1, count_include_pad=True)


def _finite_difference_check(denoiser, x, directions=4, h=1e-5):
    # D = I - grad g: the directional derivative of g, by central differences, must equal
    # <x - D(x), e> (autograd against a textbook difference quotient, float64).
    point = torch.from_numpy(x)
    gradient = point - denoiser.apply(point)
    for _ in range(directions):
        e = torch.from_numpy(RNG.standard_normal(x.shape))
        plus = denoiser.potential_at(point + h * e).total
        minus = denoiser.potential_at(point - h * e).total
        numeric = (plus - minus) / (2 * h)
        exact = float(torch.sum(gradient * e))
        assert numeric == pytest.approx(exact, rel=1e-6, abs=1e-8)


def test_gradient_of_the_potential_matches_finite_differences():
    x = RNG.random((12, 12))
    _finite_difference_check(pg.gradient_step_denoiser(_SmoothNet(), 0.1), x)
    torch.manual_seed(1)
    network = GradientStepNetwork(widths=(4, 8), blocks=1).double()
    for block in network.modules():
        if isinstance(block, torch.nn.Conv2d):
            torch.nn.init.normal_(block.weight, std=0.2)
    shipped_kind = pg.GradientStepDenoiser(lambda t: network.potential(t, 0.1), name="gs", sigma=0.1)
    _finite_difference_check(shipped_kind, RNG.random((16, 16)))


def test_the_structure_is_a_verified_fact_and_a_claim_stays_a_claim():
    built = pg.gradient_step_denoiser(_SmoothNet(), 0.1)
    assert [(f.kind, f.verified) for f in built.facts] == [("gradient_step", True)]
    claimed = pg.with_potential(lambda x: 0.5 * x, lambda t: 0.25 * t.flatten(1).square().sum(1))
    assert [(f.kind, f.verified) for f in claimed.facts] == [("gradient_step", False)]
    report = pg.check_denoiser(built, RNG.random((12, 12)), budget=30)
    assert any(f.kind == "gradient_step" for f in report.facts)
    assert pg.admissible("proximal_gradient", _blur_fidelity(), report).status == "proved"
    claim_report = pg.check_denoiser(claimed, RNG.random((12, 12)), budget=30)
    guarantee = pg.admissible("pgd", _blur_fidelity(), claim_report)
    assert guarantee.status == "conditional" and "the user's claim" in guarantee.assumptions[0]


def _blur_fidelity(shape=(12, 12), sigma=0.05):
    op = pg.Convolution(pg.gaussian_psf(5, 1.0), shape)
    return pg.LeastSquares(op, op(RNG.random(shape)), sigma=sigma)


def test_a_denoiser_without_potential_is_refused_on_the_potential_route():
    report = pg.check_denoiser(pg.WaveletShrinkage(sigma=0.05), RNG.random((16, 16)))
    with pytest.raises(pg.Refused, match="explicit potential"):
        pg.admissible("proximal_gradient", _blur_fidelity((16, 16)), report)


def test_descent_reaches_the_minimiser_of_a_quadratic_objective():
    # With N a linear average A, g(x) = ||(I - A) x||^2 / 2 and F = f + g is a convex
    # quadratic: its minimiser solves (H^T H / s^2 + (I - A)^T (I - A)) x = H^T y / s^2
    # (numpy.linalg.solve on the dense matrices).
    shape, noise = (10, 10), 0.2
    op = pg.Convolution(pg.gaussian_psf(3, 0.8), shape)
    y = op(RNG.random(shape)) + 0.01 * RNG.standard_normal(shape)
    fidelity = pg.LeastSquares(op, y, sigma=noise)
    denoiser = pg.gradient_step_denoiser(_Averaging(), 0.1)
    result = pg.reconstruct("proximal_gradient", fidelity, denoiser, max_iter=5000, tol=1e-10, check_budget=30)
    assert result.converged and not result.flags
    assert np.all(np.diff(result.objectives) <= 1e-12 * np.abs(result.objectives[:-1]))
    h = dense_matrix(op)
    # The box average as a matrix, from scipy.ndimage.uniform_filter (zero padding, /9).
    basis = np.eye(h.shape[1]).reshape(-1, *shape)
    average = np.stack([uniform_filter(b, size=3, mode="constant").ravel() for b in basis], axis=1)
    residual = np.eye(h.shape[1]) - average
    system = h.T @ h / noise**2 + residual.T @ residual
    exact = np.linalg.solve(system, h.T @ y.ravel() / noise**2).reshape(shape)
    assert np.abs(result.x - exact).max() < 1e-6
    # F at the end is F at the minimiser (objective evaluated independently in numpy)
    value = np.sum((h @ exact.ravel() - y.ravel()) ** 2) / (2 * noise**2) + 0.5 * np.sum((residual @ exact.ravel()) ** 2)
    assert result.objectives[-1] == pytest.approx(value, rel=1e-9)


def test_a_false_potential_claim_is_caught_with_a_reproducible_witness():
    # D(x) = 2 x is no gradient step on g(x) = ||x||^2 / 2 (that would be D = 0): the
    # proximal-gradient step then climbs g, no step size decreases F = f + g, and the
    # monitor says so with the two iterates.
    shape = (8, 8)
    op = pg.PixelMask(pg.random_pixel_mask(shape, 0.5, seed=3))
    fidelity = pg.LeastSquares(op, op(RNG.random(shape)), sigma=10.0)
    potential = lambda t: 0.5 * t.flatten(1).square().sum(1)  # noqa: E731
    liar = pg.with_potential(pg.as_denoiser(lambda t: 2.0 * t, name="doubler", backend="torch"), potential)
    result = pg.reconstruct("pgd", fidelity, liar, x0=RNG.random(shape), max_iter=5, check_budget=30)
    assert result.guarantee.status == "conditional"
    broken = [flag for flag in result.flags if flag.kind == "assumption_broken"]
    assert broken and "not a gradient step" in broken[0].message
    before, after = broken[0].witness
    f_before = fidelity.value(before.numpy()) + float(potential(before[None, None]).sum())
    f_after = fidelity.value(after.numpy()) + float(potential(after[None, None]).sum())
    assert f_after > f_before  # reproduced from the witness alone


def test_refusal_of_an_expansive_network_points_to_the_potential_route():
    expansive = pg.as_denoiser(lambda t: 1.5 * t, name="gain 1.5", backend="torch")
    report = pg.check_denoiser(expansive, RNG.random((12, 12)), budget=30)
    with pytest.raises(pg.Refused) as caught:
        pg.admissible("forward_backward", _blur_fidelity(), report)
    assert any("gradient_step_denoiser" in s and "proximal_gradient" in s for s in caught.value.suggestions)


def test_run_plot_shows_the_objective():
    fidelity = _blur_fidelity()
    result = pg.reconstruct("pgd", fidelity, pg.gradient_step_denoiser(_SmoothNet(), 0.1), max_iter=20,
                            check_budget=30, reference=RNG.random((12, 12)))
    figure = pg.plot_run(result)
    assert len(figure.axes) == 4  # residual, objective, PSNR, SSIM
    assert "objective" in figure.axes[1].get_title()
