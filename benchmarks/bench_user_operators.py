"""Cost of users' operators against the shipped projector, in one run.

A 128 x 128, 30-view system matrix (3840 x 16384, about a million nonzeros, the case of
issue 16) wrapped four ways by ``pnpguard.as_operator``: the scipy.sparse matrix (kept as
a torch CSR tensor), a scipy ``LinearOperator``, a pair of numpy functions, and the
shipped ``ParallelProjection`` that holds the same matrix. Reports construction time
(adjoint test and norm bound) and the median time of ``apply_normal`` (forward +
adjoint) on one image and on a batch of 8, with ratios to the shipped projector; the
machine is shared, so only ratios measured in one run mean anything.

Run: ``.venv/bin/python benchmarks/bench_user_operators.py``
"""

from __future__ import annotations

import statistics
import time

import numpy as np
import scipy.sparse.linalg
import torch

import pnpguard as pg

SIDE = 128
ANGLES = np.arange(30) * 6.0
REPEATS = 20


def _median(function, repeats: int = REPEATS) -> float:
    function()
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        function()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def main() -> None:
    shipped = pg.ParallelProjection((SIDE, SIDE), ANGLES, n_detectors=128)
    master = shipped._matrix.master
    matrix = scipy.sparse.csr_matrix(
        (master.values().numpy(), master.col_indices().numpy(), master.crow_indices().numpy()), shape=master.shape
    )
    out = shipped.out_shape
    builders = {
        "shipped ParallelProjection": lambda: pg.ParallelProjection((SIDE, SIDE), ANGLES, n_detectors=128),
        "as_operator(scipy.sparse)": lambda: pg.as_operator(matrix, (SIDE, SIDE), out),
        "as_operator(scipy LinearOperator)": lambda: pg.as_operator(
            scipy.sparse.linalg.aslinearoperator(matrix), (SIDE, SIDE), out
        ),
        "as_operator(numpy functions)": lambda: pg.as_operator(
            lambda x: (matrix @ x.ravel()).reshape(out), (SIDE, SIDE), out,
            adjoint=lambda y: (matrix.T @ y.ravel()).reshape(SIDE, SIDE),
        ),
    }
    one = torch.rand(SIDE, SIDE, dtype=torch.float64)
    batch = torch.rand(8, 1, SIDE, SIDE, dtype=torch.float64)
    rows = []
    for name, build in builders.items():
        start = time.perf_counter()
        op = build()
        bound = op.norm_bound()
        built = time.perf_counter() - start
        rows.append((name, built, bound, _median(lambda: op.apply_normal(one)), _median(lambda: op.apply_normal(batch))))
    reference = rows[0]
    print(f"{SIDE}x{SIDE}, {len(ANGLES)} views, {matrix.nnz} nonzeros, torch threads {torch.get_num_threads()}")
    for name, built, bound, single, batched in rows:
        print(
            f"{name:36s} build+norm {built:6.2f} s  norm {bound.value:.6g} ({bound.basis})  "
            f"A^T A x: 1 image {1e3 * single:7.2f} ms ({single / reference[3]:.2f}x), "
            f"8 images {1e3 * batched:7.2f} ms ({batched / reference[4]:.2f}x)"
        )


if __name__ == "__main__":
    main()
