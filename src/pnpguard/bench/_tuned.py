"""The frozen parameters of every (task, method), tuned on tuning phantoms.

The shipped file ``tuned.json`` is written by ``benchmarks/tune_suite.py``;
its layout::

    {"format": "pnpguard-tuned-parameters", "format_version": 1,
     "made_by": ..., "created": ..., "git_commit": ..., "how": ...,
     "tasks": {task name: {
         "phantom": ..., "seed": ..., "shape": [H, W], "max_iter": ...,
         "denoisers": {denoiser name: {"strength": s, "psnr": ..., "method": ...}},
         "baselines": {baseline name: {"parameters": {...}, "psnr": ...}}}}}

``phantom`` and ``seed`` are the *tuning* phantom and seed (never the
benchmark's), ``psnr`` the tuning-phantom PSNR at the chosen value.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .._fileformat import check_format

FORMAT = "pnpguard-tuned-parameters"
FORMAT_VERSION = 1

#: The parameter file shipped with the package.
SHIPPED_TUNED = Path(__file__).with_name("tuned.json")


@dataclass(frozen=True)
class TunedParameters:
    """A loaded tuned-parameter file.

    Attributes
    ----------
    data : dict
        The file's content (layout in the module docstring).
    path : str
        Where it was read from.
    sha256 : str
        Hash of the file's bytes, recorded in result files.
    """

    data: dict[str, Any]
    path: str
    sha256: str

    def _task(self, task: str) -> dict[str, Any]:
        tasks = self.data["tasks"]
        if task not in tasks:
            raise KeyError(
                f"task {task!r} has no tuned parameters in {self.path}; run "
                "benchmarks/tune_suite.py for it"
            )
        return tasks[task]

    def strength(self, task: str, denoiser: str) -> float:
        """The tuned strength of a shipped denoiser on a task."""
        entry = self._task(task)["denoisers"].get(denoiser)
        if entry is None:
            raise KeyError(
                f"denoiser {denoiser!r} has no tuned strength for task {task!r} in {self.path}; "
                "run benchmarks/tune_suite.py"
            )
        return float(entry["strength"])

    def baseline(self, task: str, baseline: str) -> dict[str, Any]:
        """The tuned parameters of a baseline on a task."""
        entry = self._task(task)["baselines"].get(baseline)
        if entry is None:
            raise KeyError(
                f"baseline {baseline!r} has no tuned parameters for task {task!r} in {self.path}; "
                "run benchmarks/tune_suite.py"
            )
        return dict(entry["parameters"])

    def provenance(self) -> dict[str, Any]:
        """What result files record about the parameters."""
        return {
            "path": self.path,
            "sha256": self.sha256,
            "created": self.data.get("created"),
            "git_commit": self.data.get("git_commit"),
            "tuned_here": sorted(self.data.get("tuned_here", {})),
        }

    def including(self, entries: dict[str, dict[str, Any]], how: str) -> TunedParameters:
        """These parameters plus entries tuned in this process (users' tasks), which are recorded.

        Parameters
        ----------
        entries : dict
            Task name -> entry of the file layout (:func:`pnpguard.bench.tune_task`).
        how : str
            How they were tuned, in words; kept under ``"tuned_here"``.
        """
        clash = sorted(set(entries) & set(self.data["tasks"]))
        if clash:
            raise ValueError(f"task {clash[0]!r} already has tuned parameters in {self.path}")
        data = {**self.data, "tasks": {**self.data["tasks"], **entries},
                "tuned_here": {**self.data.get("tuned_here", {}), **{name: how for name in entries}}}
        return TunedParameters(data, self.path, self.sha256)


def load_tuned(path: str | Path | None = None) -> TunedParameters:
    """Read a tuned-parameter file (default: the one shipped with the package).

    Raises
    ------
    FileNotFoundError
        If the file does not exist.
    ValueError
        If it is not a tuned-parameter file of a supported version.
    """
    path = SHIPPED_TUNED if path is None else Path(path)
    if not path.is_file():
        raise FileNotFoundError(f"tuned-parameter file {str(path)!r} does not exist")
    raw = path.read_bytes()
    try:
        data = json.loads(raw)
    except json.JSONDecodeError as error:
        raise ValueError(f"{str(path)!r} is not valid JSON: {error}") from None
    check_format(data, repr(str(path)), FORMAT, FORMAT_VERSION)
    if not isinstance(data.get("tasks"), dict):
        raise ValueError(f"{str(path)!r} lacks a 'tasks' mapping")
    label = "shipped tuned.json" if path == SHIPPED_TUNED else str(path)
    return TunedParameters(data, label, hashlib.sha256(raw).hexdigest())
