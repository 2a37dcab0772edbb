"""The suite's "no ground truth" column: each PnP method at a strength chosen by a rule.

For one task and one PnP method, :func:`run_rule_job` lets
:func:`pnpguard.choose_strength` pick the denoiser's strength on the task's own
data (discrepancy principle or Monte-Carlo SURE; the ground truth is never
shown to the rule), then runs the method at that strength exactly as the
tuned column does (:func:`run_pnp`: same start, same first phase, same
guard). The ground truth is used afterwards, for evaluation only: the PSNR of
every strength the rule tried gives the *oracle* on that grid, and the gap
between the rule's pick and the oracle is recorded beside the result.
"""

from __future__ import annotations

import functools
import time
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..starts import interpolated_start
from ..strength import choose_strength
from ._methods import DenoiserCache, Method, run_pnp, starts_interpolated
from ._registry import Shape, get_denoiser
from ._tasks import DATA_RANGE, Suite, Task

#: Strengths of the rule's coarse grid, spread geometrically over the registry grid's range.
RULE_POINTS = 6
#: Strengths added between the rule's pick and its neighbours.
RULE_REFINE = 2
#: Rules the column accepts (:func:`pnpguard.choose_strength`).
RULES = ("discrepancy", "sure")


def rule_method_name(method: Method, rule: str) -> str:
    """The result-file name of a method run at the rule's strength: ``"fb/tv@sure"``."""
    return f"{method.name}@{rule}"


@dataclass(frozen=True)
class RuleJob:
    """One PnP method on one task, its strength chosen by ``rule``.

    Attributes
    ----------
    task : Task
    suite : Suite
    method : Method
    rule : {"discrepancy", "sure"}
    budget : int
        Denoiser calls per black-box check.
    seed : int
        Seed of the check's pair search and of the SURE probe.
    """

    task: Task
    suite: Suite
    method: Method
    rule: str
    budget: int
    seed: int


def _build(name: str, shape: Shape, strength: float) -> Any:
    return get_denoiser(name).make(strength, shape)


def run_rule_job(job: RuleJob) -> dict[str, Any]:
    """Choose the strength by the rule, run the method there, and evaluate both against the truth.

    Returns
    -------
    dict
        ``"outcome"`` (the :class:`Outcome` of the run at the chosen strength,
        or None when the rule found no admissible strength), ``"choice"`` (the
        rule's table, :meth:`StrengthChoice.as_dict`), ``"problem"`` and
        ``"seconds"``.
    """
    begin = time.perf_counter()
    problem = job.task.problem(job.task.fixed_shape or job.suite.shape)
    entry = get_denoiser(job.method.denoiser)
    options: dict[str, Any] = {"max_iter": job.suite.max_iter, "tol": job.suite.tol,
                               "check_budget": job.budget}
    if starts_interpolated(problem):
        options["x0"] = interpolated_start(problem.fidelity)
    choice = choose_strength(
        problem.fidelity,
        functools.partial(_build, entry.name, problem.shape),
        job.method.algorithm,
        (min(entry.grid), max(entry.grid)),
        rule=job.rule,
        points=RULE_POINTS,
        refine=RULE_REFINE,
        seed=job.seed,
        reference=problem.truth,
        data_range=DATA_RANGE,
        **options,
    )
    outcome = None
    if choice.strength is not None:
        denoisers = DenoiserCache(problem, budget=job.budget, seed=job.seed)
        outcome = run_pnp(job.method, problem, choice.strength, denoisers=denoisers,
                          max_iter=job.suite.max_iter, tol=job.suite.tol)
    return {"outcome": outcome, "choice": choice.as_dict(), "problem": problem,
            "seconds": time.perf_counter() - begin}


def rule_summary(choice: dict[str, Any]) -> dict[str, Any]:
    """What the result file keeps of the rule's table, with the oracle on its grid.

    The oracle is the strength of highest PSNR among those the rule tried
    (evaluation only); ``gap_to_oracle`` is the PSNR of the rule's pick minus
    the oracle's, on the same runs (<= 0).
    """
    rows = choice["rows"]
    scored = [row for row in rows if row["psnr"] is not None]
    picked = next((row for row in rows if row["strength"] == choice["strength"]), None)
    oracle = max(scored, key=lambda row: row["psnr"]) if scored else None
    gap = None
    if picked is not None and picked["psnr"] is not None and oracle is not None:
        gap = float(picked["psnr"] - oracle["psnr"])
    return {
        "rule": choice["rule"],
        "note": choice["note"],
        "strength": choice["strength"],
        "oracle_strength": oracle["strength"] if oracle else None,
        "oracle_psnr": oracle["psnr"] if oracle else None,
        "picked_psnr": picked["psnr"] if picked else None,
        "gap_to_oracle": gap,
        "rows": [{key: row[key] for key in ("strength", "value", "guarantee", "iterations", "psnr")}
                 for row in rows],
    }


def rule_gaps(document: dict[str, Any]) -> dict[str, dict[str, float]]:
    """Per family and rule method, the mean gap of the rule's pick to the oracle on its grid (dB).

    Returns
    -------
    dict
        ``{family: {method: mean gap_to_oracle}}`` over the family's tasks
        where the rule picked a strength; families without rule records are
        left out.
    """
    family = {task["name"]: task["family"] for task in document["tasks"]}
    gaps: dict[str, dict[str, list[float]]] = {}
    for record in document["results"]:
        rule = record.get("strength_rule")
        if rule is None or rule["gap_to_oracle"] is None:
            continue
        gaps.setdefault(family[record["task"]], {}).setdefault(record["method"], []).append(rule["gap_to_oracle"])
    return {f: {m: float(np.mean(v)) for m, v in methods.items()} for f, methods in gaps.items()}
