"""The result of checking a denoiser: constants, verdict and witnesses."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Literal

import torch

from .._arrays import ArrayKind, ArrayLike, from_tensor
from ..denoisers import Denoiser, Fact
from ._pairs import PairStatistics, pair_statistics
from ._smoothness import SmoothnessEstimate

Verdict = Literal["proved", "estimated", "refuted"]

#: Averagedness statistics within this distance of 1 count as "not averaged".
NOT_AVERAGED_SLACK = 1e-9


@dataclass(frozen=True)
class Witness:
    """A pair of images and the statistic they attain.

    Attributes
    ----------
    quantity : str
        ``"theta"``, ``"lipschitz"`` or ``"residual_lipschitz"``.
    value : float
        The statistic the pair attains (see :mod:`pnpguard.check._pairs`).
    x, y : torch.Tensor
        The pair, exactly as evaluated (in the sample's dtype).
    kind : ArrayKind
        The kind of array the caller's sample was, for :meth:`arrays`.
    """

    quantity: str
    value: float
    x: torch.Tensor = field(repr=False)
    y: torch.Tensor = field(repr=False)
    kind: ArrayKind = field(repr=False)

    def arrays(self) -> tuple[ArrayLike, ArrayLike]:
        """The pair as the kind of array the sample was (numpy or torch)."""
        return from_tensor(self.x, self.kind), from_tensor(self.y, self.kind)

    def reproduce(self, denoiser: Denoiser) -> float:
        """Evaluate the denoiser on the pair again and return the statistic."""
        both = torch.cat([self.x, self.y])
        with denoiser.at_input_precision():  # as the check evaluated it
            out = denoiser.apply(both)
        stats = pair_statistics(self.x, self.y, out[:1], out[1:], denoiser.rounding_eps(out.dtype))
        return float(_pick(stats, self.quantity)[0])


def _pick(stats: PairStatistics, quantity: str) -> torch.Tensor:
    return {"theta": stats.theta, "lipschitz": stats.lipschitz, "residual_lipschitz": stats.residual}[
        quantity
    ]


@dataclass(frozen=True)
class CheckReport:
    """What :func:`pnpguard.check_denoiser` established about a denoiser.

    Attributes
    ----------
    denoiser : str
        The denoiser's name.
    theta : float
        Averagedness constant: proved value, or the largest pairwise statistic
        found (a lower bound on the true constant); ``>= 1`` (``inf`` for an
        expansion with ``<a, r> <= 0``) when the map is not averaged.
    lipschitz : float
        Lipschitz constant of ``D`` (proved bound, or lower-bound estimate).
    residual_lipschitz : float
        Lipschitz constant of ``D - I`` (same).
    verdict : {"proved", "estimated", "refuted"}
        ``"proved"``: the constants follow from the denoiser's verified
        structure (:attr:`facts`). ``"estimated"``: empirical lower bounds from
        search; no counterexample found. ``"refuted"``: a concrete pair shows
        that ``D`` is not averaged (:attr:`refuted` says ``"averagedness"``),
        even expansive (``"nonexpansiveness"``), or that a user's claim is
        false (``"claim"``).
    refuted : str or None
        What a refutation disproves.
    witnesses : dict
        For estimates and refutations, the pair attaining each reported value
        (keys ``"theta"``, ``"lipschitz"``, ``"residual_lipschitz"``).
    calls : int
        Denoiser evaluations used (an image in a batch counts as one; a
        gradient evaluation counts as two).
    seconds : float
        Wall time of the check.
    method : str
        How the values were obtained.
    facts : tuple of Fact
        Verified facts: those the proof used; for estimates, the verified
        facts that imply no constant (a gradient-step structure ``D = I -
        grad g``, which the potential route of the guarantees uses).
    claims : tuple of Fact
        Unverified statements (the user's claims), recorded, not used as proof.
    tolerance : float
        For proofs about an inexactly computed map (iterative prox), the RMS
        error bound per pixel of each evaluation against the exact map.
    notes : tuple of str
        Anything else the user should know (e.g. a claim contradicted by a pair).
    sigma : float or None
        The denoiser's strength when it declares one.
    lowest_sigma : float
        The lowest strength the denoiser accepts (0 unless it says otherwise,
        e.g. a network's trained range).
    smoothness : SmoothnessEstimate or None
        For a denoiser with a potential, the dedicated estimate of
        ``Lip(I - D) = Lip(grad g)`` (:func:`pnpguard.estimate_smoothness`)
        when the pair search left a value below 1 possible.
    """

    denoiser: str
    theta: float
    lipschitz: float
    residual_lipschitz: float
    verdict: Verdict
    refuted: str | None
    witnesses: dict[str, Witness]
    calls: int
    seconds: float
    method: str
    facts: tuple[Fact, ...] = ()
    claims: tuple[Fact, ...] = ()
    tolerance: float = 0.0
    notes: tuple[str, ...] = ()
    sigma: float | None = None
    lowest_sigma: float = 0.0
    smoothness: SmoothnessEstimate | None = None

    @property
    def witness(self) -> Witness | None:
        """The pair behind the verdict: the averagedness witness, or None for proofs."""
        return self.witnesses.get("theta")

    @property
    def averaged(self) -> bool:
        """True when the reported theta is below 1 (by proof or estimate)."""
        return self.theta < 1.0

    @property
    def nonexpansive(self) -> bool:
        """True unless a pair (or the structure) shows an expansion."""
        return self.refuted != "nonexpansiveness" and self.lipschitz <= 1.0 + NOT_AVERAGED_SLACK

    def __str__(self) -> str:
        word = {"proved": "PROVED", "estimated": "ESTIMATED (lower bounds)", "refuted": "REFUTED"}[
            self.verdict
        ]
        lines = [f"denoiser check: {self.denoiser}", f"  verdict            {word}"]
        if self.refuted:
            lines.append(f"  counterexample to  {self.refuted}")
        lines += [
            f"  theta              {_fmt(self.theta)}",
            f"  Lipschitz(D)       {_fmt(self.lipschitz)}",
            f"  Lipschitz(D - I)   {_fmt(self.residual_lipschitz)}",
            f"  method             {self.method}",
            f"  cost               {self.calls} denoiser calls, {self.seconds:.2f} s",
        ]
        for fact in self.facts:
            lines.append(f"  fact               {fact}")
        if self.tolerance > 0:
            lines.append(f"  inexact map        RMS error <= {self.tolerance:.3g} per pixel per call")
        for claim in self.claims:
            lines.append(f"  user claim         {claim}")
        for name, witness in self.witnesses.items():
            lines.append(
                f"  witness            {name} = {_fmt(witness.value)} at a pair with "
                f"||x - y|| = {float(torch.linalg.vector_norm((witness.x - witness.y).double())):.3g}"
            )
        if self.smoothness is not None:
            lines.append(f"  smoothness         {self.smoothness}")
        lines += [f"  note               {note}" for note in self.notes]
        return "\n".join(lines)


def _fmt(value: float) -> str:
    return "inf" if math.isinf(value) else f"{value:.6g}"
