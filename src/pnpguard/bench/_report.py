"""Markdown report and PNG figures from a result file."""

from __future__ import annotations

import math
from collections import defaultdict
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ._tasks import FAMILIES, USER_FAMILY

#: The project's goal: the best guarded PnP method beats the best classical
#: baseline by at least this many dB, averaged over the tasks of each family.
GOAL_DB = 1.0

#: Residual curves: colour per denoiser, line style per algorithm (in table order).
_LINE_STYLES = ("-", "--", ":", "-.")


def _line_style(short: str) -> str:
    """The line style of an algorithm's curves: one per algorithm of the table, in order."""
    from ..splitting import ALGORITHMS

    order = [record.short for record in ALGORITHMS.values()]
    return _LINE_STYLES[order.index(short) % len(_LINE_STYLES)] if short in order else "-"


@dataclass(frozen=True)
class FamilyGap:
    """Best guarded PnP against best classical baseline on one task family.

    Attributes
    ----------
    family : str
    tasks : tuple of str
    gaps : tuple of float
        Per task: best PnP PSNR minus best baseline PSNR (dB); NaN when a task
        has no successful run of one kind.
    mean_gap : float
        Their mean (NaN if any is NaN).
    goal_met : bool
        ``mean_gap >= GOAL_DB``.
    """

    family: str
    tasks: tuple[str, ...]
    gaps: tuple[float, ...]
    mean_gap: float
    goal_met: bool


def ranking(document: dict[str, Any], task: str) -> list[dict[str, Any]]:
    """The successful runs of a task, best PSNR first (ties: name order)."""
    runs = [r for r in document["results"] if r["task"] == task and r["psnr"] is not None]
    return sorted(runs, key=lambda r: (-r["psnr"], r["method"]))


def _best(document: dict[str, Any], task: str, kind: str) -> dict[str, Any] | None:
    runs = [r for r in ranking(document, task) if r["kind"] == kind]
    return runs[0] if runs else None


def family_gaps(document: dict[str, Any]) -> list[FamilyGap]:
    """:class:`FamilyGap` of every family present, in family order."""
    by_family: dict[str, list[str]] = defaultdict(list)
    for task in document["tasks"]:
        by_family[task["family"]].append(task["name"])
    gaps = []
    for family in (*FAMILIES, USER_FAMILY):
        if family not in by_family:
            continue
        values = []
        for task in by_family[family]:
            pnp, base = _best(document, task, "pnp"), _best(document, task, "baseline")
            values.append(pnp["psnr"] - base["psnr"] if pnp and base else math.nan)
        mean = float(np.mean(values))
        gaps.append(FamilyGap(family, tuple(by_family[family]), tuple(values), mean, bool(mean >= GOAL_DB)))
    return gaps


def _cell(record: dict[str, Any] | None, best: float | None) -> str:
    if record is None:
        return ""
    if record["status"] in ("refused", "error"):
        return record["status"]
    text = f"{record['psnr']:.2f} / {record['ssim']:.3f}"
    return f"**{text}**" if best is not None and record["psnr"] == best else text


def _guard_cell(record: dict[str, Any] | None) -> str:
    if record is None:
        return ""
    if record["status"] == "error":
        return record["message"]
    check = record["check"] or {}
    verdict = check.get("verdict", "")
    theta = check.get("theta")
    head = f"{verdict} theta={theta:.3g}" if theta is not None else f"{verdict} theta=inf"
    if record["status"] == "refused":
        return f"{head}; refused"
    guarantee = record["guarantee"]
    text = f"{head}; {guarantee['status']} ({guarantee['route']})"
    if record["flags"]:
        text += "; flags: " + ", ".join(f"{f['kind']} x{f['count']}" for f in record["flags"])
    return text


def _methods_in_order(document: dict[str, Any]) -> list[tuple[str, str]]:
    seen: dict[str, str] = {}
    for record in document["results"]:
        seen.setdefault(record["method"], record["kind"])
    baselines = [(m, k) for m, k in seen.items() if k == "baseline"]
    pnp = [(m, k) for m, k in seen.items() if k == "pnp"]
    return baselines + pnp


def markdown_report(document: dict[str, Any], figures: dict[str, list[str]] | None = None) -> str:
    """The report as markdown text.

    Parameters
    ----------
    document : dict
        A result document.
    figures : dict, optional
        Task name -> file names of its figures, linked under each task.
    """
    tasks = [t["name"] for t in document["tasks"]]
    env, suite, settings = document["environment"], document["suite"], document["settings"]
    index = {(r["task"], r["method"]): r for r in document["results"]}
    commit = (env.get("git_commit") or "unknown")[:10]
    lines = [
        f"# pnpguard benchmark: suite `{suite['name']}`",
        "",
        (
            f"- {len(tasks)} tasks at {suite['shape'][0]}x{suite['shape'][1]}, "
            f"{len(document['results'])} runs, {document['seconds']:.1f} s in total "
            f"({document['created']})"
        ),
        (
            f"- pnpguard {env['pnpguard']} (commit {commit}"
            f"{', modified checkout' if env.get('git_dirty') else ''}), "
            f"torch {env['torch']}, numpy {env['numpy']}, Python {env['python']}"
        ),
        f"- machine: {env['platform']}, {env['cpu_count']} CPUs, {settings['threads']} torch thread(s)",
        (
            f"- PnP: max_iter {suite['max_iter']}, tol {suite['tol']:g}; black-box denoiser checks: "
            f"{settings['check_budget']} calls, seed {settings['seed']}"
        ),
        (
            f"- parameters: {settings['tuned']['path']} (sha256 {settings['tuned']['sha256'][:12]}), "
            "tuned on tuning phantoms, not on these"
        ),
        "",
        "## PSNR (dB) / SSIM, task x method",
        "",
        "Best of each task in bold; `refused`: the guard found no theorem for the run.",
        "",
        "| method | kind | " + " | ".join(tasks) + " |",
        "|---|---|" + "---|" * len(tasks),
    ]
    best = {t: (ranking(document, t)[0]["psnr"] if ranking(document, t) else None) for t in tasks}
    for method, kind in _methods_in_order(document):
        cells = [_cell(index.get((t, method)), best[t]) for t in tasks]
        lines.append(f"| {method} | {kind} | " + " | ".join(cells) + " |")
    lines += ["", "## Ranking per task", ""]
    for task in tasks:
        ranked = ranking(document, task)
        order = ", ".join(f"{i}. {r['method']} {r['psnr']:.2f}" for i, r in enumerate(ranked, 1))
        refused = sorted(r["method"] for r in document["results"] if r["task"] == task and r["status"] == "refused")
        lines.append(f"- **{task}**: {order}" + (f" (refused: {', '.join(refused)})" if refused else ""))
    lines += [
        "",
        "## Best guarded PnP against best classical baseline",
        "",
        f"Goal: at least {GOAL_DB:g} dB PSNR on average over the tasks of every family.",
        "",
        "| family | task | best PnP | best baseline | gap (dB) |",
        "|---|---|---|---|---|",
    ]
    for gap in family_gaps(document):
        for task, value in zip(gap.tasks, gap.gaps):
            pnp, base = _best(document, task, "pnp"), _best(document, task, "baseline")
            lines.append(
                f"| {gap.family} | {task} | "
                + (f"{pnp['method']} {pnp['psnr']:.2f}" if pnp else "none")
                + " | "
                + (f"{base['method']} {base['psnr']:.2f}" if base else "none")
                + f" | {value:+.2f} |"
            )
        lines.append(
            f"| **{gap.family}** | mean | | | **{gap.mean_gap:+.2f}** "
            f"({'goal met' if gap.goal_met else 'goal not met'}) |"
        )
    pnp_methods = [m for m, k in _methods_in_order(document) if k == "pnp"]
    if pnp_methods:
        lines += [
            "",
            "## Checks, guarantees and monitor flags (PnP)",
            "",
            "| method | " + " | ".join(tasks) + " |",
            "|---|" + "---|" * len(tasks),
        ]
        for method in pnp_methods:
            lines.append(f"| {method} | " + " | ".join(_guard_cell(index.get((t, method))) for t in tasks) + " |")
    rule_records = [r for r in document["results"] if r.get("strength_rule")]
    if rule_records:
        lines += [
            "",
            "## Strength without ground truth",
            "",
            f"Each `METHOD@{settings.get('strength_rule')}` run took the strength its rule picked on the "
            "task's own data. Oracle: the best PSNR among the strengths the rule tried, found with the "
            "ground truth (evaluation only).",
            "",
            "| task | method | picked strength | oracle strength | PSNR at pick / oracle | gap (dB) |",
            "|---|---|---|---|---|---|",
        ]
        for record in rule_records:
            rule = record["strength_rule"]
            numbers = (
                f"{rule['picked_psnr']:.2f} / {rule['oracle_psnr']:.2f} | {rule['gap_to_oracle']:+.2f}"
                if rule["gap_to_oracle"] is not None else "- | -"
            )
            picked = "none" if rule["strength"] is None else f"{rule['strength']:.4g}"
            oracle = "none" if rule["oracle_strength"] is None else f"{rule['oracle_strength']:.4g}"
            lines.append(f"| {record['task']} | {record['method']} | {picked} | {oracle} | {numbers} |")
    lines += ["", "## Time per task", "", "| task | seconds |", "|---|---|"]
    lines += [f"| {t['name']} | {t['seconds']:.1f} |" for t in document["tasks"]]
    if figures:
        lines += ["", "## Figures", ""]
        for task in tasks:
            for name in figures.get(task, []):
                lines.append(f"![{task}]({name})")
    if document.get("caution"):
        lines += ["", f"> {document['caution']}"]
    return "\n".join(lines) + "\n"


def _display_data(data: np.ndarray, truth: np.ndarray) -> tuple[np.ndarray, dict[str, Any]]:
    if data.shape == truth.shape:
        return data, {"vmin": 0.0, "vmax": 1.0}
    if data.shape[0] * 2 <= truth.shape[0] and data.shape[1] * 2 <= truth.shape[1]:
        return data, {"vmin": 0.0, "vmax": 1.0}  # low-resolution frame, shown at its own grid
    return data, {"aspect": "auto"}  # sinogram


def _figures(document: dict[str, Any], arrays: dict[str, np.ndarray], out: Path) -> dict[str, list[str]]:
    try:
        from matplotlib.figure import Figure
    except ImportError as error:
        raise ImportError("figures need matplotlib: pip install 'pnpguard[plots]'") from error
    written: dict[str, list[str]] = {}
    for task in (t["name"] for t in document["tasks"]):
        if f"{task}/truth" not in arrays:
            continue
        truth = arrays[f"{task}/truth"]
        ranked = ranking(document, task)
        baselines = [r for r in ranked if r["kind"] == "baseline"][:2]
        pnp = [r for r in ranked if r["kind"] == "pnp"][:3]
        panels = [("truth", truth, {"vmin": 0.0, "vmax": 1.0})]
        data, options = _display_data(arrays[f"{task}/data"], truth)
        panels.append(("data", data, options))
        for record in baselines + pnp:
            key = f"{task}/{record['method']}"
            if key in arrays:
                panels.append(
                    (f"{record['method']}\n{record['psnr']:.2f} dB", arrays[key], {"vmin": 0.0, "vmax": 1.0})
                )
        figure = Figure(figsize=(2.3 * len(panels), 2.7))
        for number, (title, image, options) in enumerate(panels, 1):
            axis = figure.add_subplot(1, len(panels), number)
            axis.imshow(image, cmap="gray", interpolation="nearest", **options)
            axis.set_title(title, fontsize=8)
            axis.set_xticks([])
            axis.set_yticks([])
        figure.suptitle(task, fontsize=9)
        figure.tight_layout()
        names = [f"{task}-images.png"]
        figure.savefig(out / names[0], dpi=110)
        curves = Figure(figsize=(6.0, 3.6))
        axis = curves.add_subplot(1, 1, 1)
        denoisers = sorted({r["denoiser"] for r in document["results"] if r["kind"] == "pnp"})
        for record in (r for r in document["results"] if r["task"] == task and r["status"] == "ok"):
            key = f"{task}/{record['method']}/residuals"
            if key in arrays and arrays[key].size > 1 and record["kind"] == "pnp":
                values = arrays[key]
                axis.semilogy(
                    np.arange(1, values.size + 1),
                    np.maximum(values, 1e-300),
                    lw=1.2,
                    color=f"C{denoisers.index(record['denoiser']) % 10}",
                    ls=_line_style(record["algorithm"]),
                    label=record["method"],
                )
        if axis.lines:
            axis.set_xlabel("iteration")
            axis.set_ylabel("||T v - v|| / ||v||")
            axis.set_title(f"{task}: fixed-point residuals of the guarded runs", fontsize=9)
            axis.legend(fontsize=6, ncol=2)
            curves.tight_layout()
            names.append(f"{task}-residuals.png")
            curves.savefig(out / names[1], dpi=110)
        written[task] = names
    return written


def write_report(
    document: dict[str, Any],
    directory: str | Path,
    *,
    arrays: dict[str, np.ndarray] | None = None,
) -> Path:
    """Write ``report.md`` and, when ``arrays`` are given, PNG figures to ``directory``.

    Parameters
    ----------
    document : dict
        A result document (:func:`load_results`).
    directory : str or pathlib.Path
        Created if needed.
    arrays : dict, optional
        The result's arrays (:func:`load_arrays`): with them, each task gets
        an image panel (truth, data, the two best baselines, the three best
        PnP runs) and a plot of the PnP residual curves.

    Returns
    -------
    pathlib.Path
        The markdown file.
    """
    out = Path(directory)
    out.mkdir(parents=True, exist_ok=True)
    figures = _figures(document, arrays, out) if arrays else None
    path = out / "report.md"
    path.write_text(markdown_report(document, figures))
    return path

