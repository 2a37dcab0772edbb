"""Speed and held-out quality of the shipped learned denoisers.

Prints (1) seconds per call on 256x256 and 512x512 float32 images for the
residual CNN and the averaged CNN (median of repeated calls, torch threads as
given), and (2) a PSNR table on the held-out bundled pictures camera, moon and
brick at noise levels 15, 25 and 50 (0-255 scale): residual CNN, averaged CNN
for theta in {0.5, 0.75, 0.9}, its widened variant (gain gamma > 1, no
guarantee), and pnpguard's total-variation and
wavelet soft-thresholding denoisers with their parameter tuned per image and
level on a grid (the best value kept: an oracle tuning that favours them).
The noise protocol is the one recorded with the weights
(``pnpguard.learned._evaluate``).

Usage::

    python benchmarks/bench_learned.py [--threads 2] [--skip-classical]
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np
import torch

from pnpguard import TotalVariation, WaveletShrinkage
from pnpguard.learned import averaged_cnn, residual_cnn
from pnpguard.learned._evaluate import EVALUATION_LEVELS, held_out_table

THETAS = (0.5, 0.75, 0.9)
#: Gains of the widened variant (no guarantee), at theta = 0.9.
GAMMAS = (1.1, 1.25)
#: TV weight grid, in units of sigma.
TV_FACTORS = (0.4, 0.55, 0.7, 0.85, 1.0, 1.2, 1.5, 1.9)
#: Wavelet threshold grid, in units of sigma.
WAVELET_FACTORS = (0.75, 1.0, 1.25, 1.5, 1.75, 2.0, 2.5, 3.0)


def seconds_per_call(denoiser, size: int, repeats: int = 7) -> float:
    image = torch.rand(size, size, generator=torch.Generator().manual_seed(0))
    denoiser.apply(image)  # warm-up
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        denoiser.apply(image)
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def tuned(make, factors):
    """``denoise(noisy, sigma)`` that keeps the best PSNR over ``factors`` (oracle)."""
    def best_of(noisy: np.ndarray, sigma: float, clean: np.ndarray) -> tuple[float, float]:
        results = []
        for factor in factors:
            estimate = make(sigma, factor)(noisy.astype(np.float64))
            mse = float(np.mean((estimate - clean) ** 2))
            results.append((10 * np.log10(1.0 / mse), factor))
        return max(results)

    return best_of


def classical_table(make, factors) -> tuple[dict, dict]:
    from pnpguard.learned._data import HELD_OUT_IMAGES, bundled_image
    from pnpguard.learned._evaluate import noisy_copy

    best_of = tuned(make, factors)
    table, chosen = {}, {}
    for name in HELD_OUT_IMAGES:
        clean = bundled_image(name).astype(np.float64)
        table[name], chosen[name] = {}, {}
        for level in EVALUATION_LEVELS:
            sigma = level / 255
            noisy = noisy_copy(clean.astype(np.float32), sigma)
            value, factor = best_of(noisy, sigma, clean)
            table[name][str(level)] = value
            chosen[name][str(level)] = factor
    return table, chosen


def print_table(rows: dict[str, dict]) -> None:
    names = list(next(iter(rows.values())))
    header = "method".ljust(24) + "".join(f"{n} {lv:>3}".rjust(12) for n in names for lv in EVALUATION_LEVELS)
    print(header)
    for method, table in rows.items():
        cells = "".join(f"{table[n][str(lv)]:12.2f}" for n in names for lv in EVALUATION_LEVELS)
        print(method.ljust(24) + cells)
    print("mean at 25/255:", {m: round(float(np.mean([t[n]["25"] for n in names])), 2) for m, t in rows.items()})


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--skip-classical", action="store_true")
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    torch.set_flush_denormal(True)

    start = time.perf_counter()
    averaged = averaged_cnn(25 / 255, theta=0.9)
    print(f"averaged CNN: loading with verification took {time.perf_counter() - start:.2f} s")
    print(averaged.facts[0] if averaged.facts else "averaged CNN: NO verified fact")
    residual = residual_cnn(25 / 255)
    print(f"\nseconds per call (median of 7, {args.threads} torch threads, float32):")
    for name, denoiser in (("residual CNN", residual), ("averaged CNN", averaged)):
        timing = {size: seconds_per_call(denoiser, size) for size in (256, 512)}
        print(f"  {name:14s} 256x256: {timing[256]:.3f} s   512x512: {timing[512]:.3f} s")

    def network(factory, **options):
        def denoise(noisy: np.ndarray, sigma: float) -> np.ndarray:
            return factory(sigma, **options)(noisy)

        return denoise

    rows = {"residual CNN": held_out_table(network(residual_cnn))}
    for theta in THETAS:
        rows[f"averaged CNN theta={theta:g}"] = held_out_table(network(averaged_cnn, theta=theta))
    for gamma in GAMMAS:
        rows[f"widened theta=0.9 gamma={gamma:g}"] = held_out_table(network(averaged_cnn, theta=0.9, gamma=gamma))
    if not args.skip_classical:
        tv, tv_factors = classical_table(lambda s, f: TotalVariation(weight=f * s), TV_FACTORS)
        wavelet, wavelet_factors = classical_table(
            lambda s, f: WaveletShrinkage(sigma=s, threshold_factor=f), WAVELET_FACTORS
        )
        rows["TV (tuned)"] = tv
        rows["wavelet db4 (tuned)"] = wavelet
        print("\nchosen TV weight factors:", tv_factors)
        print("chosen wavelet threshold factors:", wavelet_factors)
        for label, chosen, grid in (("TV", tv_factors, TV_FACTORS), ("wavelet", wavelet_factors, WAVELET_FACTORS)):
            edges = [(n, lv) for n, by_level in chosen.items() for lv, f in by_level.items() if f in (grid[0], grid[-1])]
            if edges:
                print(f"WARNING: {label} optimum on the edge of its grid at {edges}: widen the grid")
    print("\nheld-out PSNR (dB):")
    print_table(rows)


if __name__ == "__main__":
    main()
