"""Run a suite: every task with every applicable method, into one result document."""

from __future__ import annotations

import time
from collections.abc import Iterable
from dataclasses import dataclass
from datetime import datetime, timezone
from typing import Any

import numpy as np

from .._caution import CAUTION
from .._jobs import run_jobs
from .._validation import choice, positive_int, unknown_message
from ..metrics import psnr, ssim
from ._methods import (
    DenoiserCache,
    Method,
    Outcome,
    final_residual,
    methods_for,
    run_baseline,
    run_pnp,
)
from ._results import (
    FORMAT,
    FORMAT_VERSION,
    BenchmarkRun,
    check_summary,
    environment,
    finite_or_none,
    flag_summary,
    guarantee_summary,
)
from ._rule_column import RULES, RuleJob, rule_method_name, rule_summary, run_rule_job
from ._tasks import DATA_RANGE, Suite, Task, get_suite
from ._tuned import TunedParameters, load_tuned
from ._tuning import tune_task


def _select(suite: Suite, methods: Iterable[str] | None) -> dict[str, tuple[Method, ...]]:
    per_task = {task.name: methods_for(task.family) for task in suite.tasks}
    if methods is None:
        return per_task
    wanted = set(methods)
    known = {m.name for chosen in per_task.values() for m in chosen}
    unknown = sorted(wanted - known)
    if unknown:
        raise ValueError(unknown_message(f"method (in `methods`) for suite {suite.name!r}", unknown[0], known))
    return {name: tuple(m for m in chosen if m.name in wanted) for name, chosen in per_task.items()}


def _record(task: str, method: Method, outcome: Outcome, truth: np.ndarray) -> dict[str, Any]:
    quality = {"psnr": None, "ssim": None}
    if outcome.x is not None:
        quality = {
            "psnr": finite_or_none(psnr(outcome.x, truth, data_range=DATA_RANGE)),
            "ssim": finite_or_none(ssim(outcome.x, truth, data_range=DATA_RANGE)),
        }
    refusal = None
    if outcome.refusal is not None:
        refusal = {
            "reasons": list(outcome.refusal.reasons),
            "suggestions": list(outcome.refusal.suggestions),
        }
    return {
        "task": task,
        "method": method.name,
        "kind": method.kind,
        "algorithm": method.algorithm,
        "denoiser": method.denoiser,
        "status": outcome.status,
        **quality,
        "iterations": outcome.iterations,
        "converged": outcome.converged,
        "final_residual": finite_or_none(final_residual(outcome)),
        "seconds": outcome.seconds,
        "check_seconds": outcome.check_seconds,
        "message": outcome.message,
        "parameters": {k: finite_or_none(v) if isinstance(v, float) else v
                       for k, v in outcome.parameters.items()},
        "flags": flag_summary(outcome.flags),
        "check": check_summary(outcome.report),
        "guarantee": guarantee_summary(outcome.guarantee),
        "refusal": refusal,
    }


@dataclass(frozen=True)
class SuiteJob:
    """One independent job of a suite: a baseline, or one shipped denoiser with its algorithms.

    The algorithms of one denoiser share a job because they share its check
    (one :class:`DenoiserCache`), exactly as a serial run does.

    Attributes
    ----------
    task : Task
    suite : Suite
    methods : tuple of Method
        One baseline, or the PnP methods of one denoiser (in suite order).
    tuned : TunedParameters
    budget : int
        Denoiser calls per black-box check.
    seed : int
        Seed of the check's pair search.
    """

    task: Task
    suite: Suite
    methods: tuple[Method, ...]
    tuned: TunedParameters
    budget: int
    seed: int


def _jobs(suite: Suite, selected: dict[str, tuple[Method, ...]], tuned: TunedParameters,
          budget: int, seed: int) -> list[SuiteJob]:
    jobs = []
    for task in suite.tasks:
        groups: dict[str, list[Method]] = {}
        for method in selected[task.name]:
            groups.setdefault(method.name if method.kind == "baseline" else f"pnp:{method.denoiser}",
                              []).append(method)
        jobs.extend(SuiteJob(task, suite, tuple(g), tuned, budget, seed) for g in groups.values())
    return jobs


def run_job(job: SuiteJob) -> dict[str, Any]:
    """Run one job of a suite: its records, arrays, the task's noise level and its wall time."""
    begin = time.perf_counter()
    problem = job.task.problem(job.task.fixed_shape or job.suite.shape)
    denoisers = DenoiserCache(problem, budget=job.budget, seed=job.seed)
    records, arrays = [], {}
    for method in job.methods:
        if method.kind == "baseline":
            outcome = run_baseline(method.name, problem, job.tuned.baseline(job.task.name, method.name))
        else:
            outcome = run_pnp(
                method,
                problem,
                job.tuned.strength(job.task.name, method.denoiser),
                denoisers=denoisers,
                max_iter=job.suite.max_iter,
                tol=job.suite.tol,
            )
        records.append(_record(job.task.name, method, outcome, problem.truth))
        if outcome.x is not None:
            arrays[f"{job.task.name}/{method.name}"] = outcome.x
            arrays[f"{job.task.name}/{method.name}/residuals"] = outcome.relative_residuals
    arrays[f"{job.task.name}/truth"] = problem.truth
    arrays[f"{job.task.name}/data"] = problem.y
    return {"records": records, "arrays": arrays, "sigma": problem.sigma,
            "seconds": time.perf_counter() - begin}


def _run_any(job: SuiteJob | RuleJob) -> dict[str, Any]:
    """Run a suite job or a rule job (one function for the job runner)."""
    if isinstance(job, RuleJob):
        done = run_rule_job(job)
        problem, outcome = done["problem"], done["outcome"]
        name = rule_method_name(job.method, job.rule)
        named = Method(name, "pnp", job.method.algorithm, job.method.denoiser)
        if outcome is None:
            record = _failed_record(job.task.name, named, "the rule found no admissible strength")
            record["status"] = "refused"
            record["message"] = "refused: " + done["choice"]["note"]
            arrays = {}
        else:
            record = _record(job.task.name, named, outcome, problem.truth)
            arrays = {} if outcome.x is None else {f"{job.task.name}/{name}": outcome.x}
        record["strength_rule"] = rule_summary(done["choice"])
        return {"records": [record], "arrays": arrays, "sigma": problem.sigma, "seconds": done["seconds"]}
    return run_job(job)


def _failed_record(task: str, method: Method, error: str) -> dict[str, Any]:
    """The record of a method whose job raised or whose worker died: status ``"error"``."""
    return {
        "task": task, "method": method.name, "kind": method.kind, "algorithm": method.algorithm,
        "denoiser": method.denoiser, "status": "error", "psnr": None, "ssim": None,
        "iterations": 0, "converged": False, "final_residual": None, "seconds": None,
        "check_seconds": None, "message": f"failed: {error}", "parameters": {}, "flags": [],
        "check": None, "guarantee": None, "refusal": None,
    }


def run_suite(
    suite: Suite | str,
    *,
    tuned: TunedParameters | None = None,
    methods: Iterable[str] | None = None,
    check_budget: int | None = None,
    seed: int = 0,
    threads: int = 1,
    progress: bool = False,
    workers: int | str | None = None,
    scheduler: str | Any | None = None,
    strength_rule: str | None = None,
) -> BenchmarkRun:
    """Run every task of a suite with every applicable method.

    Parameters
    ----------
    suite : Suite or str
        A suite or its name (``"quick"``, ``"full"``).
    tuned : TunedParameters, optional
        Frozen method parameters; default the file shipped with the package.
        Users' own tasks (:func:`pnpguard.bench.user_task`) that it lacks are
        tuned first on their tuning images (:func:`pnpguard.bench.tune_task`,
        at the suite's ``max_iter``, ``tol`` and check budget, for the
        selected methods); the result file records which.
    methods : iterable of str, optional
        Run only these methods (names as in the result file, e.g.
        ``"tikhonov"``, ``"fb/wavelet"``).
    check_budget : int, optional
        Denoiser calls per black-box check; default the suite's.
    seed : int, optional
        Seed of the denoiser checks' pair search. Phantoms, masks and noise
        come from each task's own seeds.
    threads : int, optional
        Torch intra-op threads during the run (restored afterwards). One
        thread (the default) makes floating-point reductions run in one fixed
        order, so reruns on one machine give identical numbers.
    progress : bool, optional
        Show one progress bar on standard error, advanced as jobs finish.
    workers : int or "auto", optional
        Run the jobs on a local dask.distributed cluster of this many worker
        processes (``"auto"``: one per CPU), each with ``threads`` torch
        threads. Default: serially in this process.
    scheduler : str or distributed.Client, optional
        Address of an existing dask.distributed scheduler (or a connected
        client) to run the jobs on; excludes ``workers``.
    strength_rule : {"discrepancy", "sure"}, optional
        Add the "no ground truth" column: every selected PnP method again,
        named ``"<method>@<rule>"``, at the strength
        :func:`pnpguard.choose_strength` picks on the task's own data by this
        rule (over the range of the denoiser's tuning grid), run as the tuned
        column is. Its record carries ``"strength_rule"``: the rule's table
        and, for evaluation only, the oracle (the best PSNR among the
        strengths the rule tried) and the pick's gap to it
        (:func:`pnpguard.bench.rule_gaps` averages them per family).

    Returns
    -------
    BenchmarkRun
        The result document and the arrays (truths, data, reconstructions,
        residual curves). Refusals by the guard are results with status
        ``"refused"``.

    Notes
    -----
    Quality is PSNR and SSIM against the benchmark phantom with data range 1.
    Each shipped denoiser is built once per task at its tuned strength and
    checked once on the task's first iterate ``A^T y / ||A||^2``
    (:func:`pnpguard.check_denoiser`; free for denoisers with verified
    structure); the three algorithms reuse that report, and take the step and
    relaxation the guarantee recommends.

    The suite is split into independent jobs: each baseline on each task, and
    each shipped denoiser on each task with all its algorithms (they share its
    check). Results, in suite order, are the same serially and on any number
    of workers (quality, verdicts and iterations; not timings). A job that
    raises, or whose workers keep dying, gives records with status
    ``"error"`` and the message; the other jobs go on.
    """
    suite = get_suite(suite) if isinstance(suite, str) else suite
    tuned = load_tuned() if tuned is None else tuned
    budget = suite.check_budget if check_budget is None else check_budget
    threads = positive_int(threads, "threads")
    selected = _select(suite, methods)
    untuned = [task for task in suite.tasks if task.truth is not None and task.name not in tuned.data["tasks"]]
    if untuned:
        how = (f"tuned in this run on the user's tuning image (max_iter {suite.max_iter}, tol {suite.tol:g}, "
               f"check budget {budget}; the grids of pnpguard.bench.tune_task)")
        tuned = tuned.including(
            {task.name: tune_task(task, shape=task.fixed_shape or suite.shape, max_iter=suite.max_iter,
                                  tol=suite.tol, check_budget=budget, methods=[m.name for m in selected[task.name]])
             for task in untuned},
            how,
        )
    jobs: list[SuiteJob | RuleJob] = list(_jobs(suite, selected, tuned, budget, seed))
    if strength_rule is not None:
        strength_rule = choice(strength_rule, "strength_rule", RULES)
        jobs += [RuleJob(task, suite, method, strength_rule, budget, seed)
                 for task in suite.tasks for method in selected[task.name] if method.kind == "pnp"]
    begin = time.perf_counter()
    done = run_jobs(_run_any, jobs, workers=workers, scheduler=scheduler, threads=threads,
                    progress=progress, description=f"suite {suite.name}")
    records, arrays = [], {}
    task_info: dict[str, dict[str, Any]] = {
        task.name: {**task.describe(), "shape": list(task.fixed_shape or suite.shape), "sigma": None, "seconds": 0.0}
        for task in suite.tasks
    }
    for job, result in zip(jobs, done):
        info = task_info[job.task.name]
        if not result.ok:
            failed = job.methods if isinstance(job, SuiteJob) else (
                Method(rule_method_name(job.method, job.rule), "pnp", job.method.algorithm, job.method.denoiser),)
            records.extend(_failed_record(job.task.name, method, result.error) for method in failed)
            continue
        records.extend(result.value["records"])
        arrays.update(result.value["arrays"])
        info["sigma"] = result.value["sigma"]
        info["seconds"] += result.value["seconds"]
    tasks = list(task_info.values())
    document = {
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "seconds": time.perf_counter() - begin,
        "suite": suite.describe(),
        "settings": {
            "seed": seed,
            "check_budget": budget,
            "threads": threads,
            "data_range": DATA_RANGE,
            "dtype": "float64",
            "tuned": tuned.provenance(),
            "workers": _workers_text(workers, scheduler),
            "strength_rule": strength_rule,
        },
        "environment": environment(threads),
        "tasks": tasks,
        "results": records,
        "images": None,
        "caution": CAUTION if any(t.family == "tomography" for t in suite.tasks) else None,
    }
    return BenchmarkRun(document, arrays)


def _workers_text(workers: int | str | None, scheduler: Any) -> str:
    """Where the jobs ran, for the result file."""
    if scheduler is not None:
        return f"dask.distributed scheduler {getattr(scheduler, 'scheduler', scheduler)!s}"
    if workers is not None:
        return f"local dask.distributed cluster, workers={workers}"
    return "serial"
