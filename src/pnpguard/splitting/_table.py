"""The table of splitting algorithms: one record per algorithm, read by every consumer.

:func:`pnpguard.admissible`, the solvers, the monitor, the refusal
suggestions, the benchmark suite and the command line all take their
algorithm names, short names and iteration maps from :data:`ALGORITHMS`.
Adding an algorithm is one record here (with its iteration map in
:mod:`._schemes`) plus its theorem routes in :mod:`pnpguard.guarantee`.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Literal

import torch

from .._validation import choice
from ..fidelity import LeastSquares
from ._schemes import DouglasRachford, ForwardBackward, PotentialDescent, Scheme

#: How the governing variable starts from the initial image ``x0``.
StartRule = Callable[[LeastSquares, torch.Tensor, float], torch.Tensor]


def _from_image(fidelity: LeastSquares, x0: torch.Tensor, step: float) -> torch.Tensor:
    return x0


def _from_data_prox(fidelity: LeastSquares, x0: torch.Tensor, step: float) -> torch.Tensor:
    return fidelity.apply_prox(x0, step)


@dataclass(frozen=True)
class Algorithm:
    """Everything the library needs to know about one splitting algorithm.

    Attributes
    ----------
    name : str
        Name in the Python API and in guarantees (``"forward_backward"``).
    short : str
        Short name in benchmark method names and on the command line (``"fb"``).
    title : str
        Name in printed text (``"forward-backward"``).
    scheme : type
        The iteration map ``T`` on the governing variable, built as
        ``scheme(fidelity, denoiser, step)`` and called as ``T(v) -> (T v, x)``.
    step_name : str
        What the algorithm's parameter is called in printouts (``"step"``,
        ``"gamma"``).
    step_meaning : str
        What that parameter is.
    variable : str
        The governing variable the theory, and so the monitor, is about.
    start : callable
        ``start(fidelity, x0, step)``: the governing variable's first value.
    watches : {"fixed_point", "objective"}
        What the monitor checks: the fixed-point inequalities of an averaged or
        contractive map on consecutive iterates, or the sufficient decrease of
        a computed objective (descent schemes, whose residuals need not fall
        monotonically).
    error_gain : int
        How many times one denoiser call's error can enter ``T v``: an
        inexact denoiser with error at most ``e`` per call moves ``T v`` by at
        most ``error_gain * e`` (forward-backward 1; Douglas-Rachford 3, since
        ``D z`` enters ``z + prox(2 D z - z) - D z`` twice through a
        nonexpansive prox and once directly).
    """

    name: str
    short: str
    title: str
    scheme: type[Scheme]
    step_name: str
    step_meaning: str
    variable: str
    start: StartRule
    error_gain: int
    watches: Literal["fixed_point", "objective"] = "fixed_point"


#: The algorithms, keyed by their API name, in the order printouts list them.
ALGORITHMS: dict[str, Algorithm] = {
    record.name: record
    for record in (
        Algorithm(
            name="forward_backward",
            short="fb",
            title="forward-backward",
            scheme=ForwardBackward,
            step_name="step",
            step_meaning="gradient step length eta",
            variable="x",
            start=_from_image,
            error_gain=1,
        ),
        Algorithm(
            name="douglas_rachford",
            short="dr",
            title="Douglas-Rachford",
            scheme=DouglasRachford,
            step_name="gamma",
            step_meaning="prox parameter gamma of prox_{gamma f}",
            variable="z",
            start=_from_image,
            error_gain=3,
        ),
        Algorithm(
            name="admm",
            short="admm",
            title="ADMM",
            scheme=DouglasRachford,
            step_name="gamma",
            step_meaning="prox parameter gamma (penalty 1 / gamma)",
            variable="w = x + u",
            start=_from_data_prox,
            error_gain=3,
        ),
        Algorithm(
            name="proximal_gradient",
            short="pgd",
            title="proximal gradient on f + g",
            scheme=PotentialDescent,
            step_name="tau",
            step_meaning="initial step tau of the backtracking (halved until F = f + g decreases enough)",
            variable="x",
            start=_from_image,
            error_gain=1,
            watches="objective",
        ),
    )
}


def algorithm(key: str | Algorithm) -> Algorithm:
    """The record of an algorithm given by API name, short name or record.

    Raises
    ------
    ValueError
        For an unknown name, listing the valid ones.
    """
    if isinstance(key, Algorithm):
        return key
    names = {**{record.short: record for record in ALGORITHMS.values()}, **ALGORITHMS}
    return names[choice(key, "algorithm", names)]
