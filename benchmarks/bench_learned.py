"""Speed and held-out quality of the shipped learned denoisers.

Prints (1) seconds per call on 256x256 and 512x512 float32 images for the
residual CNN and the averaged CNN (median of repeated calls, torch threads as
given), and (2) a PSNR table on the held-out bundled pictures camera, moon and
brick at noise levels 15, 25 and 50 (0-255 scale): residual CNN, averaged CNN
for theta in {0.5, 0.75, 0.9}, its widened variant (gain > 1, no
guarantee), and pnpguard's total-variation and
wavelet soft-thresholding denoisers with their parameter tuned on a grid, in
two ways: per image and level (the best value kept for each picture: an oracle
tuning that favours them), and one value per level for the three pictures
together (the best mean PSNR: still tuned on the test pictures, but with one
setting per noise level, as the networks have).
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

from pnpguard import TotalVariation, WaveletShrinkage, psnr
from pnpguard.learned import averaged_cnn, residual_cnn
from pnpguard.learned._evaluate import EVALUATION_LEVELS, held_out_table

THETAS = (0.5, 0.75, 0.9)
#: Gains of the widened variant (no guarantee), at theta = 0.9.
GAINS = (1.1, 1.25)
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


def classical_scores(make, factors) -> dict[tuple[str, str], dict[float, float]]:
    """PSNR of ``make(sigma, factor)`` for every held-out picture, level and grid factor."""
    from pnpguard.learned._data import HELD_OUT_IMAGES, bundled_image
    from pnpguard.learned._evaluate import noisy_copy

    scores = {}
    for name in HELD_OUT_IMAGES:
        clean = bundled_image(name)
        for level in EVALUATION_LEVELS:
            sigma = level / 255
            noisy = noisy_copy(clean, sigma).astype(np.float64)
            scores[name, str(level)] = {factor: psnr(make(sigma, factor)(noisy), clean, data_range=1.0) for factor in factors}
    return scores


def per_image_tuning(scores) -> tuple[dict, dict]:
    """Best factor for each picture and level (oracle): ``(table, chosen)``."""
    table, chosen = {}, {}
    for (name, level), by_factor in scores.items():
        factor = max(by_factor, key=by_factor.get)
        table.setdefault(name, {})[level] = by_factor[factor]
        chosen.setdefault(name, {})[level] = factor
    return table, chosen


def per_level_tuning(scores) -> tuple[dict, dict]:
    """One factor per level, the best mean PSNR over the pictures: ``(table, chosen)``."""
    names = list(dict.fromkeys(name for name, _ in scores))
    levels = list(dict.fromkeys(level for _, level in scores))
    table, chosen = {name: {} for name in names}, {}
    for level in levels:
        factors = scores[names[0], level]
        factor = max(factors, key=lambda f: np.mean([scores[name, level][f] for name in names]))
        chosen[level] = factor
        for name in names:
            table[name][level] = scores[name, level][factor]
    return table, chosen


def print_table(rows: dict[str, dict]) -> None:
    names = list(next(iter(rows.values())))
    header = "method".ljust(30) + "".join(f"{n} {lv:>3}".rjust(12) for n in names for lv in EVALUATION_LEVELS)
    print(header)
    for method, table in rows.items():
        cells = "".join(f"{table[n][str(lv)]:12.2f}" for n in names for lv in EVALUATION_LEVELS)
        print(method.ljust(30) + cells)
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
    for gain in GAINS:
        rows[f"widened theta=0.9 gain={gain:g}"] = held_out_table(network(averaged_cnn, theta=0.9, gain=gain))
    if not args.skip_classical:
        grids = {"TV": TV_FACTORS, "wavelet db4": WAVELET_FACTORS}
        makers = {
            "TV": lambda s, f: TotalVariation(weight=f * s),
            "wavelet db4": lambda s, f: WaveletShrinkage(sigma=s, threshold_factor=f),
        }
        for label, grid in grids.items():
            scores = classical_scores(makers[label], grid)
            rows[f"{label} (per image)"], chosen = per_image_tuning(scores)
            rows[f"{label} (per level)"], level_choice = per_level_tuning(scores)
            print(f"\nchosen {label} factors per image: {chosen}; per level: {level_choice}")
            edges = [(n, lv) for n, by_level in chosen.items() for lv, f in by_level.items() if f in (grid[0], grid[-1])]
            if edges:
                print(f"WARNING: {label} optimum on the edge of its grid at {edges}: widen the grid")
    print("\nheld-out PSNR (dB):")
    print_table(rows)


if __name__ == "__main__":
    main()
