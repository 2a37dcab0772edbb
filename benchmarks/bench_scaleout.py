"""Wall time of a benchmark suite serially and on a local dask.distributed cluster, and the per-job costs.

Run:  PYTHONPATH=src python benchmarks/bench_scaleout.py [quick|full] [--workers 2] [--serial-results FILE]

Prints the two wall times and their ratio (measured in one run; the machine is shared and noisy),
checks that both runs give the same records (quality, verdicts, iterations), and the table of job
costs (one job = a baseline on a task, or a shipped denoiser with all its algorithms on a task) from
which the time on N workers is estimated: with greedy scheduling of jobs of costs c_j,
max(max_j c_j, sum_j c_j / N) <= T_N <= sum_j c_j / N + max_j c_j (Graham 1969, list scheduling).
"""

from __future__ import annotations

import argparse
import json
import time
from collections import defaultdict

from pnpguard import bench

_TIMING = ("seconds", "check_seconds")


def _job_costs(document: dict) -> dict[tuple[str, str], float]:
    costs: dict[tuple[str, str], float] = defaultdict(float)
    for record in document["results"]:
        job = record["method"] if record["kind"] == "baseline" else f"pnp:{record['denoiser']}"
        costs[(record["task"], job)] += record["seconds"] or 0.0
    return dict(costs)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("suite", nargs="?", default="quick")
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--serial-results", default=None,
                        help="a serial result file of the same suite (skips the serial run)")
    args = parser.parse_args()

    if args.serial_results:
        serial = json.load(open(args.serial_results))
        serial_seconds = serial["seconds"]
    else:
        begin = time.perf_counter()
        serial = bench.run_suite(args.suite).document
        serial_seconds = time.perf_counter() - begin
    begin = time.perf_counter()
    spread = bench.run_suite(args.suite, workers=args.workers).document
    spread_seconds = time.perf_counter() - begin

    def strip(records):
        return [{k: v for k, v in r.items() if k not in _TIMING} for r in records]

    same = strip(serial["results"]) == strip(spread["results"])
    print(f"suite {args.suite}: serial {serial_seconds:.1f} s, {args.workers} workers {spread_seconds:.1f} s "
          f"(incl. cluster start), ratio {serial_seconds / spread_seconds:.2f}; identical records: {same}")

    # Where the time goes: the jobs' own time (measured inside each job) against the wall time.
    # Jobs slower on the workers than serially point at the machine (cores that slow each
    # other down); a wall time well above total / workers points at scheduling and start-up.
    spread_costs = _job_costs(spread)
    serial_total, spread_total = sum(_job_costs(serial).values()), sum(spread_costs.values())
    print(f"jobs' own time: serial {serial_total:.1f} s, on the workers {spread_total:.1f} s "
          f"(x{spread_total / serial_total:.2f}); wall time on {args.workers} workers {spread_seconds:.1f} s "
          f"against {spread_total / args.workers:.1f} s of jobs per worker")

    costs = _job_costs(serial)
    total, longest = sum(costs.values()), max(costs.values())
    print(f"\n{len(costs)} jobs, total {total:.1f} s, longest {longest:.1f} s (serial run's timings)")
    print(f"{'task':<24} {'job':<24} {'seconds':>8}")
    for (task, job), seconds in sorted(costs.items(), key=lambda kv: -kv[1]):
        print(f"{task:<24} {job:<24} {seconds:8.2f}")
    print("\nestimated wall time on N single-threaded workers (jobs only, no cluster start-up):")
    for n in (1, 2, 4, 8, 16, 32):
        low, high = max(longest, total / n), total / n + longest
        print(f"  N = {n:>2}: between {low:7.1f} s and {high:7.1f} s")


if __name__ == "__main__":
    main()
