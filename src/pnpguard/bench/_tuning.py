"""Tuning of the benchmark methods on a task's tuning image, by PSNR against it.

Shared by ``benchmarks/tune_suite.py`` (which freezes the shipped tasks'
parameters in ``tuned.json``) and by suites with users' own tasks, which are
tuned on the separate image the user chose (:func:`tune_task`).

What is tuned:

- each shipped denoiser's strength, once per task, shared by the PnP
  algorithms (so one denoiser check per strength serves all of them): the
  strength whose best guarded run (at the step and relaxation the guarantee
  recommends) is highest. A coarse pass over every other value of the
  registry's strength grid, then the two grid neighbours of the best value;
- Tikhonov and TV-regularised weights on a geometric grid (ratio sqrt(10));
- Richardson-Lucy iterations, the interpolation method, the FBP filter and
  cutoff (small exhaustive grids). Bicubic upsampling has no parameter.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable
from typing import Any

import numpy as np

from ..metrics import psnr
from ._methods import BASELINES, DenoiserCache, Method, methods_for, run_baseline, run_pnp
from ._registry import denoiser_names, get_denoiser
from ._tasks import DATA_RANGE, Problem, Task

WEIGHTS_TIKHONOV = tuple(10.0 ** (k / 2) for k in range(-12, 1))  # 1e-6 .. 1
WEIGHTS_TV = tuple(10.0 ** (k / 2) for k in range(-10, -1))  # 1e-5 .. 0.03
RL_ITERATIONS = (5, 10, 20, 40, 80, 160)
INTERPOLATION = ("nearest", "linear", "cubic")
FBP = tuple(
    {"filter": f, "cutoff": c}
    for f in ("ramp", "shepp-logan", "cosine", "hamming", "hann")
    for c in (1.0, 0.8, 0.6)
)


def _score(x: np.ndarray, truth: np.ndarray) -> float:
    return float(psnr(x, truth, data_range=DATA_RANGE))


def baseline_grid(name: str) -> list[dict[str, Any]]:
    """The parameter values tried for a baseline."""
    if name == "tikhonov":
        return [{"weight": w} for w in WEIGHTS_TIKHONOV]
    if name == "tv-regularised":
        return [{"weight": w} for w in WEIGHTS_TV]
    if name == "richardson-lucy":
        return [{"iterations": n} for n in RL_ITERATIONS]
    if name == "interpolation":
        return [{"method": m} for m in INTERPOLATION]
    if name == "fbp":
        return [dict(p) for p in FBP]
    return [{}]


def tune_baseline(name: str, problem: Problem) -> dict[str, Any]:
    """The best parameters of a baseline on a (tuning) problem, and their PSNR."""
    best = None
    for parameters in baseline_grid(name):
        score = _score(run_baseline(name, problem, parameters).x, problem.truth)
        if best is None or score > best[1]:
            best = (parameters, score)
    return {"parameters": best[0], "psnr": round(best[1], 3)}


def tune_denoiser(
    name: str,
    problem: Problem,
    methods: Iterable[Method],
    *,
    max_iter: int,
    tol: float,
    check_budget: int,
    say: Callable[[str], None] = lambda text: None,
) -> dict[str, Any]:
    """The best strength of a shipped denoiser on a (tuning) problem (see the module docstring)."""
    grid = get_denoiser(name).grid
    chosen = [m for m in methods if m.denoiser == name]
    denoisers = DenoiserCache(problem, budget=check_budget, seed=0)
    scores: dict[int, tuple[float, str | None]] = {}

    def evaluate(index: int) -> None:
        if index in scores or not 0 <= index < len(grid):
            return
        best: tuple[float, str | None] = (-math.inf, None)
        for method in chosen:
            outcome = run_pnp(method, problem, grid[index], denoisers=denoisers, max_iter=max_iter, tol=tol)
            if outcome.status == "ok":
                score = _score(outcome.x, problem.truth)
                if score > best[0]:
                    best = (score, method.name)
        scores[index] = best
        text = f"{best[0]:.2f} dB ({best[1]})" if best[1] else "refused by the guard"
        say(f"    {name} strength {grid[index]:g}: {text}")

    for index in range(0, len(grid), 2):
        evaluate(index)
    top = max(scores, key=lambda i: (scores[i][0], -i))
    evaluate(top - 1)
    evaluate(top + 1)
    top = max(scores, key=lambda i: (scores[i][0], -i))
    score, method = scores[top]
    return {
        "strength": grid[top],
        "psnr": round(score, 3) if math.isfinite(score) else None,
        "method": method,
        "note": None if method else "refused by the guard at every strength tried",
    }


def tune_task(
    task: Task,
    *,
    shape: tuple[int, int],
    max_iter: int,
    tol: float,
    check_budget: int,
    denoisers: Iterable[str] | None = None,
    baselines: bool = True,
    methods: Iterable[str] | None = None,
    say: Callable[[str], None] = lambda text: None,
) -> dict[str, Any]:
    """Tune every method of a task on its tuning image: one entry of the tuned-parameter layout.

    Parameters
    ----------
    task : Task
        A shipped task (tuned on its tuning phantom) or a user's task (on the
        tuning image the user gave, see :func:`pnpguard.bench.user_task`).
    shape : tuple of int
        Image size (a user's task has its own, which wins).
    max_iter, tol, check_budget : int, float, int
        Settings of the tuning runs.
    denoisers : iterable of str, optional
        Shipped denoisers to tune (default: all).
    baselines : bool, optional
        Tune the task family's baselines too (default True).
    methods : iterable of str, optional
        Tune only what these methods need (names as in result files).
    say : callable, optional
        Receives one line per step (progress for scripts).

    Returns
    -------
    dict
        ``{"phantom", "seed", "shape", "max_iter", "denoisers": {...}, "baselines": {...}}``.
    """
    shape = task.fixed_shape or tuple(shape)
    problem = task.problem(shape, tuning=True)
    wanted = None if methods is None else set(methods)
    chosen = [m for m in methods_for(task.family) if wanted is None or m.name in wanted]
    names = denoiser_names() if denoisers is None else tuple(denoisers)
    entry: dict[str, Any] = {
        "phantom": problem.phantom, "seed": problem.seed, "shape": list(shape), "max_iter": max_iter,
        "denoisers": {}, "baselines": {},
    }
    for baseline, (families, _) in BASELINES.items():
        if baselines and task.family in families and any(m.name == baseline for m in chosen):
            entry["baselines"][baseline] = tune_baseline(baseline, problem)
            say(f"  {baseline}: {entry['baselines'][baseline]}")
    for name in names:
        if any(m.denoiser == name for m in chosen):
            entry["denoisers"][name] = tune_denoiser(
                name, problem, chosen, max_iter=max_iter, tol=tol, check_budget=check_budget, say=say
            )
            say(f"  {name}: {entry['denoisers'][name]}")
    return entry
