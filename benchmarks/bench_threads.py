"""Run time against torch threads, alone and beside a busy process.

A 256 x 256 deblurring run (forward-backward, wavelet shrinkage, 60 iterations,
tolerance 0) with ``threads=1``, ``threads=<all CPUs>`` and the default
(``threads=None``: the CPUs idle now, see :func:`pnpguard._threads.default_threads`),
first as the machine is, then beside one busy process this script starts (a
Python busy loop, ended by its own handle). Fastest of ``REPEATS``, interleaved.
On a machine other jobs share, "alone" means "without our busy process".

Run: ``.venv/bin/python benchmarks/bench_threads.py``
"""

from __future__ import annotations

import os
import subprocess
import sys
import time

import numpy as np

import pnpguard as pg
from pnpguard._threads import default_threads

SIZE = 256
ITERATIONS = 60
REPEATS = 3


def _problem():
    truth = pg.phantoms.cells(SIZE, seed=1)
    op = pg.Convolution(pg.gaussian_psf(9, 1.6), (SIZE, SIZE))
    data = op(truth) + 0.01 * np.random.default_rng(0).standard_normal(truth.shape)
    return pg.LeastSquares(op, data, sigma=0.01)


def _times(fidelity, denoiser, report, settings) -> dict[str, float]:
    best = {label: float("inf") for label, _ in settings}
    for _ in range(REPEATS):
        for label, threads in settings:
            start = time.perf_counter()
            pg.forward_backward(fidelity, denoiser, report=report, max_iter=ITERATIONS, tol=0, threads=threads,
                                accelerate=False)
            best[label] = min(best[label], time.perf_counter() - start)
    return best


def main() -> None:
    cpus = os.cpu_count() or 1
    fidelity = _problem()
    denoiser = pg.WaveletShrinkage(sigma=0.02)
    report = pg.check_denoiser(denoiser, fidelity.y)
    settings = [("threads=1", 1), (f"threads={cpus}", cpus), ("default", None)]
    print(f"{SIZE}x{SIZE} FB/wavelet, {ITERATIONS} iterations, {cpus} CPUs, fastest of {REPEATS}")
    alone = _times(fidelity, denoiser, report, settings)
    print(f"  default picks {default_threads()} thread(s) as the machine is")
    busy = subprocess.Popen([sys.executable, "-c", "while True: pass"])
    try:
        time.sleep(1.0)
        import pnpguard._threads as threads_module

        threads_module._cache = None  # measure the machine again, with the busy process
        print(f"  default picks {default_threads()} thread(s) beside the busy process")
        beside = _times(fidelity, denoiser, report, settings)
    finally:
        busy.kill()
        busy.wait()
    for label, _ in settings:
        print(f"  {label:<11} as is {alone[label]:6.2f} s   beside a busy process {beside[label]:6.2f} s "
              f"(x{beside[label] / alone[label]:.2f})")


if __name__ == "__main__":
    main()
