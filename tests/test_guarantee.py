"""Step-size guarantees: the formulas on worked numbers and against linear algebra."""

from __future__ import annotations

import math

import numpy as np
import pytest

import pnpguard as pg
from pnpguard.guarantee import _theorems as th
from tests.helpers import dense_matrix

RNG = np.random.default_rng(11)


def _report(theta, *, lipschitz=1.0, residual=None, verdict="proved", refuted=None):
    return pg.CheckReport(
        denoiser="test map",
        theta=theta,
        lipschitz=lipschitz,
        residual_lipschitz=2 * theta if residual is None else residual,
        verdict=verdict,
        refuted=refuted,
        witnesses={},
        calls=0,
        seconds=0.0,
        method="given",
    )


def _blur_fidelity(psf_sigma=0.5, noise=1.0, shape=(16, 16)):
    op = pg.Convolution(pg.gaussian_psf(5, psf_sigma), shape)
    return pg.LeastSquares(op, RNG.random(shape), sigma=noise)


def _mask_fidelity(shape=(16, 16)):
    op = pg.PixelMask(pg.random_pixel_mask(shape, 0.5, seed=1))
    return pg.LeastSquares(op, RNG.random(shape))


# ------------------------------------------------------------------ formulas
def test_two_firmly_nonexpansive_maps_compose_to_two_thirds():
    # Combettes & Yamada 2015, Prop. 2.4 (THEORY.md section 3): 1/2 and 1/2 give 2/3.
    assert th.composed_averagedness(0.5, 0.5) == pytest.approx(2 / 3)
    # Forward-backward with theta = 1/2 and step 1/L: b = 1/2, alpha = 2/3.
    assert th.forward_backward_averagedness(0.5, 1.0, 1.0) == pytest.approx(2 / 3)


def _averagedness_of_matrix(matrix: np.ndarray) -> float:
    """Smallest alpha with ||I - (I - T)/alpha||_2 <= 1 (bisection, numpy.linalg.norm 2-norm)."""
    identity = np.eye(len(matrix))
    low, high = 1e-6, 1.0
    for _ in range(60):
        mid = 0.5 * (low + high)
        if np.linalg.norm(identity - (identity - matrix) / mid, 2) <= 1 + 1e-12:
            high = mid
        else:
            low = mid
    return high


@pytest.mark.parametrize("seed", range(5))
def test_composition_formula_bounds_random_non_commuting_products(seed):
    # T1 = symmetric with spectrum in [1 - 2 a1, 1] (a1-averaged), T2 likewise; the product
    # is generally not symmetric. Its exact averagedness (from the definition, via the
    # 2-norm) never exceeds the Combettes-Yamada constant.
    rng = np.random.default_rng(seed)
    a1, a2 = rng.uniform(0.2, 0.9, size=2)
    maps = []
    for a in (a1, a2):
        q, _ = np.linalg.qr(rng.standard_normal((6, 6)))
        spectrum = rng.uniform(1 - 2 * a, 1, size=6)
        spectrum[0] = 1 - 2 * a
        maps.append(q @ np.diag(spectrum) @ q.T)
    exact = _averagedness_of_matrix(maps[0] @ maps[1])
    assert exact <= th.composed_averagedness(a1, a2) + 1e-9


def test_reflected_prox_lipschitz_matches_the_dense_reflection():
    op = pg.Convolution(pg.gaussian_psf(3, 0.6), (6, 6))
    matrix = dense_matrix(op)
    normal = matrix.T @ matrix
    eigen = np.linalg.eigvalsh(normal)
    mu, lipschitz = eigen.min(), eigen.max()
    for gamma in (0.1, 1.0 / math.sqrt(mu * lipschitz), 3.0):
        # Reference: the dense reflected prox 2 (I + gamma A^T A)^{-1} - I and numpy.linalg.norm.
        reflected = 2 * np.linalg.inv(np.eye(36) + gamma * normal) - np.eye(36)
        assert th.reflected_prox_lipschitz(gamma, mu, lipschitz) == pytest.approx(
            np.linalg.norm(reflected, 2), rel=1e-9
        )


def test_douglas_rachford_window_on_worked_numbers():
    # theta = 0.6: R_D is 1.4-Lipschitz, c = 1/1.4; mu = 1, L = 4.
    low, high = th.douglas_rachford_window(th.reflected_denoiser_lipschitz(0.6), 1.0, 4.0)
    c = 1 / 1.4
    assert low == pytest.approx((1 - c) / (1 + c)) and high == pytest.approx((1 + c) / ((1 - c) * 4))
    assert low == pytest.approx(1 / 6) and high == pytest.approx(1.5)
    # At both ends the product of Lipschitz constants is exactly 1.
    for edge in (low, high):
        assert 1.4 * th.reflected_prox_lipschitz(edge, 1.0, 4.0) == pytest.approx(1.0)
    # Nonempty iff ((1 - c) / (1 + c))^2 < mu / L: theta = 0.9 (c = 1/2.6) needs mu/L > 0.198.
    assert th.douglas_rachford_window(2.6, 0.19, 1.0) is None
    assert th.douglas_rachford_window(2.6, 0.2, 1.0) is not None


def test_forward_backward_contraction_window_on_worked_numbers():
    # Ryu et al. 2019, Thm. 1 with eps = 0.1, mu = 1, L = 2: (1/11, 1 - 1/22).
    low, high = th.forward_backward_contraction_window(0.1, 1.0, 2.0)
    assert low == pytest.approx(1 / 11) and high == pytest.approx(1 - 1 / 22)
    for edge in (low, high):
        assert th.forward_backward_contraction(0.1, edge, 1.0, 2.0) == pytest.approx(1.0)
    # Exists iff eps < 2 mu / (L - mu) = 2.
    assert th.forward_backward_contraction_window(2.01, 1.0, 2.0) is None
    assert th.forward_backward_contraction_window(1.99, 1.0, 2.0) is not None


# ---------------------------------------------------------------- admissible
def test_forward_backward_averaged_route_proved():
    fidelity = _mask_fidelity()
    guarantee = pg.admissible("forward_backward", fidelity, _report(0.5))
    lipschitz = fidelity.lipschitz
    assert lipschitz == pytest.approx(1.0)
    assert guarantee.route == "averaged" and guarantee.status == "proved"
    assert guarantee.step == pytest.approx(1 / lipschitz)
    assert guarantee.step_interval == pytest.approx((0.0, 2 / lipschitz))
    assert guarantee.constant == pytest.approx(2 / 3)
    assert guarantee.relaxation_interval == pytest.approx((0.0, 1.5))
    # Another step: b = 0.9, alpha = (0.5 + 0.9 - 0.9) / (1 - 0.45).
    kind, alpha = guarantee.map_constant(1.8, 1.0)
    assert kind == "averaged" and alpha == pytest.approx(0.5 / 0.55)
    with pytest.raises(pg.Refused, match="outside the admissible interval"):
        guarantee.map_constant(2.0, 1.0)
    with pytest.raises(pg.Refused, match="relaxation"):
        guarantee.map_constant(1.0, 1.6)


def test_estimated_constants_are_inflated_and_conditional():
    guarantee = pg.admissible("forward_backward", _mask_fidelity(), _report(0.6, verdict="estimated"), margin=0.1)
    assert guarantee.status == "conditional"
    assert guarantee.theta == pytest.approx(0.66)
    assert any("estimates" in text for text in guarantee.assumptions)


def test_forward_backward_with_a_nonexpansive_denoiser_needs_relaxation_below_one():
    report = _report(1.0, lipschitz=1.0, residual=2.0, verdict="refuted", refuted="averagedness")
    guarantee = pg.admissible("forward_backward", _mask_fidelity(), report)
    assert guarantee.route == "nonexpansive"
    assert guarantee.relaxation_interval == (0.0, 1.0) and 0 < guarantee.relaxation < 1


def test_douglas_rachford_firm_route_any_gamma():
    for algorithm in ("douglas_rachford", "admm"):
        guarantee = pg.admissible(algorithm, _mask_fidelity(), _report(0.5))
        assert guarantee.route == "firmly nonexpansive"
        assert guarantee.step_interval == (0.0, math.inf)
        assert guarantee.relaxation_interval == (0.0, 2.0)


def test_douglas_rachford_strongly_convex_route():
    fidelity = _blur_fidelity()
    mu, lipschitz = fidelity.strong_convexity, fidelity.lipschitz
    assert mu > 0
    guarantee = pg.admissible("douglas_rachford", fidelity, _report(0.6, residual=1.2))
    assert guarantee.route == "strongly convex" and guarantee.map_kind == "contraction"
    expected = th.douglas_rachford_window(1.4, mu, lipschitz)
    assert guarantee.step_interval == pytest.approx(expected)
    gamma = 1 / lipschitz if expected[0] < 1 / lipschitz < expected[1] else 1 / math.sqrt(mu * lipschitz)
    assert guarantee.step == pytest.approx(gamma)
    # Just outside the window: refused.
    with pytest.raises(pg.Refused):
        guarantee.map_constant(expected[1] * 1.001, 1.0)
    kind, factor = guarantee.map_constant(expected[1] * 0.999, 1.0)
    assert kind == "contraction" and factor < 1


def test_douglas_rachford_refuses_on_a_null_space_with_computed_suggestions():
    with pytest.raises(pg.Refused) as caught:
        pg.admissible("admm", _mask_fidelity(), _report(0.8, verdict="estimated"))
    refusal = caught.value
    assert any("null space" in reason for reason in refusal.reasons)
    text = "\n".join(refusal.suggestions)
    assert "switch to forward_backward" in text
    # theta 0.8 * 1.05 = 0.84; relaxation s = floor(1000 * 0.5 / 0.84) / 1000 = 0.595.
    assert "relaxed(denoiser, 0.595)" in text and refusal.relaxed_factor == 0.595


def test_expansive_denoiser_is_refused_and_relaxation_is_not_offered():
    report = _report(math.inf, lipschitz=1.1, residual=0.1, verdict="refuted", refuted="nonexpansiveness")
    with pytest.raises(pg.Refused) as caught:
        pg.admissible("forward_backward", _mask_fidelity(), report)
    assert "expansive" in caught.value.reasons[0]
    assert any("relaxing the denoiser cannot repair" in s for s in caught.value.suggestions)


def test_residual_route_for_forward_backward_with_strong_convexity():
    fidelity = _blur_fidelity(psf_sigma=0.4)
    mu, lipschitz = fidelity.strong_convexity, fidelity.lipschitz
    eps = 0.5 * 2 * mu / (lipschitz - mu)
    report = _report(math.inf, lipschitz=1 + eps, residual=eps, verdict="proved")
    guarantee = pg.admissible("forward_backward", fidelity, report)
    assert guarantee.route == "residual contraction"
    assert guarantee.step_interval == pytest.approx(th.forward_backward_contraction_window(eps, mu, lipschitz))
    assert guarantee.constant < 1


def test_bad_arguments_are_named():
    with pytest.raises(ValueError, match=r"valid: 'admm', 'douglas_rachford', 'dr', 'fb', 'forward_backward'"):
        pg.admissible("gradient", _mask_fidelity(), _report(0.5))
    with pytest.raises(ValueError, match="`margin`"):
        pg.admissible("admm", _mask_fidelity(), _report(0.5), margin=2)
    with pytest.raises(TypeError, match="`report`"):
        pg.admissible("admm", _mask_fidelity(), 0.5)


def test_guarantee_text_names_the_theorem():
    text = str(pg.admissible("forward_backward", _mask_fidelity(), _report(0.5)))
    assert "Combettes & Yamada" in text and "PROVED" in text


# ------------------------------------------------------------ routes as data
def test_every_algorithm_has_routes_and_every_route_names_known_algorithms():
    from pnpguard.guarantee import ROUTES
    from pnpguard.guarantee._routes import find_route, routes_for
    from pnpguard.splitting import ALGORITHMS

    for name in ALGORITHMS:
        assert routes_for(name)
    for route in ROUTES:
        assert set(route.algorithms) <= set(ALGORITHMS)
    with pytest.raises(ValueError, match="no theorem route covers"):
        routes_for("gradient_descent")
    with pytest.raises(ValueError, match=r"`route` must be one of"):
        find_route("averaged", "douglas_rachford")


def test_a_new_route_is_one_record():
    # A toy theorem (not shipped): any denoiser with theta < 0.9 admits forward-backward
    # with step 1/(2L) and relaxation 1/2, the map being 0.9-averaged. It only has to be
    # added to the table; admissible(), map_constant and the printout follow.
    from pnpguard.guarantee import ROUTES, IterationMap, Route, Window

    toy = Route(
        name="toy",
        algorithms=("forward_backward",),
        theorem="toy theorem for the test",
        applies=lambda c, algorithm: Window(0.5 / c.lipschitz, (0.0, 1.0 / c.lipschitz), 0.5)
        if c.theta < 0.9
        else "toy route: needs theta < 0.9",
        iteration_map=lambda c, step: IterationMap("averaged", 0.9, (0.0, 1.0)),
        relaxed=lambda relaxation, constant: relaxation * constant,
    )
    fidelity = _mask_fidelity()
    guarantee = pg.admissible("forward_backward", fidelity, _report(0.95), routes=(toy, *ROUTES))
    assert guarantee.route == "averaged"  # the toy route does not apply at theta 0.95
    guarantee = pg.admissible("forward_backward", fidelity, _report(0.5), routes=(toy, *ROUTES))
    assert guarantee.route == "toy" and guarantee.step == pytest.approx(0.5 / fidelity.lipschitz)
    assert guarantee.map_constant(guarantee.step, 0.5) == ("averaged", pytest.approx(0.45))
    assert "toy theorem" in str(guarantee)
    with pytest.raises(pg.Refused, match="toy route: needs theta < 0.9"):
        pg.admissible("forward_backward", fidelity, _report(1.5, lipschitz=1.2, verdict="refuted",
                                                            refuted="nonexpansiveness"), routes=(toy,))


def test_algorithms_answer_to_their_short_names():
    from pnpguard.splitting import algorithm

    assert algorithm("fb").name == "forward_backward" and algorithm("dr").name == "douglas_rachford"
    guarantee = pg.admissible("dr", _mask_fidelity(), _report(0.5))
    assert guarantee.algorithm == "douglas_rachford"


# ------------------------------------------------------------ claims stand unless refuted
def _box_projection(x):
    return np.clip(x, 0.0, 1.0)


def _soft_threshold(x):
    return np.sign(x) * np.maximum(np.abs(x) - 0.05, 0.0)


@pytest.mark.parametrize("function", [_box_projection, _soft_threshold])
def test_an_unrefuted_claim_stands_and_the_margin_does_not_override_it(function):
    # A projection onto a box and soft thresholding are proximal operators (of an
    # indicator and of t ||.||_1), hence firmly nonexpansive: theta = 1/2 exactly
    # (Bauschke & Combettes 2017, Prop. 12.28). The search finds 0.5; the 5 % margin
    # would make it 0.525 and refuse Douglas-Rachford on a mask (mu = 0, needs 1/2).
    shape = (24, 24)
    truth = np.zeros(shape)
    truth[RNG.random(shape) < 0.1] = 1.0
    op = pg.Convolution(pg.gaussian_psf(5, 1.0), shape)
    sample = op(truth)
    claimed = pg.as_denoiser(function, claims=["proximal"], backend="numpy")
    report = pg.check_denoiser(claimed, sample, budget=60)
    assert report.verdict == "estimated" and report.theta <= 0.5 + 1e-6
    guarantee = pg.admissible("douglas_rachford", _mask_fidelity(shape), report)
    assert guarantee.route == "firmly nonexpansive" and guarantee.status == "conditional"
    assert any("the user's claim" in text for text in guarantee.assumptions)
    unclaimed = pg.check_denoiser(pg.as_denoiser(function, backend="numpy"), sample, budget=60)
    with pytest.raises(pg.Refused):  # without the claim the margin applies
        pg.admissible("douglas_rachford", _mask_fidelity(shape), unclaimed)


def test_zero_strong_convexity_up_to_rounding_is_printed_as_zero():
    fidelity = _mask_fidelity()
    report = _report(0.9, residual=3.0)
    with pytest.raises(pg.Refused) as caught:
        pg.admissible("douglas_rachford", fidelity, report)
    text = str(caught.value)
    assert "mu = 0" in text and "e-1" not in text


def test_lower_strength_is_suggested_only_where_a_lower_strength_exists():
    from dataclasses import replace

    refused = _report(1.5, lipschitz=1.2, residual=2.0, verdict="refuted", refuted="nonexpansiveness")
    cases = [(None, 0.0, False), (0.02, 0.0, True), (0.02, 0.02, False)]  # callable; TV-like; network at its floor
    for sigma, lowest, expected in cases:
        with pytest.raises(pg.Refused) as caught:
            pg.admissible("forward_backward", _mask_fidelity(), replace(refused, sigma=sigma, lowest_sigma=lowest))
        assert any("lower the denoiser strength" in s for s in caught.value.suggestions) == expected


def test_estimated_constants_are_labelled_with_the_margin():
    report = _report(1.0, lipschitz=1.1, residual=3.0, verdict="estimated")
    with pytest.raises(pg.Refused) as caught:
        pg.admissible("forward_backward", _blur_fidelity(), report)
    text = str(caught.value)
    assert "5 % safety margin applied: 1.05" in text
    assert "Lipschitz(D - I) = 3.15 (estimate incl. 5 % margin)" in text
