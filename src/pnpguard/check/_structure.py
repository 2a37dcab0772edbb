"""Constants that follow from a denoiser's verified structure."""

from __future__ import annotations

import math
from dataclasses import dataclass

from ..denoisers import Fact


@dataclass(frozen=True)
class StructuralConstants:
    """Best constants implied by a set of verified facts.

    ``theta`` is ``inf`` when the structure shows an expansion (a linear
    symmetric map with an eigenvalue of modulus above 1), and 1 when it shows
    a nonexpansive map that is not averaged (an eigenvalue at -1).
    """

    theta: float
    lipschitz: float
    residual_lipschitz: float
    facts: tuple[Fact, ...]
    tolerance: float


def structural_constants(facts: tuple[Fact, ...]) -> StructuralConstants | None:
    """Combine the verified facts; None when there is none.

    Each constant is the smallest that any verified fact implies (every fact
    is a true statement, so each gives an upper bound). A linear symmetric
    fact gives exact values: ``theta = (1 - min h) / 2`` when the spectrum lies
    in ``[-1, 1]`` (THEORY.md, section 2), otherwise the map is expansive.
    """
    return _combine(tuple(f for f in facts if f.verified))


def claimed_constants(claims: tuple[Fact, ...]) -> StructuralConstants | None:
    """The constants the user's (unverified) claims would imply; None without claims.

    Combined exactly as :func:`structural_constants` combines verified facts.
    The result is an assumption, never a proof: a guarantee built on it is
    conditional on the claims.
    """
    return _combine(tuple(claims))


def _combine(facts: tuple[Fact, ...]) -> StructuralConstants | None:
    # Facts that imply no constant (a gradient-step structure) leave the constants to the search.
    facts = tuple(
        f for f in facts if any(v is not None for v in (f.theta, f.lipschitz, f.residual_lipschitz, f.spectrum))
    )
    if not facts:
        return None
    theta = lipschitz = residual = math.inf
    for fact in facts:
        fact_theta = fact.theta
        if fact.kind == "linear_symmetric" and fact_theta is None:
            low, high = fact.spectrum
            fact_theta = math.inf if (high > 1.0 or low < -1.0) else 1.0
        theta = min(theta, math.inf if fact_theta is None else fact_theta)
        lipschitz = min(lipschitz, math.inf if fact.lipschitz is None else fact.lipschitz)
        residual = min(
            residual, math.inf if fact.residual_lipschitz is None else fact.residual_lipschitz
        )
    return StructuralConstants(
        theta=theta,
        lipschitz=lipschitz,
        residual_lipschitz=residual,
        facts=facts,
        tolerance=max(f.tolerance for f in facts),
    )
