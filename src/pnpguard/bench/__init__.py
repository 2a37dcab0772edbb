"""Benchmark suite: tasks, guarded PnP methods and classical baselines, results, reports.

A *task* is a phantom, a forward model, a noise level and seeds; a *suite*
runs its tasks at one image size with every applicable method: every PnP
algorithm with every shipped denoiser (a refusal by the guard is a result)
and the classical baselines of the task's family, all with parameters tuned
once on separate tuning phantoms (``tuned.json``). Results go to a JSON file
of our own layout, which :func:`compare_results` checks against a baseline
file and :func:`write_report` turns into markdown and figures.

Examples
--------
>>> from pnpguard import bench
>>> bench.suite_names()
('full', 'quick')
>>> bench.get_task("superres-x2").family
'super-resolution'
"""

from .._caution import CAUTION
from ._compare import (
    ASPECTS,
    DEFAULT_ASPECTS,
    DEFAULT_PSNR_TOL,
    DEFAULT_SSIM_TOL,
    Change,
    Comparison,
    compare_results,
)
from ._methods import BASELINES, Method, methods_for
from ._registry import ShippedDenoiser, denoiser_names, get_denoiser, shipped_denoisers
from ._report import (
    GOAL_DB,
    FamilyGap,
    family_gaps,
    markdown_report,
    ranking,
    write_report,
)
from ._results import BenchmarkRun, load_arrays, load_results
from ._rule_column import rule_gaps
from ._runner import run_suite
from ._tasks import (
    FAMILIES,
    Problem,
    Suite,
    Task,
    UserModel,
    custom_suite,
    get_suite,
    get_task,
    suite_names,
    task_names,
    user_task,
)
from ._tuned import SHIPPED_TUNED, TunedParameters, load_tuned
from ._tuning import tune_task

__all__ = [
    "ASPECTS",
    "BASELINES",
    "CAUTION",
    "DEFAULT_ASPECTS",
    "DEFAULT_PSNR_TOL",
    "DEFAULT_SSIM_TOL",
    "FAMILIES",
    "GOAL_DB",
    "SHIPPED_TUNED",
    "BenchmarkRun",
    "Change",
    "Comparison",
    "FamilyGap",
    "Method",
    "Problem",
    "ShippedDenoiser",
    "Suite",
    "Task",
    "TunedParameters",
    "UserModel",
    "compare_results",
    "custom_suite",
    "denoiser_names",
    "family_gaps",
    "get_denoiser",
    "get_suite",
    "get_task",
    "load_arrays",
    "load_results",
    "load_tuned",
    "markdown_report",
    "methods_for",
    "ranking",
    "rule_gaps",
    "run_suite",
    "shipped_denoisers",
    "suite_names",
    "task_names",
    "tune_task",
    "user_task",
    "write_report",
]
