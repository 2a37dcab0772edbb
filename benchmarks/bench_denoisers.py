"""Benchmark of the classical denoisers on scikit-image's bundled test images.

Denoises camera, moon and brick (512 x 512, float in [0, 1]) corrupted by
seeded additive Gaussian noise of standard deviation 15, 25 and 50 on a 0-255
scale, and prints one markdown table: PSNR and SSIM (skimage.metrics,
``data_range=1``) and the time per image, for every denoiser at its documented
default strength and, for Gaussian smoothing, wavelet shrinkage and TV, at the
best strength of a small grid (an oracle choice using the clean image: the
"best-tuned" baselines).

``--calibrate`` instead prints how the default strength rules were chosen: the
mean PSNR loss of each strength factor against the best factor of the grid on
other images (grass, gravel, Shepp-Logan), which never enter the benchmark.

Inputs are float32 tensors; torch runs on ``--threads`` CPU threads (default 1).

Usage::

    python benchmarks/bench_denoisers.py [--calibrate] [--threads N] [--seed S]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import torch
from skimage import data
from skimage.metrics import peak_signal_noise_ratio, structural_similarity

from pnpguard import GaussianSmoothing, NonLocalMeans, TotalVariation, WaveletShrinkage
from pnpguard.denoisers._tv import DEFAULT_WEIGHT_FACTOR
from pnpguard.denoisers._wavelet import DEFAULT_THRESHOLD_FACTOR

NOISE_LEVELS = (15, 25, 50)  # on a 0-255 scale
BENCH_IMAGES = ("camera", "moon", "brick")
CALIBRATION_IMAGES = ("grass", "gravel", "shepp_logan_phantom")
WAVELET_FACTORS = (0.75, 1.0, 1.25, 1.5, 1.75, 2.0, 2.5, 3.0)
TV_FACTORS = (0.35, 0.5, 0.6, 0.7, 0.85, 1.0, 1.2, 1.4)
GAUSSIAN_WIDTHS = (0.5, 0.75, 1.0, 1.5, 2.0)
SPINS = 4  # cycle spinning over 4 x 4 shifts


def load(name: str) -> np.ndarray:
    image = getattr(data, name)()
    if image.dtype == np.uint8:
        return image.astype(np.float64) / 255.0
    return image.astype(np.float64)


def noisy_copy(image: np.ndarray, level: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return (image + level / 255.0 * rng.standard_normal(image.shape)).astype(np.float32)


def run(denoiser, clean: np.ndarray, noisy: np.ndarray) -> tuple[float, float, float]:
    start = time.perf_counter()
    out = denoiser(noisy).astype(np.float64)
    seconds = time.perf_counter() - start
    psnr = peak_signal_noise_ratio(clean, out, data_range=1.0)
    ssim = structural_similarity(clean, out, data_range=1.0)
    return psnr, ssim, seconds


def wavelet(sigma: float, factor: float, spins: int = 1) -> WaveletShrinkage:
    name = "wavelet db4" if spins == 1 else f"wavelet db4, {spins}x{spins} spins"
    return WaveletShrinkage(sigma=sigma, threshold_factor=factor, cycle_spins=spins, name=name)


def tv(sigma: float, factor: float) -> TotalVariation:
    return TotalVariation(sigma=sigma, weight=factor * sigma)


def best_of(make, grid, clean, noisy):
    """The grid value with the highest PSNR and its (psnr, ssim, seconds)."""
    results = [(value, run(make(value), clean, noisy)) for value in grid]
    return max(results, key=lambda item: item[1][0])


def benchmark(seed: int) -> None:
    header = "| image | noise | denoiser | strength | PSNR (dB) | SSIM | time (s) |"
    print(header)
    print("|" + "---|" * 7)
    for i, name in enumerate(BENCH_IMAGES):
        clean = load(name)
        for j, level in enumerate(NOISE_LEVELS):
            noisy = noisy_copy(clean, level, seed + 10 * i + j)
            sigma = level / 255.0
            rows = []
            noisy_psnr = peak_signal_noise_ratio(clean, noisy.astype(np.float64), data_range=1.0)
            noisy_ssim = structural_similarity(clean, noisy.astype(np.float64), data_range=1.0)
            rows.append(("noisy input", "-", (noisy_psnr, noisy_ssim, 0.0)))
            rows.append(("gaussian", "width 1", run(GaussianSmoothing(1.0), clean, noisy)))
            width, result = best_of(lambda w: GaussianSmoothing(w), GAUSSIAN_WIDTHS, clean, noisy)
            rows.append(("gaussian (best)", f"width {width:g}", result))
            default = DEFAULT_THRESHOLD_FACTOR
            rows.append(("wavelet db4", f"t = {default:g} sigma", run(wavelet(sigma, default), clean, noisy)))
            factor, result = best_of(lambda k: wavelet(sigma, k), WAVELET_FACTORS, clean, noisy)
            rows.append(("wavelet db4 (best)", f"t = {factor:g} sigma", result))
            spun = run(wavelet(sigma, default, SPINS), clean, noisy)
            rows.append((f"wavelet db4 spun {SPINS}x{SPINS}", f"t = {default:g} sigma", spun))
            factor, result = best_of(lambda k: wavelet(sigma, k, SPINS), WAVELET_FACTORS, clean, noisy)
            rows.append((f"wavelet db4 spun {SPINS}x{SPINS} (best)", f"t = {factor:g} sigma", result))
            weight = DEFAULT_WEIGHT_FACTOR
            rows.append(("tv", f"w = {weight:g} sigma", run(tv(sigma, weight), clean, noisy)))
            factor, result = best_of(lambda k: tv(sigma, k), TV_FACTORS, clean, noisy)
            rows.append(("tv (best)", f"w = {factor:g} sigma", result))
            rows.append(("nlm", "h = 0.8 sigma", run(NonLocalMeans(sigma=sigma), clean, noisy)))
            for label, strength, (psnr, ssim, seconds) in rows:
                print(
                    f"| {name} | {level} | {label} | {strength} | {psnr:.2f} | {ssim:.3f} | "
                    f"{seconds:.3f} |",
                    flush=True,
                )


def calibrate(seed: int) -> None:
    """Mean PSNR loss of each strength factor against the best one, per family."""
    families = {
        "wavelet db4, t = k sigma": (WAVELET_FACTORS, lambda s, k: wavelet(s, k)),
        "tv, w = k sigma": (TV_FACTORS, tv),
    }
    for family, (grid, make) in families.items():
        losses = np.zeros(len(grid))
        cases = 0
        for i, name in enumerate(CALIBRATION_IMAGES):
            clean = load(name)
            for j, level in enumerate(NOISE_LEVELS):
                noisy = noisy_copy(clean, level, seed + 100 + 10 * i + j)
                psnr = np.array([run(make(level / 255.0, k), clean, noisy)[0] for k in grid])
                losses += psnr.max() - psnr
                cases += 1
                print(f"{family} | {name} | {level} | " + " ".join(f"{p:.2f}" for p in psnr), flush=True)
        print(f"\n| {family}: k | " + " | ".join(f"{k:g}" for k in grid) + " |")
        print("|---|" + "---|" * len(grid))
        print("| mean loss (dB) | " + " | ".join(f"{v / cases:.2f}" for v in losses) + " |\n")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--calibrate", action="store_true", help="print the strength calibration")
    parser.add_argument("--threads", type=int, default=1, help="torch CPU threads")
    parser.add_argument("--seed", type=int, default=0, help="noise seed")
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    if args.calibrate:
        calibrate(args.seed)
    else:
        benchmark(args.seed)


if __name__ == "__main__":
    main()
