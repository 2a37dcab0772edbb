"""Benchmark tasks: phantom + forward model + noise level + seed, and the suites.

A :class:`Task` is a recipe; :meth:`Task.problem` turns it into a concrete
:class:`Problem` (ground truth, operator, noisy data, data term) at a given
image size. Every random choice (phantom, mask, noise) comes from the task's
seeds, so a problem is the same on every run. A task also names a *tuning*
phantom and seed, different from the benchmark's, on which its method
parameters are tuned once (``benchmarks/tune_suite.py``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import torch

from .._arrays import ArrayLike, to_tensor
from .._validation import nonnegative_int, number_in, unknown_message
from ..fidelity import LeastSquares
from ..operators import (
    Convolution,
    Decimation,
    LinearOperator,
    ParallelProjection,
    PixelMask,
    dead_lines_mask,
    gaussian_psf,
    motion_psf,
    random_pixel_mask,
    scratch_mask,
)
from ..phantoms import make_phantom

Shape = tuple[int, int]

#: Task families of the shipped tasks, in the order reports list them.
FAMILIES = ("deblurring", "inpainting", "super-resolution", "tomography")

#: The family of a user's task whose operator is of no shipped kind (reported after
#: :data:`FAMILIES`), compared with the baselines that need nothing but the operator.
USER_FAMILY = "custom"

#: Phantoms are in [0, 1]; PSNR and SSIM use this intensity range.
DATA_RANGE = 1.0


# ----------------------------------------------------------------- models
@dataclass(frozen=True)
class Blur:
    """Periodic convolution with a Gaussian or a linear-motion PSF.

    Attributes
    ----------
    psf : {"gaussian", "motion"}
    size : int
        Odd side length of the PSF.
    width : float
        Gaussian standard deviation, or motion length, in pixels.
    angle : float
        Motion direction in degrees (ignored for Gaussian PSFs).
    """

    psf: str
    size: int
    width: float
    angle: float = 0.0
    family = "deblurring"

    def operator(self, shape: Shape, seed: int) -> LinearOperator:
        if self.psf == "gaussian":
            kernel = gaussian_psf(self.size, self.width)
        else:
            kernel = motion_psf(self.width, self.angle, self.size)
        return Convolution(kernel, shape)

    def describe(self) -> dict:
        return {"kind": "blur", "psf": self.psf, "size": self.size, "width": self.width,
                "angle": self.angle, "boundary": "periodic"}

    def summary(self) -> str:
        """One line for people, e.g. ``Gaussian blur, sigma 1.6 px (9x9 kernel), periodic``."""
        if self.psf == "gaussian":
            blur = f"Gaussian blur, sigma {self.width:g} px"
        else:
            blur = f"motion blur, length {self.width:g} px at {self.angle:g} deg"
        return f"{blur} ({self.size}x{self.size} kernel), periodic"


@dataclass(frozen=True)
class Mask:
    """Missing pixels: uniformly random ones, or dead rows plus scratches.

    Attributes
    ----------
    pattern : {"random", "rows_scratches"}
    missing : float
        Fraction of missing pixels (``"random"``), or of dead rows
        (``"rows_scratches"``).
    scratches : int
        Number of scratches (``"rows_scratches"`` only), 1.5 pixels wide.
    """

    pattern: str
    missing: float
    scratches: int = 0
    family = "inpainting"

    def operator(self, shape: Shape, seed: int) -> LinearOperator:
        if self.pattern == "random":
            return PixelMask(random_pixel_mask(shape, self.missing, seed=seed))
        rng = np.random.default_rng(seed)
        dead = max(1, round(self.missing * shape[0]))
        rows = rng.choice(shape[0], size=dead, replace=False)
        observed = dead_lines_mask(shape, rows=rows) & scratch_mask(
            shape, self.scratches, seed=seed + 1
        )
        return PixelMask(observed)

    def describe(self) -> dict:
        return {"kind": "mask", "pattern": self.pattern, "missing": self.missing,
                "scratches": self.scratches}

    def summary(self) -> str:
        """One line for people, e.g. ``50 % of pixels missing at random``."""
        if self.pattern == "random":
            return f"{100 * self.missing:g} % of pixels missing at random"
        return f"{100 * self.missing:g} % of rows missing, {self.scratches} scratches"


@dataclass(frozen=True)
class Downsampling:
    """Box-average (detector binning) then keep every ``factor``-th pixel.

    Attributes
    ----------
    factor : int
    """

    factor: int
    family = "super-resolution"

    def operator(self, shape: Shape, seed: int) -> LinearOperator:
        return Decimation(self.factor, shape)

    def describe(self) -> dict:
        return {"kind": "decimation", "factor": self.factor, "psf": "box", "boundary": "periodic"}

    def summary(self) -> str:
        """One line for people, e.g. ``2x2 box average, subsampled by 2, periodic``."""
        return f"{self.factor}x{self.factor} box average, subsampled by {self.factor}, periodic"


@dataclass(frozen=True)
class Scan:
    """Parallel-beam projections at ``views`` angles evenly spread over ``arc`` degrees.

    Attributes
    ----------
    views : int
        Number of projection angles.
    arc : float
        Angular range in degrees (180 for a full scan; less is limited-angle).
    """

    views: int
    arc: float = 180.0
    family = "tomography"

    def angles(self) -> np.ndarray:
        """The projection angles in degrees: ``arc * k / views``, ``k = 0..views-1``."""
        return self.arc * np.arange(self.views) / self.views

    def operator(self, shape: Shape, seed: int) -> LinearOperator:
        return ParallelProjection(shape, self.angles())

    def describe(self) -> dict:
        return {"kind": "parallel_projection", "views": self.views, "arc_degrees": self.arc}

    def summary(self) -> str:
        """One line for people, e.g. ``parallel beam, 30 views over 180 deg``."""
        return f"parallel beam, {self.views} views over {self.arc:g} deg"


@dataclass(frozen=True)
class UserModel:
    """A user's forward model: any :class:`~pnpguard.LinearOperator`, e.g. from :func:`pnpguard.as_operator`.

    Attributes
    ----------
    op : LinearOperator
        Its ``in_shape`` is the task's image size.
    """

    op: LinearOperator

    @property
    def family(self) -> str:
        """The family of a shipped kind of operator (its baselines apply), else ``"custom"``."""
        for kind, family in ((Convolution, "deblurring"), (PixelMask, "inpainting"),
                             (Decimation, "super-resolution"), (ParallelProjection, "tomography")):
            if isinstance(self.op, kind):
                return family
        return USER_FAMILY

    def operator(self, shape: Shape, seed: int) -> LinearOperator:
        if tuple(shape) != self.op.in_shape:
            raise ValueError(f"the user's operator takes {self.op.in_shape} images, not {tuple(shape)}")
        return self.op

    def describe(self) -> dict:
        bound = self.op.norm_bound()
        return {"kind": "user", "operator": repr(self.op), "norm": bound.value, "norm_basis": bound.basis}

    def summary(self) -> str:
        """One line for people: the operator's repr."""
        return repr(self.op)


Model = Blur | Mask | Downsampling | Scan | UserModel


# ------------------------------------------------------------------ tasks
@dataclass(frozen=True)
class Problem:
    """One concrete reconstruction problem built from a :class:`Task`.

    Attributes
    ----------
    task : Task
    shape : tuple of int
    truth : numpy.ndarray
        Ground-truth image, float64 in [0, 1].
    op : LinearOperator
    y : numpy.ndarray
        Noisy data, float64.
    sigma : float
        Noise standard deviation in the data's units.
    fidelity : LeastSquares
        ``||A x - y||^2 / (2 sigma^2)``.
    phantom : str
        Phantom name.
    seed : int
        Seed of the phantom, mask and noise.
    """

    task: Task
    shape: Shape
    truth: np.ndarray = field(repr=False)
    op: LinearOperator
    y: np.ndarray = field(repr=False)
    sigma: float
    fidelity: LeastSquares = field(repr=False)
    phantom: str
    seed: int

    def start(self) -> torch.Tensor:
        """``A^T y / ||A||^2`` (float64 tensor), the solvers' default first iterate.

        It is also the image the denoiser check samples around: the kind of
        image the denoiser meets in the first iterations
        (:meth:`LeastSquares.start_image`).
        """
        return self.fidelity.start_image()


@dataclass(frozen=True)
class Task:
    """A benchmark task: phantom + forward model + noise level + seeds.

    Attributes
    ----------
    name : str
    model : Blur, Mask, Downsampling or Scan
    noise : float
        Noise standard deviation as a fraction of the peak of the noiseless
        data ``max |A x|`` (0.01 is "1 % noise").
    phantom : str
        Benchmark phantom (:func:`pnpguard.phantoms.make_phantom` name).
    seed : int
        Seed of the benchmark phantom, mask and noise.
    tuning_phantom : str
        Phantom the parameters are tuned on.
    tuning_seed : int
        Seed of the tuning phantom, mask and noise (differs from ``seed``).
    truth, tuning_truth : numpy.ndarray or None
        A user's task (:func:`user_task`): the ground truth and the separate
        tuning image, used instead of the phantoms; None for shipped tasks.
    """

    name: str
    model: Model
    noise: float
    phantom: str
    seed: int
    tuning_phantom: str
    tuning_seed: int
    truth: np.ndarray | None = field(default=None, repr=False, compare=False)
    tuning_truth: np.ndarray | None = field(default=None, repr=False, compare=False)

    def __post_init__(self) -> None:
        if self.tuning_seed == self.seed:
            raise ValueError(f"task {self.name!r}: the tuning seed must differ from the benchmark seed")

    @property
    def family(self) -> str:
        """``"deblurring"``, ``"inpainting"``, ``"super-resolution"`` or ``"tomography"``."""
        return self.model.family

    @property
    def fixed_shape(self) -> Shape | None:
        """The image size of a user's task (its truth's), None for shipped tasks (any size)."""
        return None if self.truth is None else tuple(self.truth.shape)

    def problem(self, shape: Shape, *, tuning: bool = False, image: np.ndarray | None = None) -> Problem:
        """Build the concrete problem at ``shape``.

        Parameters
        ----------
        shape : tuple of int
            Image size ``(H, W)``.
        tuning : bool
            Use the tuning phantom and seed instead of the benchmark ones.
        image : numpy.ndarray, optional
            Use this ``(H, W)`` float image as ground truth instead of a
            phantom (``shape`` must then be its shape).

        Returns
        -------
        Problem

        Notes
        -----
        ``y = A x + sigma n`` with ``n`` standard normal from
        ``numpy.random.default_rng(seed)`` and
        ``sigma = noise * max |A x|``.
        """
        seed = self.tuning_seed if tuning else self.seed
        phantom = self.tuning_phantom if tuning else self.phantom
        if image is None and self.truth is not None:
            image = self.tuning_truth if tuning else self.truth
        if image is None:
            truth = make_phantom(phantom, shape, seed=seed)
        else:
            truth = np.asarray(image, dtype=np.float64)
            phantom = phantom if self.truth is not None else "user image"
            if truth.shape != tuple(shape):
                raise ValueError(f"`image` has shape {truth.shape} but `shape` is {tuple(shape)}")
        op = self.model.operator(tuple(shape), seed)
        clean = op.forward(truth)
        sigma = self.noise * float(np.abs(clean).max())
        if not (math.isfinite(sigma) and sigma > 0):
            raise ValueError(
                f"task {self.name!r}: the noiseless data of this image is zero, so a noise level "
                "relative to its peak is undefined; use an image that is not all zeros"
            )
        rng = np.random.default_rng(seed)
        y = clean + sigma * rng.standard_normal(clean.shape)
        fidelity = LeastSquares(op, y, sigma=sigma)
        return Problem(self, tuple(shape), truth, op, y, sigma, fidelity, phantom, seed)

    def describe(self) -> dict:
        """The task as plain JSON-ready values."""
        return {
            "name": self.name,
            "family": self.family,
            "model": self.model.describe(),
            "noise": self.noise,
            "phantom": self.phantom,
            "seed": self.seed,
            "tuning_phantom": self.tuning_phantom,
            "tuning_seed": self.tuning_seed,
        }


def _task(name: str, model: Model, noise: float, phantom: str, seed: int) -> Task:
    # Tuning: same generator (all are random phantoms), seed shifted by 1000.
    return Task(name, model, noise, phantom, seed, phantom, seed + 1000)


_GAUSSIAN = Blur("gaussian", 9, 1.6)
_MOTION = Blur("motion", 9, 7.0, 30.0)

TASKS: dict[str, Task] = {
    task.name: task
    for task in (
        _task("deblur-gaussian-1pct", _GAUSSIAN, 0.01, "cells", 1),
        _task("deblur-gaussian-5pct", _GAUSSIAN, 0.05, "cells", 2),
        _task("deblur-motion-1pct", _MOTION, 0.01, "cells", 3),
        _task("deblur-motion-5pct", _MOTION, 0.05, "cells", 4),
        _task("inpaint-random50", Mask("random", 0.5), 0.01, "piecewise_smooth", 5),
        _task("inpaint-random80", Mask("random", 0.8), 0.01, "piecewise_smooth", 6),
        _task("inpaint-rows-scratches", Mask("rows_scratches", 0.1, 4), 0.01, "cells", 7),
        _task("superres-x2", Downsampling(2), 0.01, "random_ellipses", 8),
        _task("superres-x4", Downsampling(4), 0.01, "random_ellipses", 9),
        _task("ct-30-views", Scan(30), 0.01, "porous_disk", 10),
        _task("ct-60-views", Scan(60), 0.01, "porous_disk", 11),
        _task("ct-limited-120deg", Scan(60, 120.0), 0.01, "porous_disk", 12),
    )
}


# ----------------------------------------------------------------- suites
@dataclass(frozen=True)
class Suite:
    """A set of tasks run at one image size.

    Attributes
    ----------
    name : str
    tasks : tuple of Task
    shape : tuple of int
    max_iter : int
        Iteration cap of every iterative method.
    tol : float
        Relative fixed-point residual at which PnP runs stop.
    check_budget : int
        Denoiser calls for the averagedness check of each black-box denoiser
        (denoisers with verified structure need none).
    """

    name: str
    tasks: tuple[Task, ...]
    shape: Shape
    max_iter: int
    tol: float
    check_budget: int

    def describe(self) -> dict:
        return {
            "name": self.name,
            "tasks": [task.name for task in self.tasks],
            "shape": list(self.shape),
            "max_iter": self.max_iter,
            "tol": self.tol,
            "check_budget": self.check_budget,
        }


_QUICK = ("deblur-gaussian-1pct", "inpaint-random50", "superres-x2", "ct-30-views")

SUITES: dict[str, Suite] = {
    # The quick suite lowers the check budget from the library default of 200
    # calls to 60 to stay within its time limit; the JSON records the budget.
    "quick": Suite("quick", tuple(TASKS[n] for n in _QUICK), (64, 64), 150, 1e-4, 60),
    "full": Suite("full", tuple(TASKS.values()), (128, 128), 300, 1e-4, 200),
}


def suite_names() -> tuple[str, ...]:
    """Names accepted by :func:`get_suite`, sorted."""
    return tuple(sorted(SUITES))


def task_names() -> tuple[str, ...]:
    """Names accepted by :func:`get_task`, in family order."""
    return tuple(TASKS)


def get_task(name: str) -> Task:
    """The task called ``name`` (see :func:`task_names`)."""
    if name not in TASKS:
        raise ValueError(unknown_message("task", name, TASKS))
    return TASKS[name]


def get_suite(name: str) -> Suite:
    """The suite called ``name`` (see :func:`suite_names`)."""
    if name not in SUITES:
        raise ValueError(unknown_message("suite", name, SUITES))
    return SUITES[name]


def custom_suite(
    tasks: tuple[str | Task, ...] | list[str | Task],
    *,
    shape: Shape,
    max_iter: int,
    tol: float = 1e-4,
    check_budget: int = 60,
    name: str = "custom",
) -> Suite:
    """A suite of tasks at a chosen size: shipped ones by name, users' own as :class:`Task` records.

    A user's task (:func:`user_task`) keeps its own image size; the others run
    at ``shape``. Task names must be unique within the suite.
    """
    chosen = []
    for task in tasks:
        if not isinstance(task, (str, Task)):
            raise TypeError(f"`tasks` entries must be task names or Task records, got {type(task).__name__}")
        chosen.append(get_task(task) if isinstance(task, str) else task)
    names = [task.name for task in chosen]
    repeated = sorted({n for n in names if names.count(n) > 1})
    if repeated:
        raise ValueError(f"`tasks` names {repeated[0]!r} more than once; task names must be unique")
    return Suite(name, tuple(chosen), tuple(shape), max_iter, tol, check_budget)


def _user_image(value: Any, name: str) -> np.ndarray:
    tensor, _ = to_tensor(value, name, ndims=(2,))
    return tensor.to(torch.float64).cpu().numpy().copy()


def user_task(
    name: str,
    truth: ArrayLike,
    operator: LinearOperator,
    noise: float,
    *,
    tuning_image: ArrayLike,
    seed: int = 0,
) -> Task:
    """A benchmark task from a user's ground truth, forward model and noise level.

    Parameters
    ----------
    name : str
        Task name in results and reports; must differ from the shipped
        tasks' names.
    truth : numpy.ndarray or torch.Tensor
        ``(H, W)`` float ground truth, in [0, 1] for PSNR/SSIM with data range
        1 to mean what they do for the shipped tasks (copied).
    operator : LinearOperator
        Any pnpguard operator taking ``(H, W)`` images, e.g. from
        :func:`pnpguard.as_operator`; its kind decides the family and so the
        baselines (a blur, mask, decimation or projection get their
        family's; any other operator is :data:`USER_FAMILY`, compared with
        Tikhonov and TV-regularised reconstructions).
    noise : float
        Noise standard deviation as a fraction of the noiseless data's peak,
        in (0, 1), as for the shipped tasks.
    tuning_image : numpy.ndarray or torch.Tensor
        A different ``(H, W)`` image on which every method is tuned (never the
        truth), with noise from ``seed + 1000``.
    seed : int, optional
        Seed of the benchmark noise.

    Returns
    -------
    Task
        Enters a suite through :func:`custom_suite` beside shipped tasks; a
        suite run tunes it on ``tuning_image`` when the tuned parameters lack
        it (:func:`pnpguard.bench.run_suite`).

    Raises
    ------
    TypeError, ValueError
        For a name already used by a shipped task, arrays that are not
        finite float ``(H, W)`` images, a tuning image equal to the truth or
        of another shape, an operator of another image size, or a noise
        level outside (0, 1).
    """
    if not isinstance(name, str) or not name:
        raise TypeError(f"`name` must be a non-empty string, got {name!r}")
    if name in TASKS:
        raise ValueError(f"`name` {name!r} is a shipped task's name; choose another")
    if not isinstance(operator, LinearOperator):
        raise TypeError(f"`operator` must be a pnpguard LinearOperator (see pnpguard.as_operator), got "
                        f"{type(operator).__name__}")
    noise = number_in(noise, "noise", 0.0, 1.0, low_open=True, high_open=True)
    seed = nonnegative_int(seed, "seed")
    image = _user_image(truth, "truth")
    tuning = _user_image(tuning_image, "tuning_image")
    if tuning.shape != image.shape:
        raise ValueError(f"`tuning_image` has shape {tuning.shape} but `truth` has shape {image.shape}")
    if np.array_equal(tuning, image):
        raise ValueError("`tuning_image` equals `truth`; tune on a separate image, never on the ground truth")
    if operator.in_shape != image.shape:
        raise ValueError(f"`operator` takes {operator.in_shape} images but `truth` has shape {image.shape}")
    return Task(name, UserModel(operator), noise, "user truth", seed, "user tuning image", seed + 1000,
                truth=image, tuning_truth=tuning)
