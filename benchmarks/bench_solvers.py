"""Per-iteration overhead of the guarded solvers against a bare torch loop.

A 512 x 512 periodic deblurring problem with a cheap denoiser (periodic Gaussian
smoothing, proved averaged): the library's forward-backward with the monitor on,
against a bare torch loop doing the same arithmetic (gradient step, smoothing,
residual norm; relaxation 1, the recommended value here, so no relaxation step). Also iterations to tolerance for FB, DR and ADMM.

Run: ``.venv/bin/python benchmarks/bench_solvers.py``
"""

from __future__ import annotations

import sys
import time

import numpy as np
import torch

import pnpguard as pg

SIZE = 512
ITERATIONS = 100
REPEATS = 15


def _problem():
    truth = pg.phantoms.cells(SIZE, seed=1)
    op = pg.Convolution(pg.gaussian_psf(9, 1.6), (SIZE, SIZE))
    data = op(truth) + 0.01 * np.random.default_rng(0).standard_normal(truth.shape)
    return truth, op, pg.LeastSquares(op, data, sigma=0.01)


def _bare_loop(fidelity, denoiser, step, x0, iterations):
    op, y, weight = fidelity.op, fidelity.y, 1.0 / fidelity.sigma**2
    transfer = op._transfer.like(x0)
    x = x0
    start = time.perf_counter()
    for _ in range(iterations):
        blurred = torch.fft.irfft2(torch.fft.rfft2(x) * transfer, s=x.shape)
        grad = weight * torch.fft.irfft2(torch.fft.rfft2(blurred - y) * transfer.conj(), s=x.shape)
        image = denoiser.apply(x - step * grad)
        residual = torch.linalg.vector_norm(image - x)
        x = image  # relaxation 1, as the guarantee recommends here
        float(residual)
    return time.perf_counter() - start


def main() -> None:
    truth, op, fidelity = _problem()
    denoiser = pg.GaussianSmoothing(0.6, shape=(SIZE, SIZE))
    report = pg.check_denoiser(denoiser, fidelity.y)
    guarantee = pg.admissible("forward_backward", fidelity, report)
    x0 = op.apply_adjoint(fidelity.y)
    bare_times, library_times = [], []
    torch.set_num_threads(1)
    for _ in range(REPEATS):  # interleaved, so both see the same machine load
        bare_times.append(_bare_loop(fidelity, denoiser, guarantee.step, x0, ITERATIONS))
        library_times.append(
            pg.forward_backward(
                fidelity, denoiser, report=report, x0=x0, max_iter=ITERATIONS, tol=0, threads=1,
                accelerate=False,  # the plain iteration against the same arithmetic written out
            ).seconds
        )
    bare, library = min(bare_times), min(library_times)
    # Each library run against the bare run just before it: the median of these paired
    # ratios is steadier than the ratio of minima when the machine's load drifts.
    paired = float(np.median(np.array(library_times) / np.array(bare_times)))
    print(f"{SIZE}x{SIZE} deblurring, {ITERATIONS} iterations, Gaussian smoothing, {torch.get_num_threads()} threads")
    print(f"  bare torch loop       {1e3 * bare / ITERATIONS:7.2f} ms/iteration")
    print(f"  forward_backward      {1e3 * library / ITERATIONS:7.2f} ms/iteration "
          f"(monitor on), overhead {100 * (library / bare - 1):+.1f} % (fastest against fastest), "
          f"{100 * (paired - 1):+.1f} % (median of {REPEATS} paired ratios)")
    if "--overhead" in sys.argv:
        return
    print("\niterations to relative residual 1e-4 (TV prox denoiser, sigma 0.001, 256 x 256)")
    small = pg.phantoms.cells(256, seed=1)
    blur = pg.Convolution(pg.gaussian_psf(9, 1.6), small.shape)
    data = blur(small) + 0.01 * np.random.default_rng(0).standard_normal(small.shape)
    problem = pg.LeastSquares(blur, data, sigma=0.01)
    tv = pg.TotalVariation(sigma=0.001)
    for solver in (pg.forward_backward, pg.douglas_rachford, pg.admm):
        result = solver(problem, tv, reference=small, data_range=1.0, max_iter=1000, tol=1e-4)
        print(f"  {solver.__name__:<18} {result.iterations:5d} iterations, {result.seconds:6.1f} s, "
              f"PSNR {result.metrics['psnr'][-1]:.2f} dB, converged {result.converged}")


if __name__ == "__main__":
    main()
