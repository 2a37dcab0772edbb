"""Compare two result files: quality regressions, changed verdicts, new flags."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from .._validation import choice, nonnegative_number

#: What a comparison can look at, sorted.
ASPECTS = ("flags", "quality", "timings", "verdicts")
#: Checked unless told otherwise (timings are noisy on shared machines).
DEFAULT_ASPECTS = ("flags", "quality", "verdicts")
#: Default tolerances: above run-to-run float differences across machines (common practice
#: for regression gates: a few tenths of a dB).
DEFAULT_PSNR_TOL = 0.3
DEFAULT_SSIM_TOL = 0.01
DEFAULT_TIME_RATIO = 2.0


@dataclass(frozen=True)
class Change:
    """One difference between two result files.

    Attributes
    ----------
    task, method : str
        Where (``method`` is ``"*"`` for a whole task).
    aspect : {"coverage", "flags", "quality", "timings", "verdicts"}
    regression : bool
        True when this difference fails the comparison.
    message : str
    """

    task: str
    method: str
    aspect: str
    regression: bool
    message: str

    def __str__(self) -> str:
        mark = "REGRESSION" if self.regression else "change"
        return f"[{mark}] {self.task} {self.method} ({self.aspect}): {self.message}"


@dataclass(frozen=True)
class Comparison:
    """Outcome of :func:`compare_results`.

    Attributes
    ----------
    changes : tuple of Change
    aspects : tuple of str
        The aspects that were checked.
    psnr_tol, ssim_tol, time_ratio : float
        The tolerances used.
    compared : int
        Number of (task, method) pairs present in both files.
    """

    changes: tuple[Change, ...]
    aspects: tuple[str, ...]
    psnr_tol: float
    ssim_tol: float
    time_ratio: float
    compared: int

    @property
    def regressions(self) -> tuple[Change, ...]:
        """The changes that fail the comparison."""
        return tuple(c for c in self.changes if c.regression)

    @property
    def passed(self) -> bool:
        """True when there is no regression."""
        return not self.regressions

    def __str__(self) -> str:
        head = (
            f"compared {self.compared} runs on {', '.join(self.aspects)} (PSNR tolerance "
            f"{self.psnr_tol:g} dB, SSIM tolerance {self.ssim_tol:g}"
            + (f", time ratio {self.time_ratio:g}" if "timings" in self.aspects else "")
            + ")"
        )
        lines = [head] + [f"  {change}" for change in self.changes]
        verdict = (
            "PASSED: no regression"
            if self.passed
            else f"FAILED: {len(self.regressions)} regression(s)"
        )
        return "\n".join(lines + [verdict])


def _index(document: dict[str, Any]) -> dict[tuple[str, str], dict[str, Any]]:
    return {(r["task"], r["method"]): r for r in document["results"]}


def _verdict_text(record: dict[str, Any]) -> dict[str, Any]:
    check = record.get("check") or {}
    guarantee = record.get("guarantee") or {}
    return {
        "status": record["status"],
        "check verdict": check.get("verdict"),
        "guarantee": guarantee.get("status"),
        "guarantee route": guarantee.get("route"),
    }


def _number(value: Any) -> str:
    return "none" if value is None else f"{value:.4g}"


def compare_results(
    old: dict[str, Any],
    new: dict[str, Any],
    *,
    aspects: tuple[str, ...] | list[str] = DEFAULT_ASPECTS,
    psnr_tol: float = DEFAULT_PSNR_TOL,
    ssim_tol: float = DEFAULT_SSIM_TOL,
    time_ratio: float = DEFAULT_TIME_RATIO,
) -> Comparison:
    """Compare a new result document against an old (baseline) one.

    Parameters
    ----------
    old, new : dict
        Result documents (:func:`load_results`).
    aspects : sequence of str, optional
        Any of ``"quality"`` (PSNR / SSIM), ``"verdicts"`` (run status, check
        verdict, guarantee status and route), ``"flags"`` (monitor flag kinds)
        and ``"timings"`` (wall time). Default: all but timings.
    psnr_tol : float, optional
        A PSNR drop larger than this (dB) is a regression.
    ssim_tol : float, optional
        An SSIM drop larger than this is a regression.
    time_ratio : float, optional
        With ``"timings"``: a run more than this many times slower is a
        regression.

    Returns
    -------
    Comparison

    Raises
    ------
    ValueError
        If an aspect is unknown, a tolerance is negative, or the files were
        produced at different image sizes (their numbers are not comparable).

    Notes
    -----
    Regressions: a quality drop beyond tolerance; any change of status,
    check verdict or guarantee (a change of what is promised needs a
    deliberate update of the baseline, even an improvement); a flag kind the
    old run did not raise; a (task, method) of the old file missing from the
    new one. Improvements and new runs are listed but pass.
    """
    aspects = tuple(sorted(choice(aspect, "aspects", ASPECTS) for aspect in set(aspects)))
    psnr_tol = nonnegative_number(psnr_tol, "psnr_tol")
    ssim_tol = nonnegative_number(ssim_tol, "ssim_tol")
    time_ratio = nonnegative_number(time_ratio, "time_ratio")
    old_shape, new_shape = old["suite"].get("shape"), new["suite"].get("shape")
    if old_shape != new_shape:
        raise ValueError(
            f"the result files were produced at different image sizes ({old_shape} and "
            f"{new_shape}); their numbers are not comparable"
        )
    before, after = _index(old), _index(new)
    changes: list[Change] = []
    for key in sorted(before.keys() - after.keys()):
        changes.append(Change(*key, "coverage", True, "present in the old results, missing in the new"))
    for key in sorted(after.keys() - before.keys()):
        changes.append(Change(*key, "coverage", False, "new in the new results"))
    common = sorted(before.keys() & after.keys())
    for key in common:
        a, b = before[key], after[key]
        if "verdicts" in aspects:
            va, vb = _verdict_text(a), _verdict_text(b)
            for name in va:
                if va[name] != vb[name]:
                    changes.append(Change(*key, "verdicts", True, f"{name} changed from {va[name]} to {vb[name]}"))
        if "quality" in aspects:
            for metric, tol in (("psnr", psnr_tol), ("ssim", ssim_tol)):
                x, y = a.get(metric), b.get(metric)
                if x is None or y is None:
                    if (x is None) != (y is None) and "verdicts" not in aspects:
                        changes.append(Change(*key, "quality", True, f"{metric} {_number(x)} -> {_number(y)}"))
                    continue
                if y < x - tol:
                    changes.append(
                        Change(*key, "quality", True, f"{metric} dropped {x:.4g} -> {y:.4g} ({y - x:+.3g})")
                    )
                elif y > x + tol:
                    changes.append(
                        Change(*key, "quality", False, f"{metric} improved {x:.4g} -> {y:.4g} ({y - x:+.3g})")
                    )
        if "flags" in aspects:
            old_kinds = {f["kind"] for f in a["flags"]}
            for flag in b["flags"]:
                if flag["kind"] not in old_kinds:
                    changes.append(
                        Change(*key, "flags", True,
                               f"new monitor flag {flag['kind']} (x{flag['count']}): {flag['message']}")
                    )
        if "timings" in aspects:
            x, y = a.get("seconds"), b.get("seconds")
            if x and y and y > time_ratio * x:
                changes.append(Change(*key, "timings", True, f"wall time {x:.3g} s -> {y:.3g} s"))
    return Comparison(tuple(changes), aspects, float(psnr_tol), float(ssim_tol), float(time_ratio), len(common))
