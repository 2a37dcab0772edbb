"""Averagedness check against a zoo of maps whose constants are known exactly.

Exact values come from linear algebra (numpy.linalg.eigvalsh of the dense
symmetric matrix: theta = (1 - min h) / 2 when the spectrum lies in [-1, 1],
THEORY.md section 2) and from the definition of averaged maps
(Combettes & Yamada, J. Math. Anal. Appl. 425 (2015), Def. 1.1): for Q
orthogonal, (1 - t) I + t Q has theta = t, because ||(I - Q) a||^2 = 2 <a, (I - Q) a>.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.ndimage
import torch

import pnpguard as pg

N = 16
RNG = np.random.default_rng(42)
SAMPLE = RNG.random((N, N))
PERMUTATION = torch.from_numpy(RNG.permutation(N * N))


def _laplacian(z: torch.Tensor) -> torch.Tensor:
    return 4 * z - sum(torch.roll(z, s, d) for s in (1, -1) for d in (-1, -2))


def _gaussian(z: np.ndarray) -> np.ndarray:
    return scipy.ndimage.gaussian_filter(z, 1.0, mode="wrap")


def _permute(z: torch.Tensor) -> torch.Tensor:
    flat = z.reshape(*z.shape[:-2], -1)
    return flat[..., PERMUTATION].reshape(z.shape)


def _soft(z: torch.Tensor, t: float = 0.3) -> torch.Tensor:
    return torch.sign(z) * torch.clamp(z.abs() - t, min=0)


def _dense(f) -> np.ndarray:
    basis = torch.eye(N * N, dtype=torch.float64).reshape(N * N, 1, N, N)
    return f(basis).reshape(N * N, -1).T.numpy()


def _exact_linear_theta(f) -> float:
    matrix = _dense(f)
    assert np.allclose(matrix, matrix.T, atol=1e-12)  # symmetric by construction
    spectrum = np.linalg.eigvalsh(matrix)  # reference: numpy.linalg.eigvalsh
    assert spectrum.max() <= 1 + 1e-12 and spectrum.min() > -1
    return (1 - spectrum.min()) / 2


ORTHOGONAL = {
    "rotation": lambda z: torch.rot90(z, 1, dims=(-2, -1)),
    "permutation": _permute,
    "reflection": lambda z: torch.flip(z, dims=(-1,)),
}


@pytest.mark.parametrize("t", [0.3, 0.75])
@pytest.mark.parametrize("name", sorted(ORTHOGONAL))
def test_convex_combination_with_an_orthogonal_map(name, t):
    q = ORTHOGONAL[name]
    report = pg.check_denoiser(pg.as_denoiser(lambda z: (1 - t) * z + t * q(z), name=name), SAMPLE)
    assert report.verdict == "estimated"
    assert t * 0.98 <= report.theta <= t * 1.02
    assert report.lipschitz <= 1 + 1e-9


LINEAR = {
    "I - 0.1 laplacian": (lambda z: z - 0.1 * _laplacian(z), "torch"),
    "I - 0.2 laplacian": (lambda z: z - 0.2 * _laplacian(z), "torch"),
    "gaussian (scipy)": (_gaussian, "numpy"),
    "0.6 I + 0.4 gaussian": (lambda z: 0.6 * z + 0.4 * _gaussian(z), "numpy"),
}


def _torch_version(f, backend):
    if backend == "torch":
        return f
    return lambda z: torch.from_numpy(np.stack([f(img) for img in z.reshape(-1, N, N).numpy()]).reshape(z.shape))


@pytest.mark.parametrize("name", sorted(LINEAR))
def test_linear_symmetric_filters_match_their_spectrum(name):
    f, backend = LINEAR[name]
    exact = _exact_linear_theta(_torch_version(f, backend))
    denoiser = pg.as_denoiser(f, name=name, backend=backend)
    report = pg.check_denoiser(denoiser, SAMPLE)
    assert report.verdict == "estimated" and report.calls <= pg.DEFAULT_BUDGET
    # Required accuracy: within 2 % of the exact value, never more than 2 % below it.
    assert exact * 0.98 <= report.theta <= exact * 1.02, (report.theta, exact)
    assert report.witness.reproduce(denoiser) == pytest.approx(report.theta, rel=1e-9)


def test_differentiable_search_is_tighter():
    f = lambda z: z - 0.2 * _laplacian(z)  # noqa: E731
    exact = _exact_linear_theta(f)
    report = pg.check_denoiser(pg.as_denoiser(f, differentiable=True), SAMPLE)
    assert "autograd" in report.method
    assert exact * 0.995 <= report.theta <= exact * 1.005


def test_soft_thresholding_is_firmly_nonexpansive_and_attains_one_half():
    # Soft thresholding is the prox of t|.| (Bauschke & Combettes 2017, Example 24.20):
    # theta = 1/2, attained by any pair inside the dead zone.
    report = pg.check_denoiser(pg.as_denoiser(_soft), SAMPLE - 0.5)
    assert report.verdict == "estimated"
    assert 0.49 <= report.theta <= 0.51


def test_minus_identity_is_nonexpansive_but_not_averaged():
    report = pg.check_denoiser(pg.as_denoiser(lambda z: -z, name="minus identity"), SAMPLE)
    assert report.verdict == "refuted" and report.refuted == "averagedness"
    assert report.theta == pytest.approx(1.0)
    assert report.lipschitz == pytest.approx(1.0)
    assert report.nonexpansive


EXPANSIVE = {
    "sharpening with gain": lambda z: z + 0.5 * (z - torch.from_numpy(_gaussian_batch(z.numpy()))),
    "1.1 x soft thresholding": lambda z: 1.1 * _soft(z),
    "1.05 x identity": lambda z: 1.05 * z,
}


def _gaussian_batch(z: np.ndarray) -> np.ndarray:
    return np.stack([_gaussian(img) for img in z.reshape(-1, N, N)]).reshape(z.shape)


@pytest.mark.parametrize("name", sorted(EXPANSIVE))
def test_expansive_maps_are_refuted_with_a_witness_that_reproduces(name):
    denoiser = pg.as_denoiser(EXPANSIVE[name], name=name, backend="torch")
    report = pg.check_denoiser(denoiser, SAMPLE - 0.5)
    assert report.verdict == "refuted" and report.refuted == "nonexpansiveness"
    assert not report.nonexpansive
    witness = report.witnesses["lipschitz"]
    x, y = witness.arrays()
    assert isinstance(x, np.ndarray) and x.shape == (1, 1, N, N)
    # Reproduce the counterexample by hand: ||D x - D y|| > ||x - y||.
    expansion = np.linalg.norm(denoiser(x) - denoiser(y)) / np.linalg.norm(x - y)
    assert expansion == pytest.approx(report.lipschitz, rel=1e-9)
    assert expansion > 1.0 + 1e-6


class _DeclaredFilter(pg.Denoiser):
    """A linear filter with a verified spectrum fact (as a library denoiser would carry)."""

    def __init__(self, weight: float, declared_low: float):
        super().__init__(
            name="declared filter",
            facts=[pg.Fact.linear_symmetric((declared_low, 1.0), "test structure", verified=True)],
        )
        self.weight = weight

    def _denoise(self, t):
        return t - self.weight * _laplacian(t)


def test_verified_structure_is_proved_without_calls():
    # I - 0.1 laplacian has eigenvalues 1 - 0.1 * [0, 8] = [0.2, 1].
    report = pg.check_denoiser(_DeclaredFilter(0.1, 0.2), SAMPLE)
    assert report.verdict == "proved" and report.calls == 0
    assert report.theta == pytest.approx(0.4) and report.lipschitz == pytest.approx(1.0)
    assert report.witnesses == {}


def test_cross_check_confirms_true_structure_and_refutes_false_structure():
    honest = pg.check_denoiser(_DeclaredFilter(0.1, 0.2), SAMPLE, cross_check=True)
    assert honest.verdict == "proved" and honest.calls > 0
    # Declared spectrum [0.6, 1] (theta 0.2) but the map has eigenvalue 0.2 (theta 0.4).
    dishonest = pg.check_denoiser(_DeclaredFilter(0.1, 0.6), SAMPLE, cross_check=True)
    assert dishonest.verdict == "refuted"
    assert dishonest.theta > 0.39
    assert any("does not hold" in note for note in dishonest.notes)


def test_user_claims_are_recorded_not_trusted():
    # A claim the search contradicts beyond rounding is reported as refuted.
    denoiser = pg.as_denoiser(lambda z: z - 0.2 * _laplacian(z), claims=[("averaged", 0.5)])
    report = pg.check_denoiser(denoiser, SAMPLE)
    assert report.verdict == "refuted" and report.refuted == "claim"
    assert report.claims and not report.claims[0].verified
    assert any("contradicted" in note for note in report.notes)  # true theta is 0.8


def test_report_text_and_batch_samples():
    batch = torch.from_numpy(RNG.random((2, 1, N, N)))
    report = pg.check_denoiser(pg.as_denoiser(lambda z: 0.5 * z), batch, budget=60, seed=3)
    assert report.theta == pytest.approx(0.25)
    text = str(report)
    for word in ("ESTIMATED", "theta", "Lipschitz(D - I)", "denoiser calls", "lower bounds"):
        assert word in text
    assert isinstance(report.witness.arrays()[0], torch.Tensor)


def test_seed_reproduces_and_budget_is_respected():
    f = pg.as_denoiser(_gaussian, backend="numpy")
    first = pg.check_denoiser(f, SAMPLE, budget=50, seed=5)
    second = pg.check_denoiser(f, SAMPLE, budget=50, seed=5)
    assert first.theta == second.theta and first.calls <= 50


@pytest.mark.parametrize(
    "kwargs, error, message",
    [
        ({"budget": 5}, ValueError, "`budget` must be an integer >= 20"),
        ({"budget": 20.5}, TypeError, "`budget`"),  # not an integer: the shared rule of _validation
    ],
)
def test_bad_arguments(kwargs, error, message):
    with pytest.raises(error, match=message):
        pg.check_denoiser(lambda z: z, SAMPLE, **kwargs)


def test_bad_samples():
    with pytest.raises(ValueError, match="`sample` is empty"):
        pg.check_denoiser(lambda z: z, [])
    with pytest.raises(TypeError, match="`sample` has dtype int64"):
        pg.check_denoiser(lambda z: z, np.ones((4, 4), dtype=np.int64))
    with pytest.raises(ValueError, match="covers at most"):
        pg.check_denoiser(lambda z: z, [SAMPLE] * 5, budget=40)


# ------------------------------------------------- the library's own denoisers
def test_library_gaussian_smoothing_is_proved_with_its_exact_spectrum():
    denoiser = pg.GaussianSmoothing(1.2, shape=(N, N))
    report = pg.check_denoiser(denoiser, SAMPLE)
    assert report.verdict == "proved" and report.calls == 0
    # Reference: numpy.linalg.eigvalsh of the dense matrix of scipy's wrap-mode filter.
    exact = _exact_linear_theta(
        _torch_version(lambda z: scipy.ndimage.gaussian_filter(z, 1.2, mode="wrap"), "numpy")
    )
    assert report.theta == pytest.approx(exact, rel=1e-9)
    # The same map as a black box: the search lands within 2 % below the proof.
    blind = pg.check_denoiser(pg.as_denoiser(denoiser.apply, backend="torch"), SAMPLE)
    assert blind.verdict == "estimated" and 0.98 * exact <= blind.theta <= exact * (1 + 1e-9)


def test_library_prox_denoisers_are_proved_and_survive_a_cross_check():
    for denoiser in (pg.WaveletShrinkage(sigma=0.05, wavelet="haar"), pg.TotalVariation(sigma=0.05)):
        report = pg.check_denoiser(denoiser, SAMPLE, budget=60, cross_check=True)
        assert report.verdict == "proved", str(report)
        assert report.theta == 0.5 and report.calls > 0
        assert "consistent with the proof" in " ".join(report.notes)


def test_non_local_means_is_a_black_box():
    report = pg.check_denoiser(pg.NonLocalMeans(sigma=0.05), SAMPLE, budget=60)
    assert report.verdict in ("estimated", "refuted")
    assert not report.facts


def test_an_identity_like_denoiser_is_reported_as_such():
    report = pg.check_denoiser(pg.as_denoiser(lambda z: z.clone(), name="identity"), SAMPLE, budget=40)
    assert report.theta == 0.0 and report.verdict == "estimated"
    assert any("identity up to rounding" in note for note in report.notes)
