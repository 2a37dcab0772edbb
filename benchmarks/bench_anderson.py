"""Plain against safeguarded Anderson-accelerated runs, per algorithm, over benchmark tasks.

For every task of the chosen suite, every fixed-point algorithm (forward-backward,
Douglas-Rachford, ADMM) and every shipped denoiser the guard admits, at the tuned
strength: map evaluations and wall time to relative residual ``TOL`` with and
without ``accelerate=True`` (same check report, same start: the suites' own, the
interpolated missing pixels on a mask; one thread), the final
PSNR of both, the distance between the two end points, and new monitor flags.
Evaluations count the candidates the safeguard rejected (each costs one map
evaluation). Medians per algorithm at the end.

Run: ``.venv/bin/python benchmarks/bench_anderson.py [quick|full] [--tasks NAME ...]
[--size N] [--denoisers NAME ...] [--tol T] [--max-iter N]`` (default: the quick suite at
its 64 x 64, tol 1e-4).
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np
import torch

from pnpguard import interpolated_start, reconstruct
from pnpguard.bench import denoiser_names, get_denoiser, get_suite, load_tuned
from pnpguard.bench._methods import starts_interpolated
from pnpguard.bench._tasks import DATA_RANGE
from pnpguard.check import check_denoiser
from pnpguard.guarantee import Refused
from pnpguard.metrics import psnr

ALGORITHMS = ("forward_backward", "douglas_rachford", "admm")
TOL = 1e-4
MAX_ITER = 600


def _run(algorithm, problem, denoiser, report, accelerate, tol=TOL, max_iter=MAX_ITER):
    # The suites' start (the interpolated missing pixels on a mask), as the benchmark runs do.
    x0 = interpolated_start(problem.fidelity) if starts_interpolated(problem) else None
    start = time.perf_counter()
    result = reconstruct(
        algorithm, problem.fidelity, denoiser, report=report, x0=x0, max_iter=max_iter, tol=tol,
        accelerate=accelerate, threads=1,
    )
    seconds = time.perf_counter() - start
    evaluations = result.iterations + result.safeguarded + result.back_offs
    return result, evaluations, seconds


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("suite", nargs="?", default="quick")
    parser.add_argument("--tasks", nargs="+", default=None)
    parser.add_argument("--size", type=int, default=None)
    parser.add_argument("--denoisers", nargs="+", default=None)
    parser.add_argument("--tol", type=float, default=TOL,
                        help="relative residual at which both runs stop (a tighter one than the suite's "
                        "puts both near the same fixed point, so their PSNRs can be compared)")
    parser.add_argument("--max-iter", type=int, default=MAX_ITER)
    args = parser.parse_args()
    torch.set_num_threads(1)
    suite = get_suite(args.suite)
    shape = (args.size, args.size) if args.size else suite.shape
    tasks = [t for t in suite.tasks if args.tasks is None or t.name in args.tasks]
    # The gradient-step networks run the descent scheme, which has no accelerated variant.
    names = args.denoisers or [n for n in denoiser_names() if not n.startswith("gradient-step")]
    tuned = load_tuned()
    rows: dict[str, list[tuple[float, float, float, float]]] = {name: [] for name in ALGORITHMS}
    print(f"suite {suite.name} tasks at {shape[0]}x{shape[1]}, tol {args.tol:g}, max_iter {args.max_iter} (one thread)")
    print(f"{'task':<22} {'method':<24} {'evals plain/acc':>16} {'time plain/acc':>16} "
          f"{'PSNR plain/acc':>16} {'dist':>8} flags")
    for task in tasks:
        problem = task.problem(shape)
        for name in names:
            try:
                strength = tuned.strength(task.name, name)
            except KeyError:
                strength = get_denoiser(name).default_strength
            denoiser = get_denoiser(name).make(strength, problem.shape)
            report = check_denoiser(denoiser, problem.start(), budget=suite.check_budget, seed=0)
            for algorithm in ALGORITHMS:
                try:
                    plain, plain_evals, plain_seconds = _run(algorithm, problem, denoiser, report, False,
                                                             args.tol, args.max_iter)
                except Refused:
                    continue
                fast, fast_evals, fast_seconds = _run(algorithm, problem, denoiser, report, True, args.tol, args.max_iter)
                p0 = psnr(np.asarray(plain.x), problem.truth, data_range=DATA_RANGE)
                p1 = psnr(np.asarray(fast.x), problem.truth, data_range=DATA_RANGE)
                distance = float(np.linalg.norm(np.asarray(fast.x) - np.asarray(plain.x)) / np.linalg.norm(plain.x))
                new_flags = sorted({f.kind for f in fast.flags} - {f.kind for f in plain.flags})
                status = "" if plain.converged and fast.converged else (
                    f" (converged {plain.converged}/{fast.converged})")
                print(f"{task.name:<22} {algorithm[:6] + '/' + name:<24} {plain_evals:>7d}/{fast_evals:<8d} "
                      f"{plain_seconds:7.2f}/{fast_seconds:<8.2f} {p0:7.2f}/{p1:<8.2f} {distance:8.1e} "
                      f"{','.join(new_flags) or '-'}{status}")
                rows[algorithm].append((plain_evals / fast_evals, plain_seconds / fast_seconds, p1 - p0,
                                        float(bool(new_flags))))
    print("\nmedians per algorithm (ratios plain / accelerated; PSNR accelerated - plain)")
    for algorithm, values in rows.items():
        if not values:
            continue
        evals, seconds, gain, flagged = zip(*values)
        print(f"  {algorithm:<18} runs {len(values):3d}  evaluations x{statistics.median(evals):.2f} "
              f"(min x{min(evals):.2f})  time x{statistics.median(seconds):.2f}  PSNR {statistics.median(gain):+.3f} dB "
              f"(range {min(gain):+.3f} .. {max(gain):+.3f})  runs with new flags {int(sum(flagged))}")


if __name__ == "__main__":
    main()
