"""Speed of the parallel-beam projector against scikit-image, measured in one run.

Scene: the lab's sparse-view test objects at full sampling, a 256 x 256
Shepp-Logan phantom (skimage.data.shepp_logan_phantom, resized) and 180
angles over 180 degrees. Timed, as the median of a few runs:

* setup of :class:`pnpguard.ParallelProjection` with ``storage="matrix"``
  (system matrix and transpose; the matrix-free path is compared with it in
  ``bench_projector_scale.py``);
* one forward projection plus one backprojection (adjoint), float32 and
  float64, through the public numpy interface;
* ``skimage.transform.radon`` plus ``skimage.transform.iradon(filter_name=None)``
  (unfiltered backprojection) on the same image, ``circle=False`` so that both
  see the whole image with a detector covering the diagonal;
* :func:`pnpguard.filtered_backprojection` against ``iradon`` with the ramp filter;
* ``norm()`` and ``norm_bound()`` of a fresh operator (power iteration and
  Collatz-Wielandt bound).

Run: ``.venv/bin/python benchmarks/bench_projection.py``. Ratios are only
meaningful within one run; the load average is printed because the machine
may be shared.
"""

from __future__ import annotations

import os
import statistics
import time
from collections.abc import Callable

import numpy as np
import torch
from skimage.data import shepp_logan_phantom
from skimage.transform import iradon, radon, resize

from pnpguard import ParallelProjection, filtered_backprojection

SIZE = 256
ANGLES = np.arange(180.0)


def median_time(function: Callable[[], object], repeats: int) -> float:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        function()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def main() -> None:
    image = resize(shepp_logan_phantom(), (SIZE, SIZE), anti_aliasing=True)
    image32 = image.astype(np.float32)
    print(
        f"image {SIZE}x{SIZE}, {ANGLES.size} angles, torch threads {torch.get_num_threads()}, "
        f"load average {os.getloadavg()[0]:.2f}"
    )

    setup = median_time(lambda: ParallelProjection((SIZE, SIZE), ANGLES, storage="matrix"), repeats=3)
    op = ParallelProjection((SIZE, SIZE), ANGLES, storage="matrix")
    sinogram = op.forward(image)
    op.forward(image32)  # build the float32 copy outside the timing

    ours64 = median_time(lambda: op.adjoint(op.forward(image)), repeats=7)
    ours32 = median_time(lambda: op.adjoint(op.forward(image32)), repeats=7)
    reference = median_time(
        lambda: iradon(radon(image, ANGLES, circle=False), ANGLES, circle=False, filter_name=None),
        repeats=3,
    )
    reference_sinogram = radon(image, ANGLES, circle=False)
    fbp_ours = median_time(lambda: filtered_backprojection(sinogram, op), repeats=5)
    fbp_reference = median_time(
        lambda: iradon(reference_sinogram, ANGLES, circle=False, filter_name="ramp"), repeats=3
    )

    fresh = ParallelProjection((SIZE, SIZE), ANGLES, storage="matrix")
    start = time.perf_counter()
    norm = fresh.norm()
    norm_time = time.perf_counter() - start
    start = time.perf_counter()
    bound = fresh.norm_bound()
    bound_time = time.perf_counter() - start

    rows = [
        ("ParallelProjection setup", setup, ""),
        ("forward + adjoint, float64", ours64, f"skimage / ours = {reference / ours64:.2f}"),
        ("forward + adjoint, float32", ours32, f"skimage / ours = {reference / ours32:.2f}"),
        ("skimage radon + iradon(filter_name=None)", reference, "reference"),
        (
            "filtered_backprojection (ramp), float64",
            fbp_ours,
            f"skimage / ours = {fbp_reference / fbp_ours:.2f}",
        ),
        ("skimage iradon (ramp)", fbp_reference, "reference"),
        (f"norm() = {norm:.4f}", norm_time, "power iteration"),
        (
            f"norm_bound() = {bound.value:.4f}",
            bound_time,
            "certified" if bound.certified else "estimate",
        ),
    ]
    width = max(len(name) for name, _, _ in rows)
    print(f"{'operation':<{width}}  {'seconds':>8}  note")
    for name, seconds, note in rows:
        print(f"{name:<{width}}  {seconds:8.3f}  {note}")
    per_entry = op.nnz / (SIZE * SIZE * ANGLES.size)
    print(
        f"system matrix: {op.nnz} nonzeros ({per_entry:.2f} per pixel and angle), "
        f"sinogram {op.out_shape}"
    )


if __name__ == "__main__":
    main()
