"""Independent jobs, run serially or on a dask.distributed cluster, one result per job.

The benchmark suite, the strength choice and the strength sweep each split
their work into independent jobs (a module-level function and one argument per
job) and hand them to :func:`run_jobs`. It runs them in the calling process
(the default), on a local cluster sized to the machine, or on an existing
cluster given by its scheduler address, and returns one :class:`JobResult` per
job, in the order of the jobs, whatever the order in which they finish.

Faults: a job that raises is recorded with its error and the others go on; a
worker that dies during a job is replaced and the scheduler runs the job again
on another worker (dask.distributed's ``allowed-failures``, default 3); a job
that kills its workers more often than that is recorded as failed with the
scheduler's error. No job is lost, none is counted twice: results are keyed by
the job's position, not by arrival.
"""

from __future__ import annotations

import os
import sys
import traceback
import uuid
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

from ._validation import positive_int

#: What ``workers`` accepts besides a count: a local cluster with one worker per CPU.
AUTO = "auto"


@dataclass(frozen=True)
class JobResult:
    """What one job returned, or why it has no result.

    Attributes
    ----------
    value : object
        The job function's return value (None when it failed).
    error : str or None
        ``"ExceptionType: message"`` and the innermost traceback line when the
        job raised or its worker died too often; None on success.
    """

    value: Any
    error: str | None

    @property
    def ok(self) -> bool:
        """True when the job returned."""
        return self.error is None


def _describe(error: BaseException) -> str:
    frames = traceback.extract_tb(error.__traceback__)
    where = f" (at {frames[-1].filename}:{frames[-1].lineno})" if frames else ""
    return f"{type(error).__name__}: {error}{where}"


def _guarded(function: Callable[[Any], Any], job: Any, threads: int) -> JobResult:
    """Run one job with ``threads`` torch threads; an exception becomes a recorded error."""
    import torch

    previous = torch.get_num_threads()
    torch.set_num_threads(threads)
    try:
        return JobResult(function(job), None)
    except Exception as error:  # a failing job is a result; the others go on
        return JobResult(None, _describe(error))
    finally:
        torch.set_num_threads(previous)


def local_workers(workers: int | str) -> int:
    """The number of local workers ``workers`` asks for (``"auto"``: one per CPU)."""
    if workers == AUTO:
        return os.cpu_count() or 1
    if isinstance(workers, str):
        raise ValueError(f"`workers` must be a positive integer or {AUTO!r}, got {workers!r}")
    return positive_int(workers, "workers")


def run_jobs(
    function: Callable[[Any], Any],
    jobs: Sequence[Any],
    *,
    workers: int | str | None = None,
    scheduler: str | Any | None = None,
    threads: int = 1,
    progress: bool = False,
    description: str = "jobs",
) -> list[JobResult]:
    """Run ``function(job)`` for every job; one result per job, in the jobs' order.

    Parameters
    ----------
    function : callable
        A module-level function (it is pickled to reach the workers).
    jobs : sequence
        One picklable argument per job.
    workers : int or "auto", optional
        Run on a local dask.distributed cluster of this many worker processes
        (``"auto"``: one per CPU), each with one thread. Default: serially in
        this process.
    scheduler : str or distributed.Client, optional
        The address of an existing dask.distributed scheduler (e.g.
        ``"tcp://10.0.0.5:8786"``) or a connected client: run there. Excludes
        ``workers``.
    threads : int, optional
        Torch intra-op threads during each job (restored afterwards).
    progress : bool, optional
        One progress bar on standard error, advanced as jobs finish.
    description : str, optional
        The progress bar's label.

    Returns
    -------
    list of JobResult

    Raises
    ------
    ValueError
        If both ``workers`` and ``scheduler`` are given, or ``workers`` is not
        a positive integer or ``"auto"``.
    """
    threads = positive_int(threads, "threads")
    if workers is not None and scheduler is not None:
        raise ValueError(
            f"give `workers` (a local cluster) or `scheduler` (an existing one), not both; got "
            f"workers={workers!r} and scheduler={scheduler!r}"
        )
    jobs = list(jobs)
    bar = None
    if progress:
        from tqdm import tqdm

        bar = tqdm(total=len(jobs), desc=description, unit="job", file=sys.stderr)
    try:
        if workers is None and scheduler is None:
            results = []
            for job in jobs:
                results.append(_guarded(function, job, threads))
                if bar is not None:
                    bar.update(1)
            return results
        return _distributed(function, jobs, workers, scheduler, threads, bar)
    finally:
        if bar is not None:
            bar.close()


#: Environment variables dask.distributed's nanny sets in a new worker that the local
#: cluster leaves out. ``MALLOC_TRIM_THRESHOLD_`` (65536 by default) makes glibc give memory
#: back to the system after every large free, so the many short-lived tensors of a
#: reconstruction are re-mapped and re-faulted each time: one quick-suite task took
#: 43.6 s with it against 21.3 s without, in a plain process (``benchmarks/bench_scaleout.py``).
LEFT_OUT_WORKER_ENVIRONMENT = ("MALLOC_TRIM_THRESHOLD_",)


def _worker_environment() -> dict[str, Any]:
    """The nanny's pre-spawn environment without :data:`LEFT_OUT_WORKER_ENVIRONMENT`."""
    import dask

    configured = dask.config.get("distributed.nanny.pre-spawn-environ", default={}) or {}
    return {key: value for key, value in configured.items() if key not in LEFT_OUT_WORKER_ENVIRONMENT}


def _distributed(
    function: Callable[[Any], Any],
    jobs: list[Any],
    workers: int | str | None,
    scheduler: str | Any | None,
    threads: int,
    bar: Any,
) -> list[JobResult]:
    import dask
    from distributed import Client, LocalCluster, as_completed

    cluster = None
    own_client = True
    if isinstance(scheduler, Client):
        client, own_client = scheduler, False
    elif scheduler is not None:
        client = Client(scheduler)
    else:
        # One thread per worker process; the nanny also sets OMP/MKL threads to 1.
        with dask.config.set({"distributed.nanny.pre-spawn-environ": _worker_environment()}):
            cluster = LocalCluster(
                n_workers=local_workers(workers),
                threads_per_worker=1,
                processes=True,
                dashboard_address=":0",
            )
        client = Client(cluster)
    try:
        batch = uuid.uuid4().hex
        futures = [
            client.submit(_guarded, function, job, threads, pure=False, key=f"pnpguard-{batch}-{number}")
            for number, job in enumerate(jobs)
        ]
        position = {future.key: number for number, future in enumerate(futures)}
        results: list[JobResult | None] = [None] * len(jobs)
        for future in as_completed(futures):
            number = position[future.key]
            if future.status == "finished":
                results[number] = future.result()
            else:
                # The scheduler gave up on the job (e.g. its workers died too often).
                results[number] = JobResult(None, _describe(future.exception()))
            if bar is not None:
                bar.update(1)
        return results  # type: ignore[return-value]
    finally:
        if own_client:
            client.close()
        if cluster is not None:
            cluster.close()
