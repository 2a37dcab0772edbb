"""Start time of the ``pnpguard`` command line.

Runs each command ``REPEATS`` times in a fresh interpreter (as the installed
script does) and prints the fastest and the median wall time. The goal for
``--help`` and ``list`` is under 1 s: they import no torch, scikit-image,
matplotlib or dask (``pnpguard list phantoms`` imports scikit-image for the
bundled pictures; ``list`` of suites, tasks, denoisers and algorithms reads
tables that import torch).

Run: ``.venv/bin/python benchmarks/bench_cli.py``
"""

from __future__ import annotations

import statistics
import subprocess
import sys
import time

COMMANDS = (
    ("--help",),
    ("--version",),
    ("list",),
    ("list", "--help"),
    ("list", "phantoms"),
    ("list", "algorithms"),
    ("check", "--help"),
)
REPEATS = 5


def _seconds(args: tuple[str, ...]) -> float:
    start = time.perf_counter()
    subprocess.run([sys.executable, "-m", "pnpguard", *args], capture_output=True, check=False)
    return time.perf_counter() - start


def main() -> None:
    print(f"pnpguard start time, {REPEATS} runs each (fastest / median)")
    for args in COMMANDS:
        times = [_seconds(args) for _ in range(REPEATS)]
        print(f"  pnpguard {' '.join(args):<18} {min(times):6.2f} s / {statistics.median(times):6.2f} s")


if __name__ == "__main__":
    main()
