"""Training loop shared by the learned denoisers, and the public training utility."""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import torch
from torch import nn

from .._validation import choice, positive_int, positive_number
from ..metrics import _psnr
from ._architectures import BY_CLASS_NAME, BY_NAME
from ._averaged import AveragedCNN
from ._data import PatchSampler
from ._gradient_step import GradientStepNetwork
from ._multiscale import MultiscaleResidualCNN
from ._weights import read_weights, save_weights

#: Noise level (in [0, 1] intensity units) of the validation printout.
VALIDATION_SIGMA = 25.0 / 255.0


@dataclass
class TrainingReport:
    """What a training run did.

    Attributes
    ----------
    model : torch.nn.Module
        The trained network (in evaluation mode).
    steps : int
        Optimiser steps taken.
    seconds : float
        Wall-clock training time (validation included).
    losses : list of float
        Mean training loss over each logging interval.
    validation_psnr : list of tuple
        ``(step, psnr)`` at each validation, PSNR in dB at
        ``sigma = VALIDATION_SIGMA`` on the validation patches.
    path : pathlib.Path or None
        Where the weights were saved, if they were.
    """

    model: nn.Module
    steps: int
    seconds: float
    losses: list[float] = field(default_factory=list)
    validation_psnr: list[tuple[int, float]] = field(default_factory=list)
    path: Path | None = None


def validation_set(
    images: Sequence[np.ndarray], patch_size: int, count: int, *, seed: int
) -> tuple[torch.Tensor, torch.Tensor]:
    """Fixed ``(clean, noisy)`` validation patches at ``VALIDATION_SIGMA``."""
    sampler = PatchSampler(images, patch_size, (VALIDATION_SIGMA, VALIDATION_SIGMA), seed)
    clean, noisy, _ = sampler.noisy_batch(count)
    return clean, noisy


def run_training(
    model: nn.Module,
    predict: Callable[[nn.Module, torch.Tensor, torch.Tensor, torch.Generator], torch.Tensor],
    sampler: PatchSampler,
    *,
    steps: int | None,
    seconds: float | None,
    batch_size: int,
    learning_rate: float,
    validation: tuple[torch.Tensor, torch.Tensor] | None,
    validate: Callable[[nn.Module, torch.Tensor], torch.Tensor],
    validate_every: int,
    progress: bool,
    seed: int,
    checkpoint: Path | None = None,
) -> TrainingReport:
    """Adam on the mean squared error, with a cosine learning-rate decay.

    The decay follows the fraction of the budget used, ``max(step / steps,
    elapsed / seconds)``, so a run bounded in seconds also anneals (cosine
    schedule: common practice). Training stops when either budget is spent.

    With ``checkpoint``, the whole training state (weights, optimiser, random
    generators, step, elapsed time, history) is written there at every
    validation, and a run started with an existing checkpoint resumes from it:
    an interrupted run continues where it stopped and, since the random
    streams are restored, draws the same patches it would have drawn.
    """
    from tqdm.auto import tqdm

    generator = torch.Generator().manual_seed(seed + 1)
    optimiser = torch.optim.Adam(model.parameters(), lr=learning_rate)
    report = TrainingReport(model=model, steps=0, seconds=0.0)
    state = _TrainingState(model, optimiser, generator, sampler, report)
    offset = 0.0
    if checkpoint is not None and Path(checkpoint).is_file():
        offset = state.restore(Path(checkpoint))
    start = time.perf_counter() - offset
    bar = tqdm(total=steps, initial=report.steps, disable=not progress, unit="step", leave=False)
    running, count = 0.0, 0
    model.train()
    while True:
        elapsed = time.perf_counter() - start
        fraction = 0.0
        if steps is not None:
            fraction = max(fraction, report.steps / steps)
        if seconds is not None:
            fraction = max(fraction, elapsed / seconds)
        if fraction >= 1.0:
            break
        rate = 0.01 * learning_rate + 0.99 * learning_rate * 0.5 * (1 + math.cos(math.pi * fraction))
        for group in optimiser.param_groups:
            group["lr"] = rate
        clean, noisy, sigma = sampler.noisy_batch(batch_size)
        estimate = predict(model, noisy, sigma, generator)
        loss = torch.mean((estimate - clean) ** 2)
        if not bool(torch.isfinite(loss)):
            raise FloatingPointError(f"training loss became {float(loss)} at step {report.steps}")
        optimiser.zero_grad(set_to_none=True)
        loss.backward()
        optimiser.step()
        report.steps += 1
        running += loss.item()
        count += 1
        bar.update(1)
        last = steps is not None and report.steps == steps
        if report.steps % validate_every == 0 or last:
            report.losses.append(running / count)
            running, count = 0.0, 0
            if validation is not None:
                model.eval()
                with torch.no_grad():
                    # One PSNR over the whole batch of patches (inf if it is denoised exactly).
                    value = float(_psnr(validate(model, validation[1]).double(), validation[0].double(), 1.0))
                model.train()
                report.validation_psnr.append((report.steps, value))
                bar.set_postfix(loss=f"{report.losses[-1]:.2e}", val_psnr=f"{value:.2f} dB")
                message = (
                    f"step {report.steps}: training loss {report.losses[-1]:.3e}, "
                    f"validation PSNR {value:.2f} dB at sigma = {VALIDATION_SIGMA * 255:.0f}/255"
                )
                if progress:
                    bar.write(message)
            if checkpoint is not None:
                state.save(Path(checkpoint), time.perf_counter() - start)
    bar.close()
    model.eval()
    report.seconds = time.perf_counter() - start
    return report


_CHECKPOINT_FORMAT = "pnpguard-training-checkpoint"


@dataclass
class _TrainingState:
    """Everything a resumed run needs to continue exactly where an interrupted one stopped."""

    model: nn.Module
    optimiser: torch.optim.Optimizer
    generator: torch.Generator
    sampler: PatchSampler
    report: TrainingReport

    def save(self, path: Path, elapsed: float) -> None:
        """Write the state to ``path`` atomically (a temporary file renamed over it)."""
        state = {
            "format": _CHECKPOINT_FORMAT,
            "model": self.model.state_dict(),
            "optimiser": self.optimiser.state_dict(),
            "generator": self.generator.get_state(),
            "sampler_generator": self.sampler.generator.get_state(),
            "steps": self.report.steps,
            "elapsed": elapsed,
            "losses": list(self.report.losses),
            "validation_psnr": [list(entry) for entry in self.report.validation_psnr],
        }
        path.parent.mkdir(parents=True, exist_ok=True)
        temporary = path.with_name(path.name + ".partial")
        torch.save(state, temporary)
        temporary.replace(path)

    def restore(self, path: Path) -> float:
        """Load a state written by :meth:`save`; return the elapsed seconds it recorded."""
        state = torch.load(path, map_location="cpu", weights_only=True)
        if not isinstance(state, dict) or state.get("format") != _CHECKPOINT_FORMAT:
            raise ValueError(f"`checkpoint` {str(path)!r} is not a training checkpoint")
        self.model.load_state_dict(state["model"])
        self.optimiser.load_state_dict(state["optimiser"])
        self.generator.set_state(state["generator"])
        self.sampler.generator.set_state(state["sampler_generator"])
        self.report.steps = int(state["steps"])
        self.report.losses = [float(v) for v in state["losses"]]
        self.report.validation_psnr = [(int(s), float(v)) for s, v in state["validation_psnr"]]
        return float(state["elapsed"])


_IMAGE_SUFFIXES = (".png", ".tif", ".tiff")


def load_training_images(images: str | Path | Sequence[np.ndarray], name: str = "images") -> list[np.ndarray]:
    """Read a folder of PNG/TIFF files or check a list of arrays.

    Parameters
    ----------
    images : str, pathlib.Path or sequence of numpy.ndarray
        A folder: every ``*.png``, ``*.tif`` and ``*.tiff`` file in it (not
        recursive) is read with :func:`skimage.io.imread`, colour is converted
        to grey with :func:`skimage.color.rgb2gray` and integer files are
        scaled to [0, 1] by their dtype's range (:func:`skimage.util.img_as_float`).
        A sequence: 2-D float32/float64 arrays, used as they are.
    name : str, optional
        Argument name for error messages.

    Returns
    -------
    list of numpy.ndarray
        2-D float32 images.

    Raises
    ------
    ValueError, TypeError
        If the folder holds no image files, or an array is not a finite 2-D
        float image.
    """
    if isinstance(images, (str, Path)):
        from skimage.color import rgb2gray, rgba2rgb
        from skimage.io import imread
        from skimage.util import img_as_float

        folder = Path(images)
        if not folder.is_dir():
            raise ValueError(f"`{name}` {str(folder)!r} is not a folder")
        files = sorted(p for p in folder.iterdir() if p.suffix.lower() in _IMAGE_SUFFIXES)
        if not files:
            raise ValueError(f"`{name}` folder {str(folder)!r} holds no .png, .tif or .tiff files")
        result = []
        for path in files:
            image = np.asarray(imread(path))
            if image.ndim == 3 and image.shape[-1] == 4:
                image = rgba2rgb(image)
            if image.ndim == 3 and image.shape[-1] == 3:
                image = rgb2gray(image)
            if image.ndim != 2:
                raise ValueError(f"{str(path)!r} is not a grey or RGB(A) image (shape {image.shape})")
            result.append(img_as_float(image).astype(np.float32))
        return result
    if isinstance(images, np.ndarray) or not isinstance(images, Sequence) or not images:
        raise TypeError(f"`{name}` must be a folder path or a non-empty list of 2-D arrays")
    result = []
    for index, image in enumerate(images):
        if not isinstance(image, np.ndarray) or image.dtype not in (np.float32, np.float64):
            raise TypeError(
                f"`{name}[{index}]` must be a float32 or float64 numpy array, got "
                f"{getattr(image, 'dtype', type(image).__name__)}"
            )
        if image.ndim != 2:
            raise ValueError(f"`{name}[{index}]` must be shaped (H, W), got {image.shape}")
        if not np.isfinite(image).all():
            raise ValueError(f"`{name}[{index}]` has non-finite entries")
        result.append(image.astype(np.float32))
    return result


def _build(
    architecture: str,
    sizes: dict[str, int | str],
    theta_range: tuple[float, float],
    seed: int,
    initial_weights: str | Path | None,
) -> nn.Module:
    if initial_weights is not None:
        from ._denoisers import load_network

        model = load_network(initial_weights)
        expected = BY_NAME[architecture].network
        if expected is GradientStepNetwork and isinstance(model, MultiscaleResidualCNN):
            model = GradientStepNetwork.from_residual(model)
        if not isinstance(model, expected):
            raise ValueError(f"`initial_weights` hold a {type(model).__name__}, not a {expected.__name__}")
        config = model.config()
        clashes = {key: (value, config.get(key)) for key, value in sizes.items() if config.get(key) != value}
        if clashes:
            raise ValueError(f"`initial_weights` disagree with the requested sizes (requested, stored): {clashes}")
        if isinstance(model, AveragedCNN):
            model.theta_range = theta_range
    else:
        # Initialise from a private copy of the global generator state: the seed
        # fixes the initial weights without changing the caller's random state.
        with torch.random.fork_rng(devices=[]):
            torch.manual_seed(seed)
            if architecture == "averaged":
                model = AveragedCNN(**sizes, theta_range=theta_range)
            else:
                model = BY_NAME[architecture].network(**sizes)
    if isinstance(model, AveragedCNN):
        model.start_normalised_training(seed=seed)
    return model


def _architecture_of(path: str | Path) -> str:
    """The ``architecture`` argument that trains the network stored in ``path``."""
    stored = read_weights(path)["architecture"]
    if stored not in BY_CLASS_NAME:
        raise ValueError(f"`initial_weights` hold an unknown architecture {stored!r}")
    return BY_CLASS_NAME[stored].name


def _check_default_theta(default_theta: float | None, theta_range: tuple[float, float]) -> float:
    """``default_theta``, or the middle of ``theta_range`` when it is None, checked against the range."""
    low, high = theta_range
    if default_theta is None:
        return 0.5 * (low + high)
    if isinstance(default_theta, bool) or not isinstance(default_theta, (int, float)) or not low <= default_theta <= high:
        raise ValueError(f"`default_theta` must be a number in `theta_range` [{low:g}, {high:g}], got {default_theta!r}")
    return float(default_theta)


def _residual_predict(model: nn.Module, noisy: torch.Tensor, sigma: torch.Tensor, generator: torch.Generator) -> torch.Tensor:
    return model(noisy, sigma)


def _averaged_predict(model: nn.Module, noisy: torch.Tensor, sigma: torch.Tensor, generator: torch.Generator) -> torch.Tensor:
    low, high = model.theta_range
    theta = low + (high - low) * torch.rand(noisy.shape[0], generator=generator)
    return model(noisy, sigma, theta)


def train_denoiser(
    images: str | Path | Sequence[np.ndarray],
    *,
    architecture: str | None = None,
    noise_range: tuple[float, float] = (0.0, 55.0 / 255.0),
    steps: int | None = None,
    seconds: float | None = None,
    depth: int | None = None,
    width: int | None = None,
    unshuffle: int | None = None,
    initialisation: str | None = None,
    widths: Sequence[int] | None = None,
    blocks: int | None = None,
    theta_range: tuple[float, float] = (0.5, 0.95),
    default_theta: float | None = None,
    patch_size: int = 40,
    batch_size: int = 32,
    learning_rate: float = 1e-3,
    low_contrast: float = 0.0,
    initial_weights: str | Path | None = None,
    validation_images: str | Path | Sequence[np.ndarray] | None = None,
    validate_every: int = 100,
    save_to: str | Path | None = None,
    checkpoint: str | Path | None = None,
    progress: bool = True,
    seed: int = 0,
) -> TrainingReport:
    r"""Train a residual, multi-scale residual or averaged denoising network on your own images.

    Parameters
    ----------
    images : str, pathlib.Path or sequence of numpy.ndarray
        Clean training images: a folder of PNG/TIFF files or a list of 2-D
        float arrays (see :func:`load_training_images`), with intensities on
        the scale the denoiser will be used at (typically [0, 1]).
    architecture : {"averaged", "gradient-step", "multiscale", "residual"}, optional
        Default: the architecture of ``initial_weights`` when given, else
        ``"residual"``.
        ``"residual"``: :class:`ResidualCNN` (defaults depth 12, width 32).
        ``"multiscale"``: :class:`MultiscaleResidualCNN` (defaults widths
        (16, 32, 64, 64), one block per level).
        ``"averaged"``: :class:`AveragedCNN` (defaults depth 8, width 32),
        trained with the spectral normaliser and finished with the exact
        rescaling, so its averagedness can be verified on loading.
        ``"gradient-step"``: :class:`GradientStepNetwork`, ``D = I - grad g``
        with ``g = ||R(x)||^2 / 2`` and ``R`` a softplus multi-scale network
        (same defaults as ``"multiscale"``). ``initial_weights`` may also be
        a multi-scale residual file (the shipped ``RESIDUAL_WEIGHTS``): its
        ReLUs become softplus and the network is fine-tuned as a
        gradient-step denoiser.
    noise_range : tuple of float, optional
        ``(low, high)`` of the Gaussian noise standard deviation, drawn
        uniformly per patch.
    steps, seconds : int or float, optional
        Budget: stop after this many optimiser steps or this much wall time,
        whichever comes first. At least one is required.
    depth, width : int, optional
        Residual and averaged networks: size (defaults as above).
    unshuffle : int, optional
        Residual network only: pixel blocks folded into channels (see
        :class:`ResidualCNN`; default 1).
    initialisation : {"he", "torch-default"}, optional
        Residual network only: initial weights (see :class:`ResidualCNN`;
        default "he").
    widths, blocks : optional
        Multi-scale network only: channels per resolution, finest first, and
        residual blocks per level (see :class:`MultiscaleResidualCNN`).
    theta_range : tuple of float, optional
        Averaged network only: range of ``theta`` drawn during training.
    default_theta : float, optional
        Averaged network only: the ``theta`` that :func:`load_denoiser` uses
        when none is given, recorded in the weights file; within
        ``theta_range``. Default: the middle of ``theta_range`` (the value of
        the validation printout).
    patch_size, batch_size : int, optional
        Square training patches per step.
    learning_rate : float, optional
        Initial Adam step, decayed to 1% by a cosine schedule over the budget.
    low_contrast : float, optional
        Fraction of training patches whose contrast is reduced (see
        :class:`~pnpguard.learned._data.PatchSampler`); useful when the frames
        to denoise are faint or flat.
    initial_weights : str or pathlib.Path, optional
        Start from these weights (a file of the same architecture, for example
        a shipped one) instead of a fresh initialisation: fine-tuning on your
        own images. Network sizes, when given, must match the file.
    validation_images : folder or sequence of arrays, optional
        Images for the validation printout (64 fixed patches at noise level
        25/255). When omitted the patches are cut from the training images
        (an in-sample figure).
    validate_every : int, optional
        Steps between validations.
    save_to : str or pathlib.Path, optional
        Where to save the weights (same format as the shipped weights; load
        them with :func:`load_denoiser`).
    checkpoint : str or pathlib.Path, optional
        A file where the whole training state is saved at every validation.
        If it exists when training starts, training resumes from it (same
        arguments expected), so an interrupted run loses at most
        ``validate_every`` steps. Delete it to start afresh.
    progress : bool, optional
        Show a tqdm progress bar and print each validation.
    seed : int, optional
        Fixes the initial weights, the patches and the noise.

    Returns
    -------
    TrainingReport
        The trained model, the budget used, the loss and validation history
        and the saved path.

    Raises
    ------
    ValueError
        For an unknown architecture, a missing budget, a bad noise range, or
        images smaller than ``patch_size``.

    Notes
    -----
    Each step minimises the mean squared error
    :math:`\| D(x + \sigma n; \sigma) - x \|^2` over a batch of clean patches
    :math:`x`, Gaussian noise :math:`n` and noise levels
    :math:`\sigma \sim U(\text{noise\_range})`, with Adam (Kingma & Ba, ICLR
    2015) and a cosine learning-rate decay (common practice).
    """
    if architecture is None:
        architecture = "residual" if initial_weights is None else _architecture_of(initial_weights)
    choice(architecture, "architecture", BY_NAME)
    if steps is None and seconds is None:
        raise ValueError("give a budget: `steps`, `seconds` or both")
    steps = None if steps is None else positive_int(steps, "steps")
    seconds = None if seconds is None else positive_number(seconds, "seconds")
    low, high = (float(v) for v in noise_range)
    if not 0.0 <= low <= high or not np.isfinite(high):
        raise ValueError(f"`noise_range` must satisfy 0 <= low <= high < inf, got {noise_range!r}")
    training = load_training_images(images, "images")
    small = [image.shape for image in training if min(image.shape) < patch_size]
    if small:
        raise ValueError(f"`images` include images smaller than `patch_size` = {patch_size}: {small}")
    if validation_images is None:
        validation_pool, validation_seed = training, seed + 1000
    else:
        validation_pool, validation_seed = load_training_images(validation_images, "validation_images"), seed
    options = {
        "depth": (depth, ("averaged", "residual")),
        "width": (width, ("averaged", "residual")),
        "unshuffle": (unshuffle, ("residual",)),
        "initialisation": (initialisation, ("residual",)),
        "widths": (None if widths is None else list(widths), ("gradient-step", "multiscale")),
        "blocks": (blocks, ("gradient-step", "multiscale")),
    }
    misplaced = sorted(key for key, (value, owners) in options.items() if value is not None and architecture not in owners)
    if default_theta is not None and architecture != "averaged":
        misplaced.append("default_theta")
    if misplaced:
        raise ValueError(f"{', '.join(f'`{key}`' for key in misplaced)} do not apply to the {architecture!r} architecture")
    sizes = {key: value for key, (value, _) in options.items() if value is not None}
    model = _build(architecture, sizes, tuple(theta_range), seed, initial_weights)
    if architecture == "averaged":
        default_theta = _check_default_theta(default_theta, model.theta_range)
    sampler = PatchSampler(training, patch_size, (low, high), seed, low_contrast=low_contrast)
    validation = validation_set(validation_pool, min(64, *(min(im.shape) for im in validation_pool)), 64, seed=validation_seed)
    if architecture != "averaged":
        predict = _residual_predict

        def validate(network: nn.Module, noisy: torch.Tensor) -> torch.Tensor:
            return network(noisy, VALIDATION_SIGMA)

    else:
        predict = _averaged_predict
        mid_theta = 0.5 * sum(model.theta_range)

        def validate(network: nn.Module, noisy: torch.Tensor) -> torch.Tensor:
            return network(noisy, VALIDATION_SIGMA, mid_theta)

    report = run_training(
        model,
        predict,
        sampler,
        steps=steps,
        seconds=seconds,
        batch_size=batch_size,
        learning_rate=learning_rate,
        validation=validation,
        validate=validate,
        validate_every=validate_every,
        progress=progress,
        seed=seed,
        checkpoint=None if checkpoint is None else Path(checkpoint),
    )
    if architecture == "averaged":
        model.finish_normalised_training()
    if save_to is not None:
        settings = {
            "noise_range": [low, high],
            "steps": report.steps,
            "seconds": report.seconds,
            "patch_size": patch_size,
            "batch_size": batch_size,
            "learning_rate": learning_rate,
            "low_contrast": low_contrast,
            "initial_weights": None if initial_weights is None else Path(initial_weights).name,
            "seed": seed,
            "torch_threads": torch.get_num_threads(),
        }
        if architecture == "averaged":
            settings["theta_range"] = list(model.theta_range)
            settings["default_theta"] = default_theta
        report.path = save_weights(save_to, model, architecture=type(model).__name__, training=settings)
    return report
