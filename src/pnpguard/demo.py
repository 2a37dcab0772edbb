"""The main job, end to end: deblur a microscope frame of cells with a guarantee.

Run with ``pnpguard demo``, ``python -m pnpguard.demo`` or ``make demo``
(options ``--size N`` and ``--seed N``). The scene: the lab's
widefield microscope blurs a frame of fluorescent cells (Gaussian point-spread
function, 1.6 px) and adds 1 % noise. The demo

1. checks a total-variation denoiser, whose firm nonexpansiveness is proved
   from its structure, turns the proof into an admissible step through a
   published theorem, and runs guarded forward-backward and ADMM;
2. checks non-local means, a strong black box, finds a concrete pair it
   expands, and shows the refusal with its reasons and ways out.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from . import phantoms
from ._caution import CAUTION
from .check import CheckReport, check_denoiser
from .denoisers import NonLocalMeans, TotalVariation
from .fidelity import LeastSquares
from .guarantee import Refused
from .metrics import psnr
from .operators import Convolution, gaussian_psf
from .solvers import Reconstruction, admm, forward_backward

#: Default side of the frame in pixels.
DEFAULT_SIZE = 128
#: Smallest side: the 9 x 9 point-spread function with room around it.
MIN_SIZE = 16
#: Default seed of the frame and of the noise.
DEFAULT_SEED = 3


@dataclass(frozen=True)
class DemoOutcome:
    """What the demo measured (returned for tests and notebooks)."""

    data_psnr: float
    runs: dict[str, Reconstruction]
    refusal: Refused
    black_box_report: CheckReport
    seconds: float


def _section(title: str) -> None:
    print(f"\n== {title} " + "=" * max(0, 70 - len(title)))


def run_demo(*, size: int = DEFAULT_SIZE, seed: int = DEFAULT_SEED, verbose: bool = True) -> DemoOutcome:
    """Run the demo and return its numbers.

    Parameters
    ----------
    size : int
        Side of the synthetic frame in pixels, at least ``MIN_SIZE`` (16).
    seed : int
        Seed of the frame and of the noise.
    verbose : bool
        Print the reports as the demo goes.

    Raises
    ------
    ValueError
        If ``size`` is not an integer >= ``MIN_SIZE``.
    """
    if isinstance(size, bool) or not isinstance(size, int) or size < MIN_SIZE:
        raise ValueError(f"`size` must be an integer >= {MIN_SIZE}, got {size!r}")
    say = print if verbose else (lambda *args, **kwargs: None)
    start = time.perf_counter()
    truth = phantoms.cells(size, seed=seed)
    blur = Convolution(gaussian_psf(9, 1.6), truth.shape)
    noise = 0.01
    data = blur(truth) + noise * np.random.default_rng(seed).standard_normal(truth.shape)
    fidelity = LeastSquares(blur, data, sigma=noise)
    data_psnr = psnr(data, truth, data_range=1.0)
    if verbose:
        _section("scene")
    say(f"synthetic {truth.shape[0]}x{truth.shape[1]} frame of fluorescent cells (seed {seed}), "
        f"blurred by {blur!r}")
    say(f"noise 1 % of full scale; data PSNR {data_psnr:.2f} dB")
    say(f"data term: L = {fidelity.lipschitz:.4g} (certified), mu = {fidelity.strong_convexity:.3g}")

    # The iteration feeds the denoiser x - step grad f(x), much less noisy than the data,
    # hence a strength well below the data's noise level (tuned on another seed).
    tv = TotalVariation(sigma=0.001)
    if verbose:
        _section("1. a denoiser with proved structure: total variation")
    report = check_denoiser(tv, fidelity.op.adjoint(data))
    say(report)
    runs = {}
    for solver in (forward_backward, admm):
        result = solver(fidelity, tv, report=report, reference=truth, data_range=1.0, max_iter=300)
        runs[f"{solver.__name__} + tv"] = result
        if verbose:
            _section(f"{solver.__name__} with total variation")
        say(result.guarantee)
        say(result)

    if verbose:
        _section("2. a black-box denoiser: non-local means")
    nlm = NonLocalMeans(sigma=0.01)
    black_box = check_denoiser(nlm, fidelity.op.adjoint(data), budget=100)
    say(black_box)
    try:
        forward_backward(fidelity, nlm, report=black_box)
    except Refused as refusal:
        caught = refusal
        say(refusal)
    else:  # pragma: no cover - the check finds an expansion on this scene
        raise AssertionError("non-local means was expected to be refused")

    seconds = time.perf_counter() - start
    if verbose:
        _section("summary")
        for name, result in runs.items():
            say(
                f"{name:<28} PSNR {result.metrics['psnr'][-1]:6.2f} dB  "
                f"({result.iterations} iterations, guarantee {result.guarantee.status})"
            )
        say(f"{'non-local means':<28} refused: {caught.reasons[0]}")
        say(f"demo time {seconds:.1f} s")
        say("\n" + CAUTION)
    return DemoOutcome(data_psnr, runs, caught, black_box, seconds)


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of ``python -m pnpguard.demo``: the same as ``pnpguard demo``.

    Parameters
    ----------
    argv : sequence of str, optional
        Options of the demo (``--size N``, ``--seed N``); default ``sys.argv[1:]``.

    Returns
    -------
    int
        Exit status: 0, or 2 after a usage error (one line on standard error).
    """
    from .cli import main as command_line

    return command_line(["demo", *(sys.argv[1:] if argv is None else argv)])


if __name__ == "__main__":
    raise SystemExit(main())
