"""Tune the benchmark methods once, on tuning phantoms, and freeze the result.

Writes ``src/pnpguard/bench/tuned.json``, which the suites read. For every
task the problem is built from the task's *tuning* phantom and seed (the
benchmark uses a different seed, hence a different phantom instance, mask and
noise), so no benchmark number is tuned on its own ground truth.

What is tuned, by PSNR against the tuning phantom:

- each shipped denoiser's strength, once per task, shared by the three PnP
  algorithms (so one denoiser check per task serves all three): the strength
  whose best guarded run (forward-backward, Douglas-Rachford or ADMM, with the
  step and relaxation the guarantee recommends) is highest. A coarse pass
  over every other value of the registry's strength grid, then the two grid
  neighbours of the best value;
- Tikhonov and TV-regularised weights on a geometric grid (ratio sqrt(10));
- Richardson-Lucy iterations, the interpolation method, the FBP filter and
  cutoff (small exhaustive grids). Bicubic upsampling has no parameter.

Step sizes are not tuned: the guarantee fixes them (forward-backward step
1/L; Douglas-Rachford / ADMM gamma = 1/L). For proximal denoisers the step
and the strength act through one ratio, so tuning the strength covers it.

Usage::

    python benchmarks/tune_suite.py                       # every task, 64 x 64
    python benchmarks/tune_suite.py --tasks superres-x2   # update some tasks
    python benchmarks/tune_suite.py --denoisers nlm       # update some denoisers

Existing entries of other tasks / denoisers are kept (``--fresh`` starts over);
the file's ``runs`` list records every invocation (time, commit, what it tuned).
"""

from __future__ import annotations

import argparse
import json
import math
import time
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import torch

from pnpguard.bench import (
    BASELINES,
    SHIPPED_TUNED,
    denoiser_names,
    get_denoiser,
    get_task,
    methods_for,
    task_names,
)
from pnpguard.bench._methods import DenoiserCache, run_baseline, run_pnp
from pnpguard.bench._results import environment
from pnpguard.bench._tuned import FORMAT, FORMAT_VERSION
from pnpguard.metrics import psnr

#: Shape and iteration cap of the tuning runs (the quick suite's).
SHAPE = (64, 64)
MAX_ITER = 150
TOL = 1e-4
#: Denoiser calls of each black-box check during tuning (the quick suite's budget).
CHECK_BUDGET = 60

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
    return float(psnr(x, truth, data_range=1.0))


def baseline_grid(name: str) -> list[dict]:
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


def tune_baseline(name: str, problem) -> dict:
    best = None
    for parameters in baseline_grid(name):
        score = _score(run_baseline(name, problem, parameters).x, problem.truth)
        if best is None or score > best[1]:
            best = (parameters, score)
    return {"parameters": best[0], "psnr": round(best[1], 3)}


def tune_denoiser(name: str, problem, methods) -> dict:
    entry = get_denoiser(name)
    grid = entry.grid
    chosen = [m for m in methods if m.denoiser == name]
    denoisers = DenoiserCache(problem, budget=CHECK_BUDGET, seed=0)
    scores: dict[int, tuple[float, str | None]] = {}

    def evaluate(index: int) -> None:
        if index in scores or not 0 <= index < len(grid):
            return
        best = (-math.inf, None)
        for method in chosen:
            outcome = run_pnp(method, problem, grid[index], denoisers=denoisers, max_iter=MAX_ITER, tol=TOL)
            if outcome.status == "ok":
                score = _score(outcome.x, problem.truth)
                if score > best[0]:
                    best = (score, method.name)
        scores[index] = best
        text = f"{best[0]:.2f} dB ({best[1]})" if best[1] else "refused by the guard"
        print(f"    {name} strength {grid[index]:g}: {text}", flush=True)

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


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--tasks", nargs="+", default=list(task_names()), help="tasks to tune (default: all)")
    parser.add_argument("--denoisers", nargs="+", default=None, help="tune only these denoisers (no baselines)")
    parser.add_argument("--baselines-only", action="store_true", help="tune only the baselines")
    parser.add_argument("--output", type=Path, default=SHIPPED_TUNED)
    parser.add_argument("--fresh", action="store_true", help="ignore the existing file")
    parser.add_argument("--threads", type=int, default=1)
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    denoisers = list(denoiser_names()) if args.denoisers is None else args.denoisers
    for name in denoisers:
        get_denoiser(name)
    if args.baselines_only:
        denoisers = []
    tune_baselines = args.denoisers is None

    data = None
    if args.output.is_file() and not args.fresh:
        data = json.loads(args.output.read_text())
    if data is None or data.get("format_version") != FORMAT_VERSION:
        data = {"format": FORMAT, "format_version": FORMAT_VERSION, "tasks": {}}
    env = environment(args.threads)
    created = datetime.now(timezone.utc).isoformat(timespec="seconds")
    # Every invocation is recorded: entries tuned by earlier runs are kept.
    data.setdefault("runs", []).append(
        {
            "created": created,
            "git_commit": env["git_commit"],
            "tasks": list(args.tasks),
            "denoisers": denoisers,
            "baselines": tune_baselines,
            "machine": f"{env['platform']}, {env['cpu_count']} CPUs, {args.threads} torch thread(s)",
        }
    )
    data.update(
        made_by="benchmarks/tune_suite.py",
        created=created,
        git_commit=env["git_commit"],
        how=(
            f"tuned at {SHAPE[0]}x{SHAPE[1]} on each task's tuning phantom and seed (not the "
            f"benchmark's); PnP: denoiser strength on the registry grid (coarse pass + grid "
            f"neighbours), best of the guarded algorithms at the recommended step, max_iter "
            f"{MAX_ITER}, tol {TOL:g}, check budget {CHECK_BUDGET}; baselines: exhaustive small "
            "grids; criterion PSNR (data range 1)"
        ),
    )
    begin = time.perf_counter()
    for name in args.tasks:
        task = get_task(name)
        start = time.perf_counter()
        problem = task.problem(SHAPE, tuning=True)
        methods = methods_for(task.family)
        entry = data["tasks"].setdefault(name, {"denoisers": {}, "baselines": {}})
        entry.update(
            phantom=task.tuning_phantom, seed=task.tuning_seed, shape=list(SHAPE), max_iter=MAX_ITER
        )
        print(f"{name} (tuning phantom {task.tuning_phantom}, seed {task.tuning_seed})", flush=True)
        if tune_baselines:
            for baseline, (families, _) in BASELINES.items():
                if task.family in families:
                    entry["baselines"][baseline] = tune_baseline(baseline, problem)
                    print(f"  {baseline}: {entry['baselines'][baseline]}", flush=True)
        for denoiser in denoisers:
            entry["denoisers"][denoiser] = tune_denoiser(denoiser, problem, methods)
            print(f"  {denoiser}: {entry['denoisers'][denoiser]}", flush=True)
        print(f"  {time.perf_counter() - start:.1f} s", flush=True)
        ordered = {key: data[key] for key in data if key != "tasks"} | {"tasks": data["tasks"]}
        args.output.write_text(json.dumps(ordered, indent=1) + "\n")
    print(f"wrote {args.output} in {time.perf_counter() - begin:.1f} s")


if __name__ == "__main__":
    main()
