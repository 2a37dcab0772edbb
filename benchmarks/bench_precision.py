"""Per-call time of the shipped networks for float64 against float32 input.

The networks compute in their weights' precision (float32) whatever the input's:
a float64 image is cast once in and the output cast back. Goal: a float64 call
costs at most 1.2x a float32 call. Fastest of ``REPEATS`` calls each,
interleaved, on one thread, at 256 x 256 and 512 x 512.

Run: ``.venv/bin/python benchmarks/bench_precision.py``
"""

from __future__ import annotations

import time

import numpy as np
import torch

import pnpguard as pg

REPEATS = 5
SIZES = (256, 512)


def main() -> None:
    torch.set_num_threads(1)
    networks = {"residual-cnn": pg.residual_cnn(0.05), "averaged-cnn": pg.averaged_cnn(0.05)}
    print(f"per-call time, fastest of {REPEATS}, one thread")
    for size in SIZES:
        image = pg.phantoms.cells(size, seed=0)
        inputs = {np.float32: torch.from_numpy(image.astype(np.float32)),
                  np.float64: torch.from_numpy(image.astype(np.float64))}
        for name, network in networks.items():
            network.apply(inputs[np.float32])  # build the copies once
            network.apply(inputs[np.float64])
            best = {np.float32: float("inf"), np.float64: float("inf")}
            for _ in range(REPEATS):
                for dtype, tensor in inputs.items():
                    start = time.perf_counter()
                    network.apply(tensor)
                    best[dtype] = min(best[dtype], time.perf_counter() - start)
            print(f"  {size}x{size} {name:<13} float32 {best[np.float32]:6.3f} s  float64 "
                  f"{best[np.float64]:6.3f} s  ratio {best[np.float64] / best[np.float32]:.2f}")


if __name__ == "__main__":
    main()
