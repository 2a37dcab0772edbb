"""Tune the benchmark methods once, on tuning phantoms, and freeze the result.

Writes ``src/pnpguard/bench/tuned.json``, which the suites read. For every
task the problem is built from the task's *tuning* phantom and seed (the
benchmark uses a different seed, hence a different phantom instance, mask and
noise), so no benchmark number is tuned on its own ground truth.

What is tuned, by PSNR against the tuning phantom, is described in
``pnpguard/bench/_tuning.py`` (shared with suites holding users' own tasks).

Step sizes are not tuned: the guarantee fixes them (forward-backward step
1/L; Douglas-Rachford / ADMM gamma = 1/L). For proximal denoisers the step
and the strength act through one ratio, so tuning the strength covers it.

Usage::

    python benchmarks/tune_suite.py                       # every task, 64 x 64
    python benchmarks/tune_suite.py --tasks superres-x2   # update some tasks
    python benchmarks/tune_suite.py --denoisers nlm       # update some denoisers
    python benchmarks/tune_suite.py --shape 128 128 --max-iter 300   # the full suite's size

Existing entries of other tasks / denoisers are kept (``--fresh`` starts over);
the file's ``runs`` list records every invocation (time, commit, what it tuned).
"""

from __future__ import annotations

import argparse
import json
import time
from datetime import datetime, timezone
from pathlib import Path

import torch

from pnpguard.bench import SHIPPED_TUNED, denoiser_names, get_denoiser, get_task, task_names, tune_task
from pnpguard.bench._results import environment
from pnpguard.bench._tuned import FORMAT, FORMAT_VERSION

#: Shape and iteration cap of the tuning runs (the quick suite's).
SHAPE = (64, 64)
MAX_ITER = 150
TOL = 1e-4
#: Denoiser calls of each black-box check during tuning (the quick suite's budget).
CHECK_BUDGET = 60


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--tasks", nargs="+", default=list(task_names()), help="tasks to tune (default: all)")
    parser.add_argument("--denoisers", nargs="+", default=None, help="tune only these denoisers (no baselines)")
    parser.add_argument("--baselines-only", action="store_true", help="tune only the baselines")
    parser.add_argument("--output", type=Path, default=SHIPPED_TUNED)
    parser.add_argument("--fresh", action="store_true", help="ignore the existing file")
    parser.add_argument("--threads", type=int, default=1)
    parser.add_argument("--shape", type=int, nargs=2, default=SHAPE, metavar=("ROWS", "COLS"),
                        help=f"image size of the tuning runs (default: {SHAPE[0]} {SHAPE[1]})")
    parser.add_argument("--max-iter", type=int, default=MAX_ITER, help=f"iteration cap (default: {MAX_ITER})")
    args = parser.parse_args()
    shape, max_iter = tuple(args.shape), args.max_iter
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
            f"tuned at {shape[0]}x{shape[1]} on each task's tuning phantom and seed (not the "
            f"benchmark's); PnP: denoiser strength on the registry grid (coarse pass + grid "
            f"neighbours), best of the guarded algorithms at the recommended step, max_iter "
            f"{max_iter}, tol {TOL:g}, check budget {CHECK_BUDGET}; baselines: exhaustive small "
            "grids; criterion PSNR (data range 1)"
        ),
    )
    begin = time.perf_counter()
    for name in args.tasks:
        task = get_task(name)
        start = time.perf_counter()
        entry = data["tasks"].setdefault(name, {"denoisers": {}, "baselines": {}})
        print(f"{name} (tuning phantom {task.tuning_phantom}, seed {task.tuning_seed})", flush=True)
        fresh = tune_task(
            task, shape=shape, max_iter=max_iter, tol=TOL, check_budget=CHECK_BUDGET,
            denoisers=denoisers, baselines=tune_baselines, say=lambda text: print(text, flush=True),
        )
        entry.update(phantom=fresh["phantom"], seed=fresh["seed"], shape=fresh["shape"], max_iter=max_iter)
        entry["baselines"].update(fresh["baselines"])
        entry["denoisers"].update(fresh["denoisers"])
        print(f"  {time.perf_counter() - start:.1f} s", flush=True)
        ordered = {key: data[key] for key in data if key != "tasks"} | {"tasks": data["tasks"]}
        args.output.write_text(json.dumps(ordered, indent=1) + "\n")
    print(f"wrote {args.output} in {time.perf_counter() - begin:.1f} s")


if __name__ == "__main__":
    main()
