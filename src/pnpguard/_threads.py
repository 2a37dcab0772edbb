"""How many torch threads a run uses: a setting, and a default that respects a shared machine.

Torch's intra-op pool defaults to one thread per physical core. When another
process keeps a core busy, threads that wait for each other at every
operation slow a run down several times over (measured on a 2-core machine:
one wavelet run 2.0 s alone, 6.1 s beside one busy process, 2.4 s with one
thread). :func:`default_threads` therefore counts the CPUs that are idle now
and uses no more threads than that.
"""

from __future__ import annotations

import os
import time
from collections.abc import Iterator
from contextlib import contextmanager

import torch

from ._validation import positive_int

#: Seconds over which the idle CPUs are measured (from /proc/stat, Linux).
IDLE_WINDOW = 0.05
#: Seconds a measurement is reused before the machine is sampled again.
IDLE_CACHE = 30.0
#: A CPU counts as busy when less than this fraction of it was idle (our choice).
BUSY_FRACTION = 0.5

_cache: tuple[float, int] | None = None


def _cpu_times() -> tuple[float, float] | None:
    """(idle, total) jiffies summed over all CPUs, or None where /proc/stat is missing."""
    try:
        with open("/proc/stat") as file:
            fields = [float(value) for value in file.readline().split()[1:]]
    except (OSError, ValueError):
        return None
    idle = fields[3] + (fields[4] if len(fields) > 4 else 0.0)  # idle + iowait
    return idle, sum(fields[:8])


def idle_cpus() -> float:
    """CPUs idle over the last :data:`IDLE_WINDOW` seconds (the calling process sleeps meanwhile).

    Falls back to the CPU count minus the one-minute load average where
    ``/proc/stat`` is not available.
    """
    cpus = os.cpu_count() or 1
    before = _cpu_times()
    if before is None:
        try:
            return max(0.0, cpus - os.getloadavg()[0])
        except OSError:
            return float(cpus)
    time.sleep(IDLE_WINDOW)
    after = _cpu_times()
    total = after[1] - before[1]
    if total <= 0:
        return float(cpus)
    return cpus * (after[0] - before[0]) / total


def default_threads() -> int:
    """Threads for a run: the idle CPUs, at least 1, at most torch's current setting.

    A CPU counts as idle when at least :data:`BUSY_FRACTION` of it was idle;
    the measurement is reused for :data:`IDLE_CACHE` seconds. Never more than
    ``torch.get_num_threads()``, so a lower setting of the caller's is kept.
    """
    global _cache
    now = time.monotonic()
    if _cache is None or now - _cache[0] > IDLE_CACHE:
        _cache = (now, int(idle_cpus() + (1.0 - BUSY_FRACTION)))
    return max(1, min(_cache[1], torch.get_num_threads()))


@contextmanager
def torch_threads(threads: int | None) -> Iterator[int]:
    """Run a block with ``threads`` torch threads (None: :func:`default_threads`), then restore.

    Yields the number of threads used.
    """
    chosen = default_threads() if threads is None else positive_int(threads, "threads")
    before = torch.get_num_threads()
    if chosen != before:
        torch.set_num_threads(chosen)
    try:
        yield chosen
    finally:
        if chosen != before:
            torch.set_num_threads(before)
