"""The public averagedness check ``check_denoiser``."""

from __future__ import annotations

import math
import time
from dataclasses import replace
from typing import Any

import torch

from .._validation import int_at_least
from ..denoisers import Denoiser, as_denoiser
from ._report import NOT_AVERAGED_SLACK, CheckReport, Witness
from ._samples import reference_sigma, split_samples
from ._smoothness import DEFAULT_SMOOTHNESS_BUDGET, SmoothnessEstimate, estimate_smoothness
from ._search import QUANTITIES, SCALES, BudgetExhausted, PairSearch
from ._structure import structural_constants

#: Default budget in denoiser calls.
DEFAULT_BUDGET = 200
#: Smallest budget that leaves room for every search stage on one sample.
MIN_BUDGET = 20


def check_denoiser(
    denoiser: Any,
    sample: Any,
    *,
    budget: int = DEFAULT_BUDGET,
    seed: int = 0,
    cross_check: bool = False,
    smoothness_budget: int = DEFAULT_SMOOTHNESS_BUDGET,
) -> CheckReport:
    """Measure the averagedness and Lipschitz constants of a denoiser.

    Structure first: when the denoiser carries *verified* facts (a proximal
    operator, a linear symmetric map with computed spectrum, a network averaged
    by construction with re-verified layer norms), the constants follow from
    them and the verdict is ``"proved"``. Otherwise (and also with
    ``cross_check=True``) an adversarial search over pairs near the samples
    gives lower bounds (verdict ``"estimated"``) or a counterexample (verdict
    ``"refuted"``).

    Parameters
    ----------
    denoiser : Denoiser, callable or torch.nn.Module
        Anything :func:`pnpguard.as_denoiser` accepts.
    sample : array or sequence of arrays
        One or more images like those the denoiser meets inside the iteration
        (e.g. the back-projected data, a noisy image): ``(H, W)`` or
        ``(N, C, H, W)``, numpy or torch, float32 or float64.
    budget : int, optional
        Maximum number of denoiser evaluations (default 200).
    seed : int, optional
        Seed of the search's random perturbations.
    cross_check : bool, optional
        Also search when the structure proves the constants; a pair that
        exceeds a proved value beyond the stated tolerance makes the verdict
        ``"refuted"`` (the claimed structure is wrong).
    smoothness_budget : int, optional
        Jacobian products for :func:`pnpguard.estimate_smoothness`, run only
        for a differentiable denoiser with a potential (``D = I - grad g``,
        verified or claimed) whose pair search left ``Lip(I - D) < 1`` possible:
        the prox route of the guarantees needs that constant (0 skips it).

    Returns
    -------
    CheckReport

    Notes
    -----
    With ``a = x - y`` and ``r = (x - D x) - (y - D y)``, ``D`` is
    theta-averaged iff ``||r||^2 <= 2 theta <a, r>`` for all pairs, so
    ``theta(x, y) = ||r||^2 / (2 <a, r>)`` maximised over pairs is the
    averagedness constant and any pair gives a lower bound. Perturbation sizes
    are multiples (0.01 to 2) of the denoiser's ``sigma``, or of a tenth of the
    sample's standard deviation when the denoiser declares none.

    References
    ----------
    .. [1] P. L. Combettes and I. Yamada, "Compositions and convex combinations
       of averaged nonexpansive operators", J. Math. Anal. Appl. 425 (2015)
       55-70, doi:10.1016/j.jmaa.2014.11.044.
    .. [2] E. K. Ryu, J. Liu, S. Wang, X. Chen, Z. Wang and W. Yin,
       "Plug-and-play methods provably converge with properly trained
       denoisers", ICML 2019, PMLR 97.

    Examples
    --------
    >>> import numpy as np, pnpguard as pg
    >>> rng = np.random.default_rng(0)
    >>> report = pg.check_denoiser(lambda x: 0.5 * x, rng.random((16, 16)), budget=40)
    >>> report.verdict, round(report.theta, 6)
    ('estimated', 0.25)
    """
    budget = int_at_least(budget, "budget", MIN_BUDGET)
    smoothness_budget = int_at_least(smoothness_budget, "smoothness_budget", 0)
    denoiser = as_denoiser(denoiser)
    samples, kind = split_samples(sample)
    if len(samples) > budget // 10:
        raise ValueError(
            f"`sample` has {len(samples)} images but a budget of {budget} calls covers at most "
            f"{budget // 10}; pass fewer images or a larger budget"
        )
    start = time.perf_counter()
    strength = {"sigma": denoiser.sigma, "lowest_sigma": denoiser.lowest_sigma}
    claims = tuple(f for f in denoiser.facts if not f.verified)
    structure = structural_constants(denoiser.facts)
    if structure is not None and not cross_check:
        return CheckReport(
            denoiser=denoiser.name,
            theta=structure.theta,
            lipschitz=structure.lipschitz,
            residual_lipschitz=structure.residual_lipschitz,
            verdict="refuted" if structure.lipschitz > 1.0 else "proved",
            refuted="nonexpansiveness" if structure.lipschitz > 1.0 else None,
            witnesses={},
            calls=0,
            seconds=time.perf_counter() - start,
            method="structure: " + "; ".join(f.source for f in structure.facts),
            facts=structure.facts,
            claims=claims,
            tolerance=structure.tolerance,
            **strength,
        )
    with denoiser.at_input_precision():  # rounding of a coarser precision would hide small-scale pairs
        search = _run_search(denoiser, samples, budget, seed)
    seconds = time.perf_counter() - start
    witnesses = {
        name: Witness(name, best.value, best.x, best.y, kind)
        for name in QUANTITIES
        if (best := search.best[name]).x is not None
    }
    values = {name: max(search.best[name].value, 0.0) for name in QUANTITIES}
    method = f"pair search: {len(SCALES)} scales x random directions, power chains on I - D and D, " + (
        "Jacobian power iterations (torch.func jvp/vjp), autograd ascent"
        if denoiser.differentiable
        else "derivative-free (1+1)-ES ascent"
    )
    contradictions = _claim_notes(claims, values)
    notes = list(contradictions)
    if not search.informative_found and not search.expansive_found:
        notes.append(
            "on every probed pair the denoiser acted as the identity up to rounding: theta = 0 "
            "says only that; the denoiser may be too weak to do anything at this strength"
        )
    if structure is not None:
        report = _cross_checked(denoiser, structure, search, witnesses, values, claims, seconds, method, notes)
        return replace(report, **strength)
    smoothness = _smoothness(denoiser, samples, values, smoothness_budget, seed)
    refuted = None
    if search.expansive_found:
        refuted = "nonexpansiveness"
    elif values["theta"] >= 1.0 - NOT_AVERAGED_SLACK:
        refuted = "averagedness"
    elif contradictions:
        refuted = "claim"
    if refuted is None:
        notes.append(
            "estimates are lower bounds from a finite search: the true constants may be larger"
        )
    return CheckReport(
        denoiser=denoiser.name,
        theta=values["theta"],
        lipschitz=values["lipschitz"],
        residual_lipschitz=values["residual_lipschitz"],
        verdict="refuted" if refuted else "estimated",
        refuted=refuted,
        witnesses=witnesses,
        calls=search.calls,
        seconds=seconds,
        method=method,
        claims=claims,
        notes=tuple(notes),
        facts=tuple(f for f in denoiser.facts if f.verified),  # constant-free structure (gradient step)
        smoothness=smoothness,
        **strength,
    )


def _smoothness(denoiser, samples, values, budget: int, seed: int) -> SmoothnessEstimate | None:
    """The dedicated estimate of ``Lip(I - D)`` when the prox route could use it, else None."""
    has_potential = any(f.kind == "gradient_step" for f in denoiser.facts)
    if budget == 0 or not has_potential or not denoiser.differentiable or values["residual_lipschitz"] >= 1.0:
        return None
    return estimate_smoothness(denoiser, samples, budget=budget, seed=seed)


def _run_search(denoiser: Denoiser, samples: list[torch.Tensor], budget: int, seed: int) -> PairSearch:
    generator = torch.Generator().manual_seed(seed)
    search = PairSearch(
        denoiser,
        samples,
        budget=budget,
        reference_sigma=reference_sigma(denoiser, samples),
        generator=generator,
    )
    try:
        directions = 2
        explored = search.explore(directions)
        # Chains at the tiniest scale (Jacobian regime) and at the two most revealing others.
        ranked = sorted(explored, key=lambda key: explored[key], reverse=True)
        starts = [(0, SCALES[0])] + [key for key in ranked if key[1] != SCALES[0]][:2]
        if denoiser.differentiable:
            search.jacobian_chain(0, steps=max(2, int(0.15 * search.remaining()) // 4))
        chain_calls = int(0.55 * search.remaining())
        search.power_chains(starts, steps=max(1, chain_calls // (2 * len(starts))))
        search.ascend(search.remaining())
    except BudgetExhausted:
        pass
    return search


#: Relative excess over a claimed constant that counts as a contradiction (the pair
#: statistics are computed in float64 from outputs with a rounding allowance already).
CLAIM_SLACK = 1e-6


def _claim_notes(claims, values) -> list[str]:
    """One note per claimed constant that a pair exceeds beyond :data:`CLAIM_SLACK`."""
    notes = []
    for claim in claims:
        for name in QUANTITIES:
            stated = getattr(claim, name)
            if stated is not None and values[name] > stated * (1 + CLAIM_SLACK):
                notes.append(
                    f"the user's claim {name} <= {stated:.6g} is contradicted by a pair "
                    f"attaining {values[name]:.6g}"
                )
    return notes


def _inexactness_slack(structure, witness: Witness | None) -> float:
    """Largest excess of a ratio statistic that the stated inexactness explains.

    Each evaluation is within ``tolerance * sqrt(H W)`` of the exact map (per
    image), so ``||Dx - Dy|| <= ||Px - Py|| + 2 tolerance sqrt(H W)`` and the
    Lipschitz and residual ratios may exceed the exact map's by
    ``2 tolerance sqrt(H W) / ||x - y||``.
    """
    if structure.tolerance == 0 or witness is None:
        return 0.0
    distance = float(torch.linalg.vector_norm((witness.x - witness.y).double()))
    pixels = witness.x.shape[-1] * witness.x.shape[-2]
    per_image = witness.x.numel() // pixels
    return 2.0 * structure.tolerance * math.sqrt(pixels * per_image) / distance


def _cross_checked(denoiser, structure, search, witnesses, values, claims, seconds, method, notes):
    # The averagedness statistic has no simple bound under inexact evaluation, so for an
    # inexact map only the Lipschitz and residual ratios can contradict the proof.
    judged = QUANTITIES if structure.tolerance == 0 else ("lipschitz", "residual_lipschitz")
    contradicted = [
        name
        for name in judged
        if values[name]
        > getattr(structure, name) * (1 + 1e-6) + _inexactness_slack(structure, witnesses.get(name))
    ]
    for name in contradicted:
        notes.append(
            f"a pair attains {name} = {values[name]:.6g}, above the proved {getattr(structure, name):.6g}: "
            "the declared structure does not hold for this implementation"
        )
    refuted = None
    if contradicted:
        refuted = "nonexpansiveness" if search.expansive_found else "averagedness"
    return CheckReport(
        denoiser=denoiser.name,
        theta=values["theta"] if contradicted else structure.theta,
        lipschitz=values["lipschitz"] if contradicted else structure.lipschitz,
        residual_lipschitz=values["residual_lipschitz"] if contradicted else structure.residual_lipschitz,
        verdict="refuted" if contradicted else "proved",
        refuted=refuted,
        witnesses=witnesses,
        calls=search.calls,
        seconds=seconds,
        method="structure, cross-checked by " + method,
        facts=structure.facts,
        claims=claims,
        tolerance=structure.tolerance,
        notes=tuple(notes)
        + (
            ()
            if contradicted
            else (
                f"the search found theta >= {values['theta']:.6g}, Lipschitz >= "
                f"{values['lipschitz']:.6g}, consistent with the proof",
            )
        ),
    )
