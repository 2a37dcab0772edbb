"""Cost of the potential route: one proximal-gradient iteration against one network pass.

A 256 x 256 periodic deblurring problem (microscope frame of cells, Gaussian
blur, 1 % noise). Measured in one run, interleaved, fastest of five:

- one forward pass of the shipped residual network (no autograd);
- one iteration of ``reconstruct("proximal_gradient", ...)`` with a
  gradient-step network of the same size (forward pass with the graph kept,
  one backward pass, the FFT prox of the data term, backtracking evaluations
  counted), per iteration of a 30-iteration run;
- the wall time of a run to relative tolerance 1e-4 (at most 300 iterations).

The gradient-step network is the shipped one when its weights exist, else an
untrained network of the same architecture (the cost does not depend on the
weights).

Run: ``.venv/bin/python benchmarks/bench_potential.py [--threads N]``
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import torch

import pnpguard as pg
from pnpguard.learned import GRADIENT_STEP_WEIGHTS, GradientStepNetwork, load_network

SIZE = 256
SIGMA = 0.01
#: Denoiser strength (the quick suite's tuned value on Gaussian deblurring is 0.08; 0.04 on motion blur).
STRENGTH = 0.04


def _gradient_step_denoiser(strength: float) -> pg.GradientStepDenoiser:
    # The benchmark suite's parametrisation: weight 1 / strength^2 (see bench/_registry.py).
    weight = 1.0 / strength**2
    if GRADIENT_STEP_WEIGHTS.is_file():
        return pg.learned.gradient_step_cnn(strength, weight=weight)
    network = GradientStepNetwork.from_residual(load_network(pg.learned.RESIDUAL_WEIGHTS))
    return pg.GradientStepDenoiser(
        lambda x: network.potential(x, strength), name="untrained gradient-step", sigma=strength, weight=weight
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--threads", type=int, default=1)
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    truth = pg.phantoms.cells(SIZE, seed=2).astype(np.float32)
    op = pg.Convolution(pg.gaussian_psf(9, 1.6), truth.shape)
    data = (op(truth) + SIGMA * np.random.default_rng(0).standard_normal(truth.shape)).astype(np.float32)
    fidelity = pg.LeastSquares(op, data, sigma=SIGMA)
    residual = load_network(pg.learned.RESIDUAL_WEIGHTS)
    denoiser = _gradient_step_denoiser(STRENGTH)
    report = pg.check_denoiser(denoiser, data, budget=20)
    frame = torch.from_numpy(data)[None, None]
    forward, iteration, scaled = [], [], []
    for _ in range(5):
        start = time.perf_counter()
        with torch.no_grad():
            residual(frame, 0.02)
        forward.append(time.perf_counter() - start)
        result = pg.reconstruct("proximal_gradient", fidelity, denoiser, report=report, max_iter=30, tol=0)
        iteration.append(result.seconds / result.iterations)  # backtracking evaluations included
        started = pg.reconstruct("proximal_gradient", fidelity, denoiser, report=report, max_iter=30, tol=0,
                                 step=1.0 / denoiser.weight)
        scaled.append(started.seconds / started.iterations)
    tv = pg.forward_backward(fidelity, pg.TotalVariation(sigma=0.003), max_iter=300, tol=1e-4, reference=truth)
    run = pg.reconstruct("proximal_gradient", fidelity, denoiser, report=report, max_iter=300, tol=1e-4,
                         reference=truth)
    best_forward, best_iteration, best_scaled = min(forward), min(iteration), min(scaled)
    print(f"{SIZE}x{SIZE} deblurring, float32, {torch.get_num_threads()} torch thread(s), {denoiser.name}")
    print(f"  residual network forward pass     {1e3 * best_forward:8.1f} ms")
    print(f"  proximal-gradient iteration       {1e3 * best_iteration:8.1f} ms   ratio {best_iteration / best_forward:.2f}"
          "  (initial step 1: the first iteration backtracks about log2(weight) times)")
    print(f"  same, initial step 1 / weight     {1e3 * best_scaled:8.1f} ms   ratio {best_scaled / best_forward:.2f}")
    print(f"  run to tol 1e-4: {run.iterations} iterations, {run.seconds:.1f} s, converged={run.converged}, "
          f"final PSNR {run.metrics['psnr'][-1]:.2f} dB, guarantee {run.guarantee.status} "
          f"(TV prox, strength not tuned: {tv.metrics['psnr'][-1]:.2f} dB in {tv.seconds:.1f} s)")


if __name__ == "__main__":
    main()
