"""Residual and metric curves of a run (matplotlib, imported on use)."""

from __future__ import annotations

from typing import Any

from ._result import Reconstruction


def plot_run(result: Reconstruction, *, axes: Any = None) -> Any:
    """Plot the relative residual (log scale), the objective of descent runs and the metric curves.

    Parameters
    ----------
    result : Reconstruction
    axes : sequence of matplotlib Axes, optional
        One axis for the residual, one for the objective ``F(x_k) - min_k F``
        (log scale) when the run recorded one (the potential route), plus one
        per metric; created when omitted.

    Returns
    -------
    matplotlib.figure.Figure
        The figure holding the axes. Flags are marked on the residual curve.
    """
    import matplotlib.pyplot as plt

    has_objective = result.objectives.size > 0
    panels = 1 + int(has_objective) + len(result.metrics)
    if axes is None:
        figure, axes = plt.subplots(1, panels, figsize=(4.2 * panels, 3.2), squeeze=False)
        axes = axes[0]
    else:
        if len(axes) != panels:
            raise ValueError(f"`axes` must hold {panels} axes (residual, objective, metrics), got {len(axes)}")
        figure = axes[0].figure
    iterations = range(1, result.iterations + 1)
    residual_axis = axes[0]
    residual_axis.semilogy(iterations, result.relative_residuals, color="#1b6f8a", lw=1.6)
    for flag in result.flags:
        residual_axis.axvline(flag.iteration + 1, color="#c2452d", lw=0.8, ls=":")
    residual_axis.set_xlabel("iteration")
    residual_axis.set_ylabel("||T v - v|| / ||v||")
    status = "guaranteed" if result.guaranteed else "no guarantee"
    residual_axis.set_title(f"{result.algorithm} ({status})", fontsize=10)
    rest = list(axes[1:])
    if has_objective:
        axis = rest.pop(0)
        gap = result.objectives - result.objectives.min()
        axis.semilogy(range(result.objectives.size), gap + 1e-300, color="#2e7d32", lw=1.6)
        axis.set_xlabel("iteration")
        axis.set_ylabel("F(x_k) - min F")
        axis.set_title("objective F = f + g (decreasing)", fontsize=10)
    for axis, (name, values) in zip(rest, result.metrics.items()):
        axis.plot(iterations, values, color="#6a4c93", lw=1.6)
        axis.set_xlabel("iteration")
        axis.set_ylabel(name.upper())
    figure.tight_layout()
    return figure
