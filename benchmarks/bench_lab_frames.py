"""Denoising on the lab's kinds of frames: TV, the gradient-step network, its lab fine-tune.

Three unseen 128 x 128 draws (seeds 101-103) of each phantom kind the lab's
tasks use, Gaussian noise at two levels; mean PSNR (data range 1). TV is
scikit-image's ``denoise_tv_chambolle`` with its weight chosen per frame on a
25-point geometric grid against the truth (an oracle choice, which favours it).

Run: ``.venv/bin/python benchmarks/bench_lab_frames.py``
"""

from __future__ import annotations

import numpy as np
import torch
from skimage.restoration import denoise_tv_chambolle

from pnpguard.learned import gradient_step_cnn, lab_gradient_step_cnn
from pnpguard.metrics import psnr
from pnpguard.phantoms import make_phantom

KINDS = ("cells", "piecewise_smooth", "random_ellipses", "porous_disk")
LEVELS = (0.02, 0.05)
SEEDS = (101, 102, 103)
TV_WEIGHTS = np.geomspace(0.005, 0.5, 25)


def main() -> None:
    torch.set_num_threads(1)
    print("| frames | sigma | TV (oracle weight) | gradient-step CNN | lab frames |")
    print("|---|---|---|---|---|")
    for kind in KINDS:
        for level in LEVELS:
            scores = {"tv": [], "general": [], "lab": []}
            for seed in SEEDS:
                clean = make_phantom(kind, (128, 128), seed=seed)
                noisy = clean + level * np.random.default_rng(seed).standard_normal(clean.shape)
                scores["tv"].append(max(psnr(denoise_tv_chambolle(noisy, weight=w), clean, data_range=1.0)
                                        for w in TV_WEIGHTS))
                for name, make in (("general", gradient_step_cnn), ("lab", lab_gradient_step_cnn)):
                    denoised = np.asarray(make(level)(noisy.astype(np.float32)))
                    scores[name].append(psnr(denoised, clean, data_range=1.0))
            means = " | ".join(f"{np.mean(scores[k]):.2f}" for k in ("tv", "general", "lab"))
            print(f"| {kind.replace('_', ' ')} | {level:g} | {means} |")


if __name__ == "__main__":
    main()
