"""Reproduce the learned denoiser weights shipped in ``pnpguard/learned/weights``.

Trains the residual CNN (a :class:`MultiscaleResidualCNN`) and the averaged
CNN on bundled scikit-image pictures
plus synthetic frames (never on the held-out pictures camera, moon and brick),
saves the weights, evaluates them on the held-out pictures at noise levels
15, 25 and 50 (on the 0-255 scale) and writes the record ``record.json``
next to the weights.

Usage::

    python benchmarks/train_learned.py residual --threads 1
    python benchmarks/train_learned.py averaged --threads 1
    python benchmarks/train_learned.py gradient-step --threads 1
    python benchmarks/train_learned.py gradient-step-lab --threads 1

Every stage checkpoints its state every 250 steps beside its weights file; an
interrupted run started again with the same command resumes where it stopped
(finished stages are not retrained).

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
    lab_frames,
)
from pnpguard.learned._denoisers import load_network
from pnpguard.learned._evaluate import held_out_table
from pnpguard.learned._training import train_denoiser

WEIGHTS = Path(__file__).resolve().parents[1] / "src" / "pnpguard" / "learned" / "weights"

#: Settings of the shipped runs. A run is a list of stages; every stage after
#: the first starts from the weights the previous one saved (fine-tuning with a
#: new learning-rate cycle and new patches).
RUNS = {
    "residual": {
        "file": "residual_cnn.pt",
        "architecture": "multiscale",
        "network": {"widths": [16, 32, 64, 64], "blocks": 1},
        "stages": [
            {"steps": 18000, "batch_size": 16, "patch_size": 64, "low_contrast": 0.25, "learning_rate": 1e-3, "seed": 0},
            {"steps": 6000, "batch_size": 8, "patch_size": 96, "low_contrast": 0.25, "learning_rate": 3e-4, "seed": 1},
        ],
    },
    "gradient-step": {
        "file": "gradient_step_cnn.pt",
        "architecture": "gradient-step",
        "initial_weights": "residual_cnn.pt",
        "network": {},
        "stages": [
            {"steps": 14000, "batch_size": 16, "patch_size": 64, "low_contrast": 0.25, "learning_rate": 3e-4, "seed": 10},
            {"steps": 4000, "batch_size": 8, "patch_size": 96, "low_contrast": 0.25, "learning_rate": 1e-4, "seed": 11},
        ],
    },
    # The general gradient-step network fine-tuned on the lab's kinds of frames as well
    # (fresh draws of the phantom generators, seeds disjoint from the benchmark's).
    "gradient-step-lab": {
        "file": "gradient_step_lab.pt",
        "architecture": "gradient-step",
        "initial_weights": "gradient_step_cnn.pt",
        "network": {},
        "lab_frames_per_kind": 24,
        "stages": [
            {"steps": 6000, "batch_size": 16, "patch_size": 64, "low_contrast": 0.25, "learning_rate": 1e-4, "seed": 20},
        ],
    },
    "averaged": {
        "file": "averaged_cnn.pt",
        "architecture": "averaged",
        "network": {"depth": 8, "width": 32},
        "stages": [
            {"steps": 6000, "batch_size": 16, "patch_size": 40, "low_contrast": 0.25, "learning_rate": 1e-3, "seed": 0,
             "default_theta": 0.9},
        ],
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
    parser.add_argument("--out", type=Path, default=WEIGHTS)
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    torch.set_flush_denormal(True)
    run = RUNS[args.which]
    images = default_training_images()
    lab_per_kind = run.get("lab_frames_per_kind", 0)
    if lab_per_kind:
        images += lab_frames(lab_per_kind)
    validation = [bundled_image(name) for name in VALIDATION_IMAGES]
    start = time.perf_counter()
    previous = WEIGHTS / run["initial_weights"] if "initial_weights" in run else None
    history, stages = [], []
    for index, stage in enumerate(run["stages"]):
        last = index == len(run["stages"]) - 1
        target = args.out / (run["file"] if last else f"{Path(run['file']).stem}.stage{index + 1}.pt")
        summary = target.with_name(target.name + ".stage.json")
        if summary.is_file() and target.is_file():
            # Finished in an earlier, interrupted invocation: reuse its result.
            done = json.loads(summary.read_text())
            model, stage_history, stage_entry = load_network(target), done["history"], done["stage"]
        else:
            report = train_denoiser(
                images,
                architecture=run["architecture"],
                **(run["network"] if previous is None else {}),
                initial_weights=previous,
                validation_images=validation,
                validate_every=250,
                save_to=target,
                checkpoint=target.with_name(target.name + ".checkpoint"),
                progress=True,
                **stage,
            )
            model = report.model
            stage_history = [[s, round(v, 3)] for s, v in report.validation_psnr]
            stage_entry = {**stage, "steps": report.steps, "training_seconds": round(report.seconds, 1)}
            summary.write_text(json.dumps({"history": stage_history, "stage": stage_entry}) + "\n")
            target.with_name(target.name + ".checkpoint").unlink(missing_ok=True)
        offset = sum(entry["steps"] for entry in stages)
        history += [[offset + s, v] for s, v in stage_history]
        stages.append(stage_entry)
        if previous is not None and index > 0:
            previous.unlink()  # intermediate weights are not shipped
            previous.with_name(previous.name + ".stage.json").unlink(missing_ok=True)
        previous = target
    summary.unlink(missing_ok=True)
    wall = time.perf_counter() - start
    if args.which != "averaged":
        table = held_out_table(_denoise_with(model))
    else:
        table = {f"theta={theta:g}": held_out_table(_denoise_with(model, theta=theta)) for theta in THETAS}
    entry = {
        "file": run["file"],
        "architecture": type(model).__name__,
        "config": model.config(),
        "parameters": sum(p.numel() for p in model.parameters()),
        "steps": sum(stage["steps"] for stage in stages),
        "training_seconds": round(sum(stage["training_seconds"] for stage in stages), 1),
        "stages": stages,
        "wall_seconds_including_setup": round(wall, 1),
        "torch_threads": args.threads,
        "machine": f"{platform.machine()}, {torch.get_num_threads()} torch thread(s), torch {torch.__version__}",
        "training_images": list(TRAINING_IMAGES)
        + ["12 synthetic frames (seed 0)"]
        + ([f"{lab_per_kind} lab frames per phantom kind (128 x 128, seeds from 70000)"] if lab_per_kind else []),
        "validation_images": list(VALIDATION_IMAGES),
        "held_out_images": list(HELD_OUT_IMAGES),
        "validation_psnr_history": history,
        "held_out_psnr": table,
        "held_out_protocol": "noisy = clean + (level/255) * n, n ~ N(0, 1) from numpy default_rng(0), float32, PSNR with data range 1",
    }
    record_path = args.out / "record.json"
    record = json.loads(record_path.read_text()) if record_path.exists() else {}
    record[args.which] = entry
    record_path.write_text(json.dumps(record, indent=2) + "\n")
    print(json.dumps(entry["held_out_psnr"], indent=2))
    print(f"training took {entry['training_seconds']:.0f} s for {entry['steps']} steps")


if __name__ == "__main__":
    main()
