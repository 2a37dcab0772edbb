"""Learned networks as :class:`~pnpguard.denoisers.Denoiser` objects, shipped or your own."""

from __future__ import annotations

import hashlib
import math
import warnings
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from pathlib import Path

import torch
from torch import nn

from .._validation import nonnegative_number, number, number_in, positive_number
from ..denoisers._base import Denoiser
from ..denoisers._facts import ClaimLike, Fact, as_claim
from ..denoisers._frozen import FrozenNetwork
from ..denoisers._potential import GradientStepDenoiser, ModulePotential
from ._architectures import BY_CLASS_NAME
from ._averaged import AveragedCNN, LayerBounds
from ._gradient_step import GradientStepNetwork
from ._weights import read_weights

#: Folder of the weights shipped with the package.
WEIGHTS_DIR = Path(__file__).resolve().parent / "weights"
RESIDUAL_WEIGHTS = WEIGHTS_DIR / "residual_cnn.pt"
AVERAGED_WEIGHTS = WEIGHTS_DIR / "averaged_cnn.pt"
GRADIENT_STEP_WEIGHTS = WEIGHTS_DIR / "gradient_step_cnn.pt"
#: The gradient-step network fine-tuned on the lab's kinds of frames as well.
GRADIENT_STEP_LAB_WEIGHTS = WEIGHTS_DIR / "gradient_step_lab.pt"

#: Architectures that predict the noise and carry no facts.
_RESIDUAL_FAMILY = ("MultiscaleResidualCNN", "ResidualCNN")

# Layer bounds recomputed in this process, keyed by a hash of the weights
# they were computed from (never read from a file).
_BOUNDS_CACHE: dict[str, LayerBounds] = {}


class LearnedDenoiser(Denoiser):
    """A torch network ``f(noisy, sigma, **options)`` presented as a Denoiser.

    Handles the layouts ``(H, W)`` and ``(N, C, H, W)`` (channels are denoised
    separately), runs the network in its weights' precision on the input's
    device (a float64 input is cast to float32 once and the output cast back:
    :meth:`precision`; the check and the monitor allow for float32 rounding),
    and is differentiable (``apply_traced``). The check probes it at the input's
    precision (:meth:`at_input_precision`), so rounding cannot hide an expansion.

    Parameters
    ----------
    module : torch.nn.Module
        Called as ``module(noisy, sigma, **options)`` on ``(N, C, H, W)``
        tensors; it must return a tensor of the same shape. It is copied, so
        later changes to ``module`` do not affect the denoiser.
    name : str
        Short name for reports.
    sigma : float
        Noise level passed to the network, in intensity units.
    options : dict, optional
        Extra keyword arguments of the call (for example ``{"theta": 0.9}``).
    facts : iterable of Fact, optional
        What is known about the map.
    lowest_sigma : float, optional
        Lowest noise level the network accepts (its trained range starts there).
    """

    def __init__(
        self,
        module: nn.Module,
        *,
        name: str,
        sigma: float,
        options: dict[str, float] | None = None,
        facts: Iterable[Fact] = (),
        lowest_sigma: float = 0.0,
    ) -> None:
        self._network = FrozenNetwork(module)
        super().__init__(name=name, sigma=positive_number(sigma, "sigma"), differentiable=True, facts=facts)
        self._options = dict(options or {})
        self.lowest_sigma = nonnegative_number(lowest_sigma, "lowest_sigma")
        self._input_precision = False

    @property
    def module(self) -> nn.Module:
        """The wrapped network (float32 copy, evaluation mode)."""
        return self._network.module

    def precision(self, dtype: torch.dtype) -> torch.dtype:
        """The weights' dtype, whatever the input's (the input's inside :meth:`at_input_precision`)."""
        return dtype if self._input_precision else self._network.dtype

    @contextmanager
    def at_input_precision(self) -> Iterator[None]:
        """Run a copy of the network in the input's dtype within the block (the check's probes)."""
        previous, self._input_precision = self._input_precision, True
        try:
            yield
        finally:
            self._input_precision = previous

    def _denoise(self, t: torch.Tensor) -> torch.Tensor:
        # Cast once in (a copy either way, so that a network writing into its input cannot
        # change the caller's data), computed in the weights' precision, cast back once.
        batch = t[None, None] if t.ndim == 2 else t
        compute = self.precision(t.dtype)
        network = self._network.like(t) if self._input_precision else self._network.on(t.device)
        batch = batch.clone() if batch.dtype == compute else batch.to(compute)
        out = network(batch, self.sigma, **self._options).to(t.dtype)
        return out[0, 0] if t.ndim == 2 else out


def _weights_hash(module: nn.Module) -> str:
    digest = hashlib.sha256()
    for name, tensor in sorted(module.state_dict().items()):
        digest.update(name.encode())
        digest.update(tensor.detach().cpu().contiguous().numpy().tobytes())
    return digest.hexdigest()


def verified_layer_bounds(model: AveragedCNN) -> LayerBounds:
    """Per-layer norm bounds of ``model``'s nonexpansive part, computed from its weights.

    The result is recomputed from the weights (exact circular norms on a
    128 x 128 frequency grid, widened to all image sizes; see
    :func:`conv_norm_bound`) and memoised in this process under a SHA-256
    hash of the weights, so a changed weight is always re-verified.
    """
    if not isinstance(model, AveragedCNN):
        raise TypeError(f"`model` must be an AveragedCNN, got {type(model).__name__}")
    key = _weights_hash(model)
    if key not in _BOUNDS_CACHE:
        _BOUNDS_CACHE[key] = model.layer_bounds()
    return _BOUNDS_CACHE[key]


def load_network(path: str | Path) -> nn.Module:
    """Build the network stored in a weights file (see :func:`train_denoiser`).

    Parameters
    ----------
    path : str or pathlib.Path
        A weights file.

    Returns
    -------
    torch.nn.Module
        A :class:`ResidualCNN`, :class:`MultiscaleResidualCNN` or
        :class:`AveragedCNN` in evaluation mode.

    Raises
    ------
    ValueError
        If the file is not a pnpguard weights file, names an unknown
        architecture, or its tensors do not fit the architecture.
    """
    return _load(path)[0]


def _load(path: str | Path, expected: tuple[str, ...] | None = None) -> tuple[nn.Module, dict]:
    payload = read_weights(path)
    architecture = payload["architecture"]
    if architecture not in BY_CLASS_NAME:
        raise ValueError(
            f"`path` {str(path)!r} holds architecture {architecture!r}; "
            f"known: {sorted(BY_CLASS_NAME)}"
        )
    if expected is not None and architecture not in expected:
        raise ValueError(f"`weights` {str(path)!r} holds a {architecture}, not a {' or '.join(expected)}")
    config = dict(payload["config"])
    if architecture == "ResidualCNN":
        # Files written before the option existed were initialised by torch's default.
        config.setdefault("initialisation", "torch-default")
    try:
        model = BY_CLASS_NAME[architecture].network(**config)
        model.load_state_dict(payload["state_dict"], strict=True)
    except (TypeError, RuntimeError) as error:
        raise ValueError(f"`path` {str(path)!r} does not fit {architecture}: {error}") from error
    return model.eval(), payload["training"]


def _check_trained_sigma(sigma: float, training: dict) -> float:
    sigma = positive_number(sigma, "sigma")
    low, high = training.get("noise_range", (0.0, math.inf))
    if not low <= sigma <= high * (1 + 1e-9):
        raise ValueError(
            f"`sigma` = {sigma:g} is outside the noise range the network was trained on, "
            f"[{low:g}, {high:g}] (i.e. [{low * 255:.3g}, {high * 255:.3g}]/255)"
        )
    return sigma


def _lowest_trained_sigma(training: dict) -> float:
    return float(training.get("noise_range", (0.0, math.inf))[0])


def residual_cnn(sigma: float, *, weights: str | Path | None = None) -> LearnedDenoiser:
    r"""The shipped residual CNN denoiser, set to noise level ``sigma``.

    Parameters
    ----------
    sigma : float
        Noise standard deviation in intensity units (images in [0, 1]: for
        example ``25 / 255``); within the trained range [0, 55/255].
    weights : str or pathlib.Path, optional
        A weights file of a :class:`ResidualCNN` or a
        :class:`MultiscaleResidualCNN` (from :func:`train_denoiser`); default:
        the shipped weights.

    Returns
    -------
    LearnedDenoiser
        Differentiable; carries no facts (nothing is known about its
        Lipschitz constant; measure it with the library's estimators).

    Raises
    ------
    ValueError
        If ``sigma`` is outside the trained range or the file holds another
        architecture.

    Notes
    -----
    ``D(y) = y - R([y, \sigma])``. The shipped ``R`` is a
    :class:`MultiscaleResidualCNN` (residual blocks at four resolutions,
    widths 16, 32, 64, 64); a file of your own may hold a plain
    :class:`ResidualCNN` stack instead. The training record
    (images, time, held-out PSNR) is ``weights/record.json`` beside the
    shipped file.

    Examples
    --------
    >>> import numpy as np
    >>> from pnpguard.phantoms import natural_image
    >>> from pnpguard.learned import residual_cnn
    >>> frame = natural_image("camera")[:64, :64]
    >>> noisy = frame + 0.1 * np.random.default_rng(0).standard_normal(frame.shape)
    >>> denoised = residual_cnn(0.1)(noisy)
    >>> bool(np.mean((denoised - frame) ** 2) < np.mean((noisy - frame) ** 2))
    True
    """
    path = Path(weights) if weights is not None else RESIDUAL_WEIGHTS
    model, training = _load(path, _RESIDUAL_FAMILY)
    sigma = _check_trained_sigma(sigma, training)
    return LearnedDenoiser(model, name="residual CNN", sigma=sigma, lowest_sigma=_lowest_trained_sigma(training))


def averaged_cnn(
    sigma: float,
    *,
    theta: float | None = None,
    gain: float = 1.0,
    weights: str | Path | None = None,
) -> LearnedDenoiser:
    r"""The shipped averaged CNN denoiser ``D = (1 - theta) I + theta N``.

    The averagedness is proved on loading: the norm bound of every
    convolution of ``N`` is recomputed from the stored weights, and the fact
    "``D`` is theta-averaged" is attached (``verified=True``) only when their
    product is at most 1.

    Parameters
    ----------
    sigma : float
        Noise standard deviation in intensity units, within the trained range.
    theta : float, optional
        Averagedness constant, within the trained range (shipped: [0.5, 0.95]).
        Default: the default theta recorded in the weights file
        (``train_denoiser(..., default_theta=...)``; shipped: 0.9).
    gain : float, optional
        Gain on the mean-free network part,
        ``D = (1 - theta) I + theta (P + gain (I - P) M (I - P))``. The
        default 1 keeps the guarantee. ``gain > 1`` trades it for quality:
        the network part may then expand distances, so the denoiser carries no
        fact at all and a guarded run needs the check to estimate its
        constants (it will usually refuse). Allowed range [1, 2].
    weights : str or pathlib.Path, optional
        A weights file of an :class:`AveragedCNN`; default: the shipped weights.

    Returns
    -------
    LearnedDenoiser
        Differentiable, with a verified ``Fact(kind="averaged")`` when
        ``gain = 1`` and the bound holds; without it (and with a
        :class:`UserWarning` when the bound fails) otherwise.

    Raises
    ------
    ValueError
        If ``sigma`` or ``theta`` is outside the trained range, ``gain`` is
        outside [1, 2], ``theta`` is omitted and the file records no default,
        or the file holds another architecture.

    Notes
    -----
    With :math:`L_C = \prod_l \|W_l\|` (each bound valid for every image size,
    see :func:`conv_norm_bound`) and 1-Lipschitz activations, the network
    ``C`` is :math:`L_C`-Lipschitz; ``M = a I + (1 - a) C`` and
    ``N = P + (I - P) M (I - P)`` (``P``: the image mean, see
    :class:`AveragedCNN`) are nonexpansive when :math:`L_C \le 1`. Then ``D``
    is theta-averaged by definition (Combettes & Yamada 2015, Def. 1.1),
    ``D`` is 1-Lipschitz (with equality for constant perturbations, which
    ``D`` passes unchanged) and ``D - I = \theta (N - I)`` is
    :math:`2 \theta`-Lipschitz. These hold in exact arithmetic; the
    float32 evaluation adds rounding of relative size about 1e-7.

    With a gain :math:`g > 1`, ``D`` is only known to be
    :math:`(1 - \theta + \theta g)`-Lipschitz, a bound above 1, so no
    averagedness (not even nonexpansiveness) follows and none is claimed.

    References
    ----------
    .. [1] P. L. Combettes and I. Yamada, J. Math. Anal. Appl. 425 (2015)
       55-70. doi:10.1016/j.jmaa.2014.11.044
    .. [2] H. Sedghi, V. Gupta and P. M. Long, "The singular values of
       convolutional layers", ICLR 2019.
    """
    path = Path(weights) if weights is not None else AVERAGED_WEIGHTS
    model, training = _load(path, ("AveragedCNN",))
    sigma = _check_trained_sigma(sigma, training)
    if theta is None:
        if "default_theta" not in training:
            raise ValueError(f"`theta` is required: {str(path)!r} records no default theta")
        theta = training["default_theta"]
    theta = number(theta, "theta")
    low, high = model.theta_range
    if not low <= theta <= high:
        raise ValueError(f"`theta` = {theta!r} is outside the range the network was trained for, [{low:g}, {high:g}]")
    gain = number_in(gain, "gain", 1.0, 2.0)
    if gain == 1.0:
        return LearnedDenoiser(
            model,
            name=f"averaged CNN (theta={theta:g})",
            sigma=sigma,
            options={"theta": float(theta)},
            facts=averaged_facts(model, float(theta)),
            lowest_sigma=_lowest_trained_sigma(training),
        )
    return LearnedDenoiser(
        model,
        name=f"widened CNN (theta={theta:g}, gain={gain:g})",
        sigma=sigma,
        options={"theta": float(theta), "gain": float(gain)},
        lowest_sigma=_lowest_trained_sigma(training),
    )


def averaged_facts(model: AveragedCNN, theta: float) -> tuple[Fact, ...]:
    """The verified averagedness fact of ``(1 - theta) I + theta N``, or nothing.

    Returns an empty tuple, with a :class:`UserWarning`, when the recomputed
    layer bounds do not prove that ``N`` is nonexpansive.
    """
    bounds = verified_layer_bounds(model)
    listed = ", ".join(f"{b:.6f}" for b in bounds.bounds)
    if not bounds.nonexpansive:
        warnings.warn(
            f"the layer norm bounds of the averaged network multiply to {bounds.lipschitz:.6g} > 1 "
            f"(bounds: {listed}); no averagedness is claimed",
            UserWarning,
            stacklevel=3,
        )
        return ()
    source = (
        f"D = (1 - theta) I + theta N with N = P + (I - P) M (I - P), P the orthogonal projection "
        f"onto constant images, M = a I + (1 - a) C with 0 < a < 1 and C a convolutional network whose layer norm bounds, "
        f"recomputed from the weights when loaded, are [{listed}] (exact circular norms on a "
        f"{bounds.grid}x{bounds.grid} DFT grid, Sedghi, Gupta & Long, ICLR 2019, widened to every "
        f"image size and zero padding by a Bernstein-inequality factor), product "
        f"{bounds.lipschitz:.6f} <= 1, with 1-Lipschitz activations z - beta clip(z, -t, t), 0 <= beta <= 2: C, M and hence N are nonexpansive, so "
        f"D is theta-averaged (Combettes & Yamada 2015, Def. 1.1)"
    )
    return (
        Fact(
            "averaged",
            theta=theta,
            lipschitz=1.0,
            residual_lipschitz=2.0 * theta,
            verified=True,
            source=source,
        ),
    )


def _network_potential(model: nn.Module, x: torch.Tensor, sigma: float) -> torch.Tensor:
    return model.potential(x, sigma)


def gradient_step_cnn(
    sigma: float, *, weight: float = 1.0, weights: str | Path | None = None
) -> GradientStepDenoiser:
    r"""The shipped gradient-step denoiser ``D = I - weight grad g``, set to noise level ``sigma``.

    ``g(x) = ||R(x; sigma)||^2 / 2`` with ``R`` a softplus
    :class:`MultiscaleResidualCNN` (:class:`GradientStepNetwork`), fine-tuned
    from the shipped residual network as a gradient-step denoiser. The
    structure ``D = I - grad g`` with ``g`` computable holds by construction
    and is a verified fact, which is what the potential route of
    :func:`pnpguard.admissible` needs (no Lipschitz estimate).

    Parameters
    ----------
    sigma : float
        Noise level in intensity units, within the trained range.
    weight : float, optional
        ``lambda`` in ``D = I - lambda grad g``: the regularisation weight of
        the objective ``F = f + lambda g`` (default 1).
    weights : str or pathlib.Path, optional
        A weights file of a :class:`GradientStepNetwork`; default the shipped one.

    Returns
    -------
    GradientStepDenoiser

    References
    ----------
    .. [1] S. Hurault, A. Leclaire and N. Papadakis, "Gradient step denoiser
       for convergent plug-and-play", ICLR 2022. arXiv:2110.03220
    """
    path = Path(weights) if weights is not None else GRADIENT_STEP_WEIGHTS
    return _gradient_step_from(path, sigma, weight, "gradient-step CNN")


def lab_gradient_step_cnn(sigma: float, *, weight: float = 1.0) -> GradientStepDenoiser:
    r"""The shipped gradient-step denoiser fine-tuned on the lab's kinds of frames.

    The network of :func:`gradient_step_cnn`, trained further on the same
    pictures plus fresh draws of the phantom generators the lab's tasks use
    (cells, piecewise-smooth frames, ellipses, porous disks; seeds disjoint
    from every benchmark draw, see ``benchmarks/train_learned.py``). It is a
    worked example of fine-tuning a prior on one's own kind of frames; the
    structure ``D = I - grad g`` and the potential route are the same.

    Parameters
    ----------
    sigma : float
        Noise level in intensity units, within the trained range.
    weight : float, optional
        ``lambda`` in ``D = I - lambda grad g`` (default 1).

    Returns
    -------
    GradientStepDenoiser

    References
    ----------
    .. [1] S. Hurault, A. Leclaire and N. Papadakis, "Gradient step denoiser
       for convergent plug-and-play", ICLR 2022. arXiv:2110.03220
    """
    return _gradient_step_from(GRADIENT_STEP_LAB_WEIGHTS, sigma, weight, "gradient-step CNN (lab frames)")


def _gradient_step_from(path: Path, sigma: float, weight: float, name: str) -> GradientStepDenoiser:
    model, training = _load(path, ("GradientStepNetwork",))
    sigma = _check_trained_sigma(sigma, training)
    source = (
        "D = I - grad g with g(x) = ||R(x)||^2 / 2, R the softplus multi-scale network of "
        f"{path.name}, differentiated by autograd (Hurault, Leclaire & Papadakis, ICLR 2022)"
    )
    denoiser = GradientStepDenoiser(
        ModulePotential(model, sigma, _network_potential),
        name=name if weight == 1.0 else f"{name} (weight={weight:g})",
        sigma=sigma,
        weight=weight,
        source=source,
    )
    denoiser.lowest_sigma = _lowest_trained_sigma(training)
    return denoiser


def load_denoiser(
    path: str | Path, sigma: float, *, theta: float | None = None, gain: float = 1.0
) -> LearnedDenoiser | GradientStepDenoiser:
    """A denoiser from a weights file written by :func:`train_denoiser`.

    Parameters
    ----------
    path : str or pathlib.Path
        The weights file.
    sigma : float
        Noise level, within the range the network was trained on.
    theta : float, optional
        Averaged network only: averagedness constant within the trained
        range; default the one the file records (``default_theta`` of
        :func:`train_denoiser`: the middle of the trained range unless set).
    gain : float, optional
        Averaged network only: gain on the network part (see :func:`averaged_cnn`).

    Returns
    -------
    LearnedDenoiser or GradientStepDenoiser
        As :func:`residual_cnn`, :func:`averaged_cnn` or
        :func:`gradient_step_cnn` would build it.

    Raises
    ------
    ValueError
        If ``theta`` or ``gain`` is given for a residual network, or for the
        reasons listed by :func:`residual_cnn` and :func:`averaged_cnn`.
    """
    model = load_network(path)
    if isinstance(model, AveragedCNN):
        return averaged_cnn(sigma, theta=theta, gain=gain, weights=path)
    if isinstance(model, GradientStepNetwork):
        if theta is not None or gain != 1.0:
            raise ValueError(f"`theta` and `gain` apply to averaged networks only; {str(path)!r} holds a GradientStepNetwork")
        return gradient_step_cnn(sigma, weights=path)
    if theta is not None or gain != 1.0:
        raise ValueError(
            f"`theta` and `gain` apply to averaged networks only; {str(path)!r} holds a {type(model).__name__}"
        )
    return residual_cnn(sigma, weights=path)


def module_denoiser(
    module: nn.Module | Callable,
    sigma: float,
    *,
    name: str,
    claims: Iterable[ClaimLike] = (),
) -> LearnedDenoiser:
    """Wrap your own torch network ``module(noisy, sigma)`` like the shipped ones.

    Parameters
    ----------
    module : torch.nn.Module
        Called as ``module(noisy, sigma)`` with ``noisy`` a ``(N, C, H, W)``
        tensor and ``sigma`` a float; returns a tensor of the same shape.
    sigma : float
        Noise level passed to the network.
    name : str
        Short name for reports.
    claims : iterable, optional
        What you know about the network (``"nonexpansive"``, ``("averaged",
        theta)``, a Fact...). Recorded as unverified claims.

    Returns
    -------
    LearnedDenoiser
        Differentiable, dtype- and device-following wrapper.
    """
    facts = tuple(as_claim(claim) for claim in claims)
    return LearnedDenoiser(module, name=name, sigma=sigma, facts=facts)
