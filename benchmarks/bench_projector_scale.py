"""Scale of the parallel-beam projector: stored matrix against matrix-free, in one run.

Three scenes, each in a fresh child process so that its peak resident memory
(``resource.getrusage(...).ru_maxrss``, which includes the interpreter, numpy
and torch, printed separately as "after import") is its own:

* ``compare``: 256 x 256 pixels, 180 angles. Set-up time and peak memory of
  each path; forward + adjoint through the fast path (``apply`` then
  ``apply_adjoint``), float32 and float64, the two paths timed in turn within
  every round (median of the rounds); the ratio matrix-free / stored, in wall
  time and in the process's CPU time (``time.process_time``, which a busy
  machine disturbs less).
* ``512``: 512 x 512, 360 angles, matrix-free (what ``storage="auto"``
  picks): forward + adjoint in both precisions, the certified norm bound, and
  the peak memory of all of it (the stored path needs about 7.8 GB here).
* ``1024``: 1024 x 1024, 720 angles, matrix-free: forward + adjoint in
  float32, then a short guarded run (forward-backward with wavelet
  shrinkage, a few iterations; its step comes from the certified norm
  bound), with the peak memory.

Run: ``.venv/bin/python benchmarks/bench_projector_scale.py [--threads N]
[compare|512|1024]`` (no scene: all three). Torch keeps its default thread
count unless ``--threads`` is given: the matrix-free path issues a few
thousand small tensor operations per product and, with several threads,
keeps them below torch's parallel grain (on a machine that other processes
keep busy, every parallel region waits for a descheduled thread); measured
beside a load of 5-8 on 2 cores, the ratio was 6-7 with 2 threads and 2.3-3
with one. The load
average is printed because the machine may be shared, and ratios are only
meaningful within one run.
"""

from __future__ import annotations

import argparse
import os
import resource
import statistics
import subprocess
import sys
import time

import numpy as np
import torch

import pnpguard as pg

ROUNDS = 15


def peak_mb() -> float:
    """Peak resident memory of this process so far, in MB (Linux reports KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def timed(function) -> tuple[float, object]:
    start = time.perf_counter()
    value = function()
    return time.perf_counter() - start, value


def phantom(size: int) -> np.ndarray:
    return pg.phantoms.make_phantom("shepp_logan", (size, size))


def header(text: str) -> None:
    print(
        f"== {text}; torch threads {torch.get_num_threads()}, load average "
        f"{os.getloadavg()[0]:.2f}, after import {peak_mb():.0f} MB",
        flush=True,
    )


def compare() -> None:
    size, angles = 256, np.arange(180.0)
    header(f"{size} x {size}, {angles.size} angles: stored matrix vs matrix-free")
    setup_matrix, stored = timed(lambda: pg.ParallelProjection((size, size), angles, storage="matrix"))
    after_matrix = peak_mb()
    setup_free, free = timed(lambda: pg.ParallelProjection((size, size), angles, storage="matrix-free"))
    print(f"set-up: stored {setup_matrix:.2f} s (peak {after_matrix:.0f} MB), matrix-free {setup_free:.3f} s")
    image = phantom(size)
    for dtype in (torch.float32, torch.float64):
        x = torch.from_numpy(image).to(dtype)
        error = float((free.apply(x) - stored.apply(x)).abs().max() / stored.apply(x).abs().max())
        paths = {"stored": stored, "matrix-free": free}
        wall = {name: [] for name in paths}
        cpu = {name: [] for name in paths}
        for op in paths.values():
            op.apply_adjoint(op.apply(x))  # warm-up (float32 copy of the matrix)
        for _ in range(ROUNDS):
            for name, op in paths.items():
                start, start_cpu = time.perf_counter(), time.process_time()
                op.apply_adjoint(op.apply(x))
                wall[name].append(time.perf_counter() - start)
                cpu[name].append(time.process_time() - start_cpu)
        stored_wall, free_wall = (statistics.median(wall[n]) for n in paths)
        stored_cpu, free_cpu = (statistics.median(cpu[n]) for n in paths)
        stored_fastest, free_fastest = (min(wall[n]) for n in paths)
        print(
            f"{str(dtype).replace('torch.', '')}: forward + adjoint, stored {1e3 * stored_wall:.1f} ms "
            f"(cpu {1e3 * stored_cpu:.1f}), matrix-free {1e3 * free_wall:.1f} ms (cpu {1e3 * free_cpu:.1f}); "
            f"ratio {free_wall / stored_wall:.2f} wall, {free_cpu / stored_cpu:.2f} cpu "
            f"(medians of {ROUNDS} interleaved rounds), {free_fastest / stored_fastest:.2f} fastest against "
            f"fastest; largest relative difference {error:.1e}"
        )
    print(f"peak {peak_mb():.0f} MB", flush=True)


def scale(size: int, n_angles: int, *, run: bool) -> None:
    angles = np.arange(n_angles) * (180.0 / n_angles)
    header(f"{size} x {size}, {n_angles} angles, storage='auto'")
    setup, op = timed(lambda: pg.ParallelProjection((size, size), angles))
    print(f"set-up {setup:.3f} s, storage {op.storage!r}, sinogram {op.out_shape}")
    image = phantom(size)
    dtypes = (torch.float32,) if run else (torch.float32, torch.float64)
    for dtype in dtypes:
        x = torch.from_numpy(image).to(dtype)
        forward, sinogram = timed(lambda: op.apply(x))
        adjoint, _ = timed(lambda: op.apply_adjoint(sinogram))
        print(
            f"{str(dtype).replace('torch.', '')}: forward {forward:.2f} s, adjoint {adjoint:.2f} s, "
            f"peak {peak_mb():.0f} MB",
            flush=True,
        )
    seconds, bound = timed(op.norm_bound)
    print(f"norm_bound {bound.value:.3f} ({bound.method}, certified={bound.certified}) in {seconds:.1f} s, "
          f"peak {peak_mb():.0f} MB", flush=True)
    if run:
        rng = np.random.default_rng(0)
        clean = op.forward(image.astype(np.float32))
        data = clean + 0.01 * float(clean.max()) * rng.standard_normal(clean.shape).astype(np.float32)
        fidelity = pg.LeastSquares(op, data, sigma=0.01 * float(clean.max()))
        seconds, result = timed(
            lambda: pg.reconstruct("fb", fidelity, pg.WaveletShrinkage(sigma=0.02), max_iter=3)
        )
        print(
            f"guarded forward-backward, 3 iterations: {seconds:.1f} s, status "
            f"{result.guarantee.status!r}, PSNR {pg.psnr(result.x, image.astype(np.float32), data_range=1.0):.2f} dB "
            f"(start {pg.psnr(fidelity.start_image(), image.astype(np.float32), data_range=1.0):.2f} dB), "
            f"peak {peak_mb():.0f} MB",
            flush=True,
        )


SCENES = {
    "compare": compare,
    "512": lambda: scale(512, 360, run=False),
    "1024": lambda: scale(1024, 720, run=True),
}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("scenes", nargs="*", metavar="scene", help=f"any of {', '.join(SCENES)} (default: all)")
    parser.add_argument("--threads", type=int, default=None, help="torch threads (default: torch's)")
    arguments = parser.parse_args()
    unknown = sorted(set(arguments.scenes) - set(SCENES))
    if unknown:
        parser.error(f"unknown scene(s) {', '.join(unknown)}; valid: {', '.join(SCENES)}")
    arguments.scenes = arguments.scenes or list(SCENES)
    if arguments.threads is not None:
        torch.set_num_threads(arguments.threads)
    if len(arguments.scenes) == 1:
        SCENES[arguments.scenes[0]]()
        return
    threads = [] if arguments.threads is None else ["--threads", str(arguments.threads)]
    for name in arguments.scenes:
        subprocess.run([sys.executable, __file__, *threads, name], check=True)


if __name__ == "__main__":
    main()
