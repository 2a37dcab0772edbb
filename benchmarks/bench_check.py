"""Cost of checking black-box denoisers, and how the estimate converges with budget.

For each black-box denoiser on a 256 x 256 sample (a noisy bundled image), reports
the calls and seconds of ``check_denoiser`` at the default budget, and the estimated
theta for budgets 25, 50, 100, 200 and 400.

Run: ``.venv/bin/python benchmarks/bench_check.py``
"""

from __future__ import annotations

import time

import numpy as np

import pnpguard as pg

BUDGETS = (25, 50, 100, 200, 400)


def _sample() -> np.ndarray:
    image = pg.phantoms.natural_image("camera", shape=(256, 256))
    return image + 0.1 * np.random.default_rng(0).standard_normal(image.shape)


def _denoisers() -> dict[str, pg.Denoiser]:
    found = {"non-local means (sigma 0.1)": pg.NonLocalMeans(sigma=0.1)}
    residual = getattr(pg, "residual_cnn", None)
    if residual is not None:
        found["residual CNN (sigma 0.1)"] = residual(sigma=0.1)
    return found


def main() -> None:
    sample = _sample()
    print("| denoiser | budget | calls | seconds | theta | Lipschitz | verdict |")
    print("|---|---|---|---|---|---|---|")
    for name, denoiser in _denoisers().items():
        for budget in BUDGETS:
            start = time.perf_counter()
            report = pg.check_denoiser(denoiser, sample, budget=budget, seed=0)
            seconds = time.perf_counter() - start
            print(
                f"| {name} | {budget} | {report.calls} | {seconds:.1f} | {report.theta:.4g} | "
                f"{report.lipschitz:.4g} | {report.verdict} |"
            )


if __name__ == "__main__":
    main()
