"""The tables ``pnpguard list`` prints, kept in a file so that listing imports no torch.

The suites, tasks, algorithms (with their theorem routes) and shipped
denoisers are defined in modules that need torch, whose import alone takes
seconds. ``catalogue.json`` beside this module holds the lines and rows
those tables produce; :func:`live_catalogue` rebuilds them from the
definitions, and the test suite checks that the two agree, so the file
cannot drift from the code. After changing a table, rewrite it with::

    python -m pnpguard._catalogue
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

#: The stored tables.
CATALOGUE_PATH = Path(__file__).with_name("catalogue.json")

#: Column headers of the tables with columns.
TASK_COLUMNS = ("task", "family", "forward model", "noise (of peak)", "phantom")
ALGORITHM_COLUMNS = ("algorithm", "short", "parameter", "monitored", "theorem routes")


def live_catalogue() -> dict[str, Any]:
    """The tables built from the definitions (imports torch).

    Returns
    -------
    dict
        ``"suites"`` and ``"denoisers"``: lists of lines; ``"tasks"`` and
        ``"algorithms"``: lists of rows (lists of cells) under
        :data:`TASK_COLUMNS` and :data:`ALGORITHM_COLUMNS`.
    """
    from .bench import get_suite, get_task, shipped_denoisers, suite_names, task_names
    from .guarantee import ROUTES
    from .splitting import ALGORITHMS

    suites = []
    for name in suite_names():
        suite = get_suite(name)
        suites.append(
            f"{name}: {len(suite.tasks)} tasks at {suite.shape[0]}x{suite.shape[1]}, "
            f"max_iter {suite.max_iter}: {', '.join(t.name for t in suite.tasks)}"
        )
    tasks = []
    for name in task_names():
        task = get_task(name)
        tasks.append([name, task.family, task.model.summary(), f"{100 * task.noise:g} %", task.phantom])
    algorithms = [
        [record.name, record.short, record.step_name, record.variable,
         ", ".join(route.name for route in ROUTES if record.name in route.algorithms)]
        for record in ALGORITHMS.values()
    ]
    denoisers = [
        f"{entry.name}: {entry.description}; strength = {entry.strength}; {entry.structure}"
        for entry in shipped_denoisers()
    ]
    return {"suites": suites, "tasks": tasks, "algorithms": algorithms, "denoisers": denoisers}


def read_catalogue() -> dict[str, Any]:
    """The stored tables (no heavy import)."""
    return json.loads(CATALOGUE_PATH.read_text(encoding="utf-8"))


def write_catalogue() -> None:
    """Store :func:`live_catalogue` in :data:`CATALOGUE_PATH`."""
    CATALOGUE_PATH.write_text(json.dumps(live_catalogue(), indent=1) + "\n", encoding="utf-8")


if __name__ == "__main__":
    write_catalogue()
