"""The benchmark result file: a JSON document of our own layout, and its images.

Layout (``format_version`` 1)::

    {"format": "pnpguard-benchmark-results", "format_version": 1,
     "created": ISO 8601 time, "seconds": total wall time,
     "suite": {"name", "tasks", "shape", "max_iter", "tol", "check_budget"},
     "settings": {"seed", "check_budget", "threads", "data_range", "dtype", "tuned",
                  "workers" (where the jobs ran: "serial" or the dask.distributed cluster)},
     "environment": {"pnpguard", "git_commit", "git_dirty", "python", "torch", "numpy",
                     "scipy", "scikit-image", "platform", "machine", "processor", "cpu_count"},
     "tasks": [{"name", "family", "model", "noise", "phantom", "seed", "tuning_phantom",
                "tuning_seed", "shape", "sigma", "seconds"}],
     "results": [record, ...],
     "images": file name of the companion .npz or null,
     "caution": text or null}

Each record::

    {"task", "method", "kind" ("pnp" | "baseline"), "algorithm", "denoiser",
     "status" ("ok" | "refused" | "error"), "psnr", "ssim", "iterations", "converged",
     "final_residual", "seconds", "check_seconds", "message", "parameters",
     "flags": [{"kind", "action", "count", "first_iteration", "message"}],
     "check": {"verdict", "theta", "lipschitz", "residual_lipschitz", "refuted",
               "calls", "method"} or null,
     "guarantee": {"status", "route", "step", "relaxation", "map_kind", "constant",
                   "theorem"} or null,
     "refusal": {"reasons": [...], "suggestions": [...]} or null}

Status ``"error"``: the method's job raised or its workers kept dying; its
``message`` says why and its numbers are null. Numbers that are not finite are
stored as null. The companion ``.npz`` holds
``<task>/truth``, ``<task>/data``, ``<task>/<method>`` (reconstructions) and
``<task>/<method>/residuals`` (curves).
"""

from __future__ import annotations

import json
import math
import os
import platform
import subprocess
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .._fileformat import check_format
from .._version import package_version

FORMAT = "pnpguard-benchmark-results"
FORMAT_VERSION = 1

_RECORD_KEYS = ("task", "method", "kind", "status", "psnr", "ssim", "check", "guarantee", "flags")



def finite_or_none(value: Any) -> float | None:
    """``float(value)`` when finite, else None (JSON has no NaN or infinity)."""
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def _git(*args: str) -> str | None:
    try:
        done = subprocess.run(
            ["git", *args],
            cwd=Path(__file__).resolve().parent,
            capture_output=True,
            text=True,
            timeout=10,
            check=False,
        )
    except (OSError, subprocess.SubprocessError):
        return None
    return done.stdout.strip() if done.returncode == 0 else None


def environment(threads: int) -> dict[str, Any]:
    """Versions, commit and machine description for a result file."""
    import scipy
    import skimage
    import torch

    status = _git("status", "--porcelain", "--untracked-files=no")
    return {
        "pnpguard": package_version(),
        "git_commit": _git("rev-parse", "HEAD"),
        "git_dirty": None if status is None else bool(status),
        "python": platform.python_version(),
        "torch": torch.__version__,
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "scikit-image": skimage.__version__,
        "platform": platform.platform(),
        "machine": platform.machine(),
        "processor": platform.processor() or None,
        "cpu_count": os.cpu_count(),
        "threads": threads,
    }


def flag_summary(flags: tuple) -> list[dict[str, Any]]:
    """The monitor's flags grouped by kind: count, first iteration and message."""
    counts = Counter(flag.kind for flag in flags)
    first: dict[str, Any] = {}
    for flag in flags:
        first.setdefault(flag.kind, flag)
    return [
        {
            "kind": kind,
            "action": first[kind].action,
            "count": counts[kind],
            "first_iteration": first[kind].iteration,
            "message": first[kind].message,
        }
        for kind in sorted(counts)
    ]


def check_summary(report: Any) -> dict[str, Any] | None:
    """The fields of a CheckReport that a result file keeps."""
    if report is None:
        return None
    return {
        "verdict": report.verdict,
        "theta": finite_or_none(report.theta),
        "lipschitz": finite_or_none(report.lipschitz),
        "residual_lipschitz": finite_or_none(report.residual_lipschitz),
        "refuted": report.refuted,
        "smoothness": None if report.smoothness is None else finite_or_none(report.smoothness.value),
        "calls": report.calls,
        "method": report.method,
    }


def guarantee_summary(guarantee: Any) -> dict[str, Any] | None:
    """The fields of a Guarantee that a result file keeps."""
    if guarantee is None:
        return None
    return {
        "status": guarantee.status,
        "route": guarantee.route,
        "step": finite_or_none(guarantee.step),
        "relaxation": finite_or_none(guarantee.relaxation),
        "map_kind": guarantee.map_kind,
        "constant": finite_or_none(guarantee.constant),
        "theorem": guarantee.theorem,
    }


@dataclass(frozen=True)
class BenchmarkRun:
    """A suite's results: the JSON document and the arrays behind it.

    Attributes
    ----------
    document : dict
        The result file's content (layout in the module docstring).
    arrays : dict of str to numpy.ndarray
        Ground truths, data, reconstructions and residual curves.
    """

    document: dict[str, Any]
    arrays: dict[str, np.ndarray] = field(repr=False, default_factory=dict)

    def save(self, path: str | Path, *, images: bool = True) -> Path:
        """Write the JSON file and, with ``images``, ``<stem>.npz`` beside it.

        Returns the JSON path.
        """
        path = Path(path)
        path.parent.mkdir(parents=True, exist_ok=True)
        document = dict(self.document)
        document["images"] = None
        if images and self.arrays:
            npz = path.with_suffix(".npz")
            np.savez_compressed(npz, **self.arrays)
            document["images"] = npz.name
        path.write_text(json.dumps(document, indent=1, allow_nan=False) + "\n")
        return path


def validate(document: Any, source: str = "results") -> dict[str, Any]:
    """Check a result document's format, version and record fields.

    Raises
    ------
    ValueError
        Naming what is wrong.
    """
    check_format(document, source, FORMAT, FORMAT_VERSION)
    for key in ("suite", "settings", "environment", "tasks", "results"):
        if key not in document:
            raise ValueError(f"{source} lacks the {key!r} entry")
    for number, record in enumerate(document["results"]):
        missing = [key for key in _RECORD_KEYS if key not in record]
        if missing:
            raise ValueError(f"{source}: result {number} lacks {', '.join(missing)}")
    return document


def load_results(path: str | Path) -> dict[str, Any]:
    """Read and validate a result file.

    Raises
    ------
    FileNotFoundError
        If ``path`` does not exist.
    ValueError
        If it is not a valid result file.
    """
    path = Path(path)
    if not path.is_file():
        raise FileNotFoundError(f"result file {str(path)!r} does not exist")
    try:
        document = json.loads(path.read_text())
    except (json.JSONDecodeError, UnicodeDecodeError) as error:
        raise ValueError(f"{str(path)!r} is not valid JSON: {error}") from None
    return validate(document, repr(str(path)))


def load_arrays(path: str | Path, document: dict[str, Any]) -> dict[str, np.ndarray]:
    """The companion arrays of a result file, or an empty dict when there are none."""
    name = document.get("images")
    if not name:
        return {}
    npz = Path(path).with_name(name)
    if not npz.is_file():
        return {}
    with np.load(npz) as archive:
        return {key: archive[key] for key in archive.files}

