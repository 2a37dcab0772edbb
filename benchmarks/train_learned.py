"""Reproduce the learned denoiser weights shipped in ``pnpguard/learned/weights``.

Trains the residual CNN and the averaged CNN on bundled scikit-image pictures
plus synthetic frames (never on the held-out pictures camera, moon and brick),
saves the weights, evaluates them on the held-out pictures at noise levels
15, 25 and 50 (on the 0-255 scale) and writes the record ``record.json``
next to the weights.

Usage::

    python benchmarks/train_learned.py residual --threads 1
    python benchmarks/train_learned.py averaged --threads 1

The two runs may be started at the same time, one thread each (this is how
the shipped weights were made, on a 2-core machine shared with other jobs;
a single-threaded process degrades more gracefully under contention). The
step counts fix the run; the wall time depends on the machine and its load.
"""

from __future__ import annotations

import argparse
import json
import platform
import time
from pathlib import Path

import numpy as np
import torch

from pnpguard.learned._data import (
    HELD_OUT_IMAGES,
    TRAINING_IMAGES,
    VALIDATION_IMAGES,
    bundled_image,
    default_training_images,
)
from pnpguard.learned._evaluate import held_out_table
from pnpguard.learned._training import train_denoiser

WEIGHTS = Path(__file__).resolve().parents[1] / "src" / "pnpguard" / "learned" / "weights"

#: Settings of the shipped runs.
RUNS = {
    "residual": {
        "steps": 9000,
        "batch_size": 16,
        "patch_size": 64,
        "depth": 15,
        "width": 64,
        "unshuffle": 2,
        "low_contrast": 0.25,
        "file": "residual_cnn.pt",
    },
    "averaged": {
        "steps": 6000,
        "batch_size": 16,
        "patch_size": 40,
        "depth": 8,
        "width": 32,
        "low_contrast": 0.25,
        "file": "averaged_cnn.pt",
    },
}
THETAS = (0.5, 0.75, 0.9)


def _denoise_with(model: torch.nn.Module, **extra):
    def denoise(noisy: np.ndarray, sigma: float) -> np.ndarray:
        with torch.no_grad():
            tensor = torch.from_numpy(noisy)[None, None]
            return model(tensor, sigma, **extra)[0, 0].numpy()

    return denoise


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("which", choices=sorted(RUNS))
    parser.add_argument("--threads", type=int, default=1)
    parser.add_argument("--steps", type=int, default=None, help="override the shipped step count")
    parser.add_argument("--out", type=Path, default=WEIGHTS)
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    torch.set_flush_denormal(True)
    run = RUNS[args.which]
    steps = args.steps or run["steps"]
    images = default_training_images()
    validation = [bundled_image(name) for name in VALIDATION_IMAGES]
    start = time.perf_counter()
    report = train_denoiser(
        images,
        architecture=args.which,
        steps=steps,
        depth=run["depth"],
        width=run["width"],
        unshuffle=run.get("unshuffle"),
        patch_size=run["patch_size"],
        low_contrast=run["low_contrast"],
        batch_size=run["batch_size"],
        validation_images=validation,
        validate_every=250,
        save_to=args.out / run["file"],
        progress=True,
        seed=0,
    )
    wall = time.perf_counter() - start
    model = report.model
    if args.which == "residual":
        table = held_out_table(_denoise_with(model))
    else:
        table = {f"theta={theta:g}": held_out_table(_denoise_with(model, theta=theta)) for theta in THETAS}
    entry = {
        "file": run["file"],
        "architecture": type(model).__name__,
        "config": model.config(),
        "parameters": sum(p.numel() for p in model.parameters()),
        "steps": report.steps,
        "training_seconds": round(report.seconds, 1),
        "wall_seconds_including_setup": round(wall, 1),
        "torch_threads": args.threads,
        "machine": f"{platform.machine()}, {torch.get_num_threads()} torch thread(s), torch {torch.__version__}",
        "training_images": list(TRAINING_IMAGES) + ["12 synthetic frames (seed 0)"],
        "validation_images": list(VALIDATION_IMAGES),
        "held_out_images": list(HELD_OUT_IMAGES),
        "validation_psnr_history": [[s, round(v, 3)] for s, v in report.validation_psnr],
        "held_out_psnr": table,
        "held_out_protocol": "noisy = clean + (level/255) * n, n ~ N(0, 1) from numpy default_rng(0), float32, PSNR with data range 1",
    }
    record_path = args.out / "record.json"
    record = json.loads(record_path.read_text()) if record_path.exists() else {}
    record[args.which] = entry
    record_path.write_text(json.dumps(record, indent=2) + "\n")
    print(json.dumps(entry["held_out_psnr"], indent=2))
    print(f"training took {report.seconds:.0f} s for {report.steps} steps")


if __name__ == "__main__":
    main()
