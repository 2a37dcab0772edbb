"""The "no ground truth" column: PnP methods with the strength chosen per task by a rule, beside tuned.

Run:  PYTHONPATH=src python benchmarks/bench_strength_rule.py SERIAL_RESULTS.json [--rule discrepancy]
          [--methods fb/tv admm/tv ...] [--workers 2] [-o rule.json]

For every task of the result file's suite and every chosen PnP method, pnpguard.choose_strength runs
guarded reconstructions over the shipped denoiser's registry range (7 geometric points, 3 more in
the bracket) and picks the strength by the rule from the data alone. Printed per (task, method):
the PSNR with the tuned strength (tuned on separate phantoms, from the result file), with the
rule's strength, and the oracle (best PSNR over the same strengths, using the truth), then the mean
gap rule - oracle per task family. One job per (task, method), through the library's job runner.
"""

from __future__ import annotations

import argparse
import json
from collections import defaultdict
from functools import partial

import pnpguard as pg
from pnpguard import bench
from pnpguard._jobs import run_jobs
from pnpguard.bench import FAMILIES, get_denoiser, get_task

DEFAULT_METHODS = ("fb/wavelet", "fb/tv", "admm/tv", "pgd/gradient-step-cnn")


def _make(name: str, shape: tuple[int, int], strength: float):
    return get_denoiser(name).make(strength, shape)


def _job(job: dict) -> dict:
    task = get_task(job["task"])
    shape = tuple(job["shape"])
    problem = task.problem(shape)
    algorithm, denoiser = job["method"].split("/")
    grid = get_denoiser(denoiser).grid
    options = {"max_iter": job["max_iter"], "tol": job["tol"], "check_budget": job["check_budget"]}
    if pg.splitting.algorithm(algorithm).watches == "objective" and isinstance(problem.op, pg.PixelMask):
        options["x0"] = pg.interpolated_start(problem.fidelity)  # as the suite does
    chosen = pg.choose_strength(problem.fidelity, partial(_make, denoiser, shape), algorithm,
                                (min(grid), max(grid)), rule=job["rule"], points=7, refine=3,
                                reference=problem.truth, data_range=1.0, **options)
    rows = [row.as_dict() for row in chosen.rows]
    scored = [row for row in chosen.rows if row.psnr is not None]
    return {
        "task": task.name, "family": task.family, "method": job["method"], "rule": job["rule"],
        "strength": chosen.strength,
        "psnr": next((r.psnr for r in chosen.rows if r.strength == chosen.strength), None),
        "oracle_strength": max(scored, key=lambda r: r.psnr).strength if scored else None,
        "oracle_psnr": max(r.psnr for r in scored) if scored else None,
        "rows": rows,
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("results", help="a serial result file of the suite (the tuned column)")
    parser.add_argument("--rule", default="discrepancy", choices=pg.strength.RULES)
    parser.add_argument("--methods", nargs="+", default=list(DEFAULT_METHODS))
    parser.add_argument("--workers", default=None)
    parser.add_argument("--output", "-o", default=None)
    args = parser.parse_args()
    document = bench.load_results(args.results)
    suite = document["suite"]
    tuned = {(r["task"], r["method"]): r for r in document["results"]}
    jobs = [
        {"task": task, "method": method, "rule": args.rule, "shape": suite["shape"],
         "max_iter": suite["max_iter"], "tol": suite["tol"], "check_budget": suite["check_budget"]}
        for task in suite["tasks"] for method in args.methods
    ]
    workers = None if args.workers is None else (args.workers if args.workers == "auto" else int(args.workers))
    done = run_jobs(_job, jobs, workers=workers, progress=True, description=f"{args.rule} strengths")
    gaps, out = defaultdict(list), []
    print(f"{'task':<24} {'method':<24} {'tuned':>7} {'rule':>7} {'oracle':>7} {'s_rule':>8} {'s_oracle':>8}")
    for job, result in zip(jobs, done):
        if not result.ok:
            print(f"{job['task']:<24} {job['method']:<24} failed: {result.error}")
            continue
        r = result.value
        out.append(r)
        t = tuned.get((job["task"], job["method"]), {}).get("psnr")

        def fmt(v, spec="7.2f"):
            return f"{v:{spec}}" if v is not None else f"{'-':>7}"

        print(f"{r['task']:<24} {r['method']:<24} {fmt(t)} {fmt(r['psnr'])} {fmt(r['oracle_psnr'])} "
              f"{fmt(r['strength'], '8.3g')} {fmt(r['oracle_strength'], '8.3g')}")
        if r["psnr"] is not None and r["oracle_psnr"] is not None:
            gaps[r["family"]].append(r["psnr"] - r["oracle_psnr"])
    print(f"\nmean gap {args.rule} - oracle per family (goal: within 0.5 dB on deblurring, inpainting, "
          "super-resolution):")
    for family in FAMILIES:
        if gaps[family]:
            values = gaps[family]
            print(f"  {family:<18} {sum(values) / len(values):+.2f} dB over {len(values)} runs "
                  f"(worst {min(values):+.2f})")
    if args.output:
        with open(args.output, "w") as handle:
            json.dump({"rule": args.rule, "suite": suite, "runs": out}, handle, indent=1)


if __name__ == "__main__":
    main()
