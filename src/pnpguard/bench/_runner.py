"""Run a suite: every task with every applicable method, into one result document."""

from __future__ import annotations

import sys
import time
from collections.abc import Iterable
from datetime import datetime, timezone
from typing import Any

import numpy as np
import torch

from .._caution import CAUTION
from .._validation import positive_int, unknown_message
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
from ._tasks import DATA_RANGE, Suite, get_suite
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


def run_suite(
    suite: Suite | str,
    *,
    tuned: TunedParameters | None = None,
    methods: Iterable[str] | None = None,
    check_budget: int | None = None,
    seed: int = 0,
    threads: int = 1,
    progress: bool = False,
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
        Show a progress bar on standard error.

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
    """
    suite = get_suite(suite) if isinstance(suite, str) else suite
    tuned = load_tuned() if tuned is None else tuned
    budget = suite.check_budget if check_budget is None else check_budget
    threads = positive_int(threads, "threads")
    selected = _select(suite, methods)
    untuned = [task for task in suite.tasks if task.truth is not None and task.name not in tuned.data["tasks"]]
    total = sum(len(chosen) for chosen in selected.values())
    bar = None
    if progress:
        from tqdm import tqdm

        bar = tqdm(total=total, desc=f"suite {suite.name}", unit="run", file=sys.stderr)
    previous_threads = torch.get_num_threads()
    torch.set_num_threads(threads)
    begin = time.perf_counter()
    tasks, records, arrays = [], [], {}
    try:
        if untuned:
            how = (f"tuned in this run on the user's tuning image (max_iter {suite.max_iter}, tol {suite.tol:g}, "
                   f"check budget {budget}; the grids of pnpguard.bench.tune_task)")
            tuned = tuned.including(
                {task.name: tune_task(task, shape=suite.shape, max_iter=suite.max_iter, tol=suite.tol,
                                      check_budget=budget, methods=[m.name for m in selected[task.name]])
                 for task in untuned},
                how,
            )
        for task in suite.tasks:
            task_begin = time.perf_counter()
            shape = task.fixed_shape or suite.shape
            problem = task.problem(shape)
            arrays[f"{task.name}/truth"] = problem.truth
            arrays[f"{task.name}/data"] = problem.y
            denoisers = DenoiserCache(problem, budget=budget, seed=seed)
            for method in selected[task.name]:
                if bar is not None:
                    bar.set_postfix_str(f"{task.name} {method.name}")
                if method.kind == "baseline":
                    outcome = run_baseline(method.name, problem, tuned.baseline(task.name, method.name))
                else:
                    outcome = run_pnp(
                        method,
                        problem,
                        tuned.strength(task.name, method.denoiser),
                        denoisers=denoisers,
                        max_iter=suite.max_iter,
                        tol=suite.tol,
                    )
                records.append(_record(task.name, method, outcome, problem.truth))
                if outcome.x is not None:
                    arrays[f"{task.name}/{method.name}"] = outcome.x
                    arrays[f"{task.name}/{method.name}/residuals"] = outcome.relative_residuals
                if bar is not None:
                    bar.update(1)
            tasks.append(
                {**task.describe(), "shape": list(shape), "sigma": problem.sigma,
                 "seconds": time.perf_counter() - task_begin}
            )
    finally:
        torch.set_num_threads(previous_threads)
        if bar is not None:
            bar.close()
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
        },
        "environment": environment(threads),
        "tasks": tasks,
        "results": records,
        "images": None,
        "caution": CAUTION if any(t.family == "tomography" for t in suite.tasks) else None,
    }
    return BenchmarkRun(document, arrays)
