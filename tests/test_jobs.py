"""Independent jobs serially and on dask.distributed: order, errors, dead workers, identical suites."""

from __future__ import annotations

import os
import signal
import sys
import time

import cloudpickle
import dask
import numpy as np
import pytest
from distributed import Client, LocalCluster

from pnpguard import bench
from pnpguard._jobs import JobResult, run_jobs

# Worker processes import this module's job functions by value (the tests package is not
# on their path).
cloudpickle.register_pickle_by_value(sys.modules[__name__])


def _square(value: int) -> int:
    return value * value


def _fail_on_two(value: int) -> int:
    if value == 2:
        raise ValueError("two is not allowed")
    return value * value


def _sleep_then_return(value: float) -> float:
    time.sleep(value)
    return value


def _die_once(job: tuple[str, int]) -> int:
    """Kill the worker's own process the first time job 3 runs (a worker dying mid-job)."""
    marker, value = job
    if value == 3 and not os.path.exists(marker):
        with open(marker, "w"):
            pass
        os.kill(os.getpid(), signal.SIGKILL)
    return value * value


def _environment(name: str) -> str | None:
    return os.environ.get(name)


def _always_die(value: int) -> int:
    if value == 1:
        os.kill(os.getpid(), signal.SIGKILL)
    return value * value


@pytest.fixture(scope="module")
def client():
    """Two single-threaded worker processes; a job whose worker dies is retried once."""
    with dask.config.set({"distributed.scheduler.allowed-failures": 1}):
        cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0")
        connected = Client(cluster)
    yield connected
    connected.close()
    cluster.close()


def test_serial_jobs_come_back_in_order_with_errors_recorded():
    results = run_jobs(_fail_on_two, range(5))
    assert [r.value for r in results] == [0, 1, None, 9, 16]
    assert [r.ok for r in results] == [True, True, False, True, True]
    assert results[2].error.startswith("ValueError: two is not allowed")


def test_workers_and_scheduler_exclude_each_other():
    with pytest.raises(ValueError, match="`workers`.*`scheduler`"):
        run_jobs(_square, [1], workers=2, scheduler="tcp://127.0.0.1:1")
    with pytest.raises(ValueError, match="`workers`"):
        run_jobs(_square, [1], workers="many")


def test_results_follow_the_jobs_not_the_finishing_order(client):
    # The first job finishes last on two workers.
    durations = [1.0, 0.0, 0.0, 0.0]
    results = run_jobs(_sleep_then_return, durations, scheduler=client)
    assert [r.value for r in results] == durations


def test_a_raising_job_is_recorded_and_the_others_continue_on_the_cluster(client):
    results = run_jobs(_fail_on_two, range(5), scheduler=client)
    assert [r.value for r in results] == [0, 1, None, 9, 16]
    assert "two is not allowed" in results[2].error


def test_a_worker_killed_mid_job_loses_and_duplicates_nothing(client, tmp_path):
    marker = str(tmp_path / "died")
    results = run_jobs(_die_once, [(marker, v) for v in range(6)], scheduler=client)
    assert os.path.exists(marker)  # the worker did die during job 3
    assert results == [JobResult(v * v, None) for v in range(6)]
    client.wait_for_workers(2, timeout=60)


def test_a_job_that_keeps_killing_workers_is_recorded_as_failed(client):
    results = run_jobs(_always_die, range(3), scheduler=client)
    assert [r.value for r in results] == [0, None, 4]
    assert "KilledWorker" in results[1].error
    client.wait_for_workers(2, timeout=60)


def test_one_progress_bar_counts_the_jobs(capsys):
    run_jobs(_square, range(3), progress=True, description="squares")
    err = capsys.readouterr().err
    assert "squares" in err and "3/3" in err


def _comparable(record: dict) -> dict:
    return {k: v for k, v in record.items() if k not in ("seconds", "check_seconds")}


def test_a_suite_on_two_workers_equals_the_serial_run(client):
    methods = ("tikhonov", "fb/wavelet", "dr/wavelet", "fb/nlm", "dr/nlm", "fb/gaussian")
    suite = bench.custom_suite(("deblur-gaussian-1pct", "inpaint-random50"), shape=(32, 32),
                               max_iter=20, check_budget=20, name="tiny")
    serial = bench.run_suite(suite, methods=methods)
    spread = bench.run_suite(suite, methods=methods, scheduler=client)
    assert [_comparable(r) for r in spread.document["results"]] == [
        _comparable(r) for r in serial.document["results"]
    ]
    assert all(r["status"] != "error" for r in serial.document["results"])
    assert sorted(spread.arrays) == sorted(serial.arrays)
    for key, value in serial.arrays.items():
        np.testing.assert_array_equal(spread.arrays[key], value, err_msg=key)
    assert [t["sigma"] for t in spread.document["tasks"]] == [t["sigma"] for t in serial.document["tasks"]]
    assert serial.document["settings"]["workers"] == "serial"


def test_a_failing_suite_job_gives_error_records_and_the_rest_run(monkeypatch):
    from pnpguard.bench import _runner

    original = _runner.run_pnp

    def broken(method, *args, **kwargs):
        if method.denoiser == "nlm":
            raise RuntimeError("simulated failure")
        return original(method, *args, **kwargs)

    monkeypatch.setattr(_runner, "run_pnp", broken)
    suite = bench.custom_suite(("deblur-gaussian-1pct",), shape=(32, 32), max_iter=10,
                               check_budget=20, name="tiny")
    run = bench.run_suite(suite, methods=("tikhonov", "fb/nlm", "dr/nlm", "fb/wavelet"))
    status = {r["method"]: r["status"] for r in run.document["results"]}
    assert status == {"tikhonov": "ok", "fb/nlm": "error", "dr/nlm": "error", "fb/wavelet": "ok"}
    failed = [r for r in run.document["results"] if r["status"] == "error"]
    assert all("RuntimeError: simulated failure" in r["message"] for r in failed)
    assert bench.markdown_report(run.document)  # the report renders failed runs


def test_the_command_line_runs_a_suite_on_a_local_cluster(tmp_path):
    from pnpguard.cli import main

    out = tmp_path / "run.json"
    status = main(["benchmark", "quick", "--tasks", "deblur-gaussian-1pct", "--size", "32", "--max-iter", "5",
                   "--methods", "tikhonov", "fb/wavelet", "--workers", "1", "--no-images", "-o", str(out)])
    assert status == 0
    document = bench.load_results(out)
    assert document["settings"]["workers"] == "local dask.distributed cluster, workers=1"
    assert [r["status"] for r in document["results"]] == ["ok", "ok"]


@pytest.mark.parametrize("arguments, message", [
    (["--workers", "0"], "--workers: expected a positive integer or 'auto', got '0'"),
    (["--workers", "2", "--scheduler", "tcp://127.0.0.1:1"], "not allowed with argument"),
])
def test_worker_options_are_checked_while_parsing(arguments, message, capsys):
    from pnpguard.cli import main

    assert main(["benchmark", "quick", *arguments]) == 2
    assert message in capsys.readouterr().err


def test_strength_choice_and_sweep_on_two_workers_equal_the_serial_runs(client):
    import pnpguard as pg

    frame = pg.phantoms.cells(32, seed=0)
    mask = pg.PixelMask(pg.random_pixel_mask(frame.shape, 0.5, seed=0))
    data = mask.forward(frame) + 0.05 * np.random.default_rng(0).standard_normal(frame.shape)
    fidelity = pg.LeastSquares(mask, data, sigma=0.05)

    def wavelet(s):
        return pg.WaveletShrinkage(sigma=s)

    keywords = dict(rule="sure", points=4, refine=1, max_iter=20)
    serial = pg.choose_strength(fidelity, wavelet, "fb", (1e-3, 0.1), **keywords)
    spread = pg.choose_strength(fidelity, wavelet, "fb", (1e-3, 0.1), scheduler=client, **keywords)
    assert [(r.strength, r.value, r.iterations, r.guarantee) for r in spread.rows] == [
        (r.strength, r.value, r.iterations, r.guarantee) for r in serial.rows
    ]
    assert spread.strength == serial.strength
    np.testing.assert_array_equal(spread.x, serial.x)

    def relaxed(s):
        return pg.relaxed(pg.WaveletShrinkage(sigma=0.05), s)

    sweeps = [pg.sweep_check(relaxed, fidelity, [0.5, 1.0, 2.0], algorithms=["fb"], scheduler=where)
              for where in (None, client)]
    assert sweeps[0].as_dict() == sweeps[1].as_dict()


def test_local_workers_keep_the_default_memory_trimming_and_one_thread_per_library():
    # dask.distributed's nanny sets MALLOC_TRIM_THRESHOLD_=65536 in new workers (its default
    # "distributed.nanny.pre-spawn-environ"), which doubled the time of reconstruction jobs;
    # the local cluster leaves it out and keeps the single-threaded math libraries.
    assert dask.config.get("distributed.nanny.pre-spawn-environ").get("MALLOC_TRIM_THRESHOLD_") is not None
    names = ["MALLOC_TRIM_THRESHOLD_", "OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS"]
    seen = [result.value for result in run_jobs(_environment, names, workers=1)]
    assert seen == [os.environ.get("MALLOC_TRIM_THRESHOLD_"), "1", "1"]
