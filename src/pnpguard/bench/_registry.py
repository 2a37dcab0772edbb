"""The denoisers shipped with pnpguard, by name, with factories.

Each entry builds a :class:`~pnpguard.Denoiser` from one number, its
*strength*, and the image shape. For most denoisers the strength is the noise
level in intensity units; for Gaussian smoothing it is the kernel width in
pixels. The benchmark suite runs every entry with every PnP algorithm, and the
command line resolves denoiser names here.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

from .._validation import image_shape, positive_number, unknown_message
from ..denoisers import (
    Denoiser,
    GaussianSmoothing,
    NonLocalMeans,
    TotalVariation,
    WaveletShrinkage,
)
from ..learned import averaged_cnn, gradient_step_cnn, lab_gradient_step_cnn, residual_cnn

Shape = tuple[int, int]


@dataclass(frozen=True)
class ShippedDenoiser:
    """A shipped denoiser and how to build it.

    Attributes
    ----------
    name : str
        Registry name.
    description : str
        One line for listings.
    strength : str
        What the strength number means.
    default_strength : float
        Used when none is given (command-line checks).
    grid : tuple of float
        Strengths the tuning script tries (increasing).
    structure : {"proved", "black box"}
        ``"proved"``: the denoiser carries verified facts, so its check is a
        proof and costs no denoiser calls. ``"black box"``: its constants are
        estimated by the pair search of :func:`pnpguard.check_denoiser`.
    build : callable
        ``build(strength, shape) -> Denoiser``.
    first_phase : float or None
        For descent runs (the potential route) on forward models other than
        masks: a first phase at this larger strength, whose result starts the
        run at the tuned strength (strength annealing, common practice; the
        guarantee covers the second phase from that start). None: no phase.
    """

    name: str
    description: str
    strength: str
    default_strength: float
    grid: tuple[float, ...]
    structure: str
    build: Callable[[float, Shape], Denoiser]
    first_phase: float | None = None

    def make(self, strength: float, shape: Shape) -> Denoiser:
        """Build the denoiser at ``strength`` (a positive number) for images of ``shape``."""
        return self.build(positive_number(strength, "strength"), image_shape(shape, "shape"))


#: Strengths tried when tuning: a geometric grid from 1e-4 to 0.1, ratio 10^(1/5).
#: Inside PnP forward-backward at step 1/L the denoiser acts as the proximal
#: step of the regulariser scaled by that step, so the best strengths are far
#: below the data's noise level (1e-4 to 1e-2 on our tasks).
_STRENGTH_GRID = tuple(round(10.0 ** (k / 5), 6) for k in range(-20, -4))

#: Noise levels tried for the gradient-step network (its trained range ends at 55/255).
_NOISE_GRID = (0.005, 0.0075, 0.01, 0.015, 0.02, 0.03, 0.04, 0.06, 0.08, 0.11, 0.15, 0.2)


def _gradient_step(strength: float, shape: Shape) -> Denoiser:
    """The gradient-step network at noise level ``strength`` with weight ``1 / strength^2``.

    By Tweedie's formula a denoiser at noise level ``s`` has ``x - D(x) = s^2 grad(-log p_s)``,
    so ``g / s^2`` stands for ``-log p_s`` and ``F = f + g / s^2`` is the maximum-a-posteriori
    objective with the data term ``f = ||A x - y||^2 / (2 sigma^2)`` (Efron, JASA 106 (2011)
    1602-1614, for Tweedie's formula; the scaling is our reading of it).
    """
    return gradient_step_cnn(strength, weight=1.0 / strength**2)


def _lab_gradient_step(strength: float, shape: Shape) -> Denoiser:
    """The gradient-step network fine-tuned on the lab's frames, weight ``1 / strength^2``
    (as :func:`_gradient_step`)."""
    return lab_gradient_step_cnn(strength, weight=1.0 / strength**2)


_REGISTRY: dict[str, ShippedDenoiser] = {
    entry.name: entry
    for entry in (
        ShippedDenoiser(
            "gaussian",
            "Gaussian smoothing, periodic (linear symmetric; spectrum computed)",
            "kernel width in pixels",
            0.8,
            (0.1, 0.15, 0.2, 0.25, 0.3, 0.4, 0.5, 0.65, 0.8, 1.0, 1.3),
            "proved",
            lambda s, shape: GaussianSmoothing(s, shape=shape, name="gaussian"),
        ),
        ShippedDenoiser(
            "wavelet",
            "soft thresholding in a db4 basis, 2x2 cycle spinning (a proximal operator)",
            "noise level",
            0.02,
            _STRENGTH_GRID,
            "proved",
            lambda s, shape: WaveletShrinkage(sigma=s, cycle_spins=2, name="wavelet"),
        ),
        ShippedDenoiser(
            "tv",
            "total-variation denoising (an inexact proximal operator)",
            "noise level",
            0.02,
            _STRENGTH_GRID,
            "proved",
            lambda s, shape: TotalVariation(sigma=s, name="tv"),
        ),
        ShippedDenoiser(
            "nlm",
            "non-local means (scikit-image; no known facts)",
            "noise level",
            0.05,
            _STRENGTH_GRID,
            "black box",
            lambda s, shape: NonLocalMeans(sigma=s, name="nlm"),
        ),
        ShippedDenoiser(
            "residual-cnn",
            "DnCNN-style residual CNN with a noise-level input (shipped weights; no known facts)",
            "noise level",
            0.02,
            _STRENGTH_GRID,
            "black box",
            lambda s, shape: residual_cnn(s),
        ),
        ShippedDenoiser(
            "averaged-cnn",
            "CNN averaged by construction, theta = 0.9 (layer norms re-proved on loading)",
            "noise level",
            0.02,
            _STRENGTH_GRID,
            "proved",
            lambda s, shape: averaged_cnn(s, theta=0.9),
        ),
        ShippedDenoiser(
            "averaged-cnn-firm",
            "the same CNN at theta = 0.5: firmly nonexpansive, so Douglas-Rachford and ADMM apply",
            "noise level",
            0.02,
            _STRENGTH_GRID,
            "proved",
            lambda s, shape: averaged_cnn(s, theta=0.5),
        ),
        ShippedDenoiser(
            "gradient-step-cnn",
            "gradient-step network D = I - grad g, g computable (shipped weights; structure verified, "
            "weight 1 / strength^2 for the potential route)",
            "noise level",
            0.04,
            _NOISE_GRID,
            "black box",
            _gradient_step,
            first_phase=0.15,
        ),
        ShippedDenoiser(
            "gradient-step-lab",
            "the gradient-step network fine-tuned on the lab's kinds of frames as well (fresh phantom "
            "draws, seeds disjoint from the benchmark's; weight 1 / strength^2)",
            "noise level",
            0.04,
            _NOISE_GRID,
            "black box",
            _lab_gradient_step,
            first_phase=0.15,
        ),
    )
}


def shipped_denoisers() -> tuple[ShippedDenoiser, ...]:
    """Every shipped denoiser, in registry order."""
    return tuple(_REGISTRY.values())


def denoiser_names() -> tuple[str, ...]:
    """Names accepted by :func:`get_denoiser`, in registry order."""
    return tuple(_REGISTRY)


def get_denoiser(name: str) -> ShippedDenoiser:
    """The registry entry called ``name``.

    Raises
    ------
    ValueError
        If ``name`` is unknown (the message lists the valid names and the closest).
    """
    if name not in _REGISTRY:
        raise ValueError(unknown_message("shipped denoiser", name, _REGISTRY))
    return _REGISTRY[name]
