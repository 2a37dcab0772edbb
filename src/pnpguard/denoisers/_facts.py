"""What is known about a denoiser: averagedness, Lipschitz constants, spectra.

A :class:`Fact` is one statement about a denoiser ``D`` together with the
reason it holds. Facts established by the library from a denoiser's own
structure carry ``verified=True``; anything a user states is recorded with
``verified=False`` and the source "the user's claim".

Notation (as in the rest of the library): ``D`` is theta-averaged when
``D = (1 - theta) I + theta N`` with ``N`` nonexpansive; 1/2-averaged is
firmly nonexpansive; the *residual* map is ``D - I``.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Union

from .._validation import choice, nonnegative_number, number, number_in

#: The kinds of statement a Fact can make, sorted.
FACT_KINDS = ("averaged", "gradient_step", "linear_symmetric", "nonexpansive", "proximal")

_USER_SOURCE = "the user's claim"


@dataclass(frozen=True)
class Fact:
    """One known property of a denoiser ``D`` and why it holds.

    Missing constants are filled in from the kind where the kind implies them
    (see Notes), so ``Fact("proximal", source=...)`` already carries
    ``theta = 1/2``, ``lipschitz = 1`` and ``residual_lipschitz = 1``.

    Attributes
    ----------
    kind : {"averaged", "gradient_step", "linear_symmetric", "nonexpansive", "proximal"}
        ``"proximal"``: ``D`` is the proximal operator of a proper, lower
        semicontinuous convex function. ``"gradient_step"``: ``D = I - grad g``
        for a potential ``g`` that the denoiser can evaluate (its
        :meth:`~pnpguard.Denoiser.potential`); it implies no constant. ``"linear_symmetric"``: ``D`` is a
        symmetric matrix with eigenvalues in ``spectrum``. ``"averaged"``:
        ``D`` is ``theta``-averaged. ``"nonexpansive"``: ``D`` is
        ``lipschitz``-Lipschitz with ``lipschitz <= 1``.
    theta : float or None
        An averagedness constant of ``D`` (``D`` is theta-averaged), in
        ``[0, 1]``; None when the fact implies none.
    lipschitz : float or None
        A Lipschitz constant of ``D``.
    residual_lipschitz : float or None
        A Lipschitz constant of ``D - I``.
    spectrum : tuple of float or None
        ``(a, b)`` with every eigenvalue in ``[a, b]`` (linear symmetric maps only).
    verified : bool
        True only when the library established the fact from the denoiser's
        own structure.
    source : str
        The reason, in words, with a citation.
    tolerance : float
        0 for an exact statement. For a map computed inexactly (an iterative
        proximal solve), a bound on the root-mean-square error per pixel of
        each 2-D image against the exact map ``P`` of the statement:
        ``||D x - P x||_2 <= tolerance * sqrt(H W)``.

    Notes
    -----
    Implied constants (filled in when None):

    - proximal: ``theta = 1/2`` (firmly nonexpansive [1]_), ``lipschitz = 1``,
      ``residual_lipschitz = 1`` (``I - P`` is the proximal operator of the
      conjugate, Moreau's decomposition [2]_, hence also firmly nonexpansive).
    - linear symmetric with eigenvalues ``h`` in ``[a, b]``:
      ``lipschitz = max(|a|, |b|)``, ``residual_lipschitz = max(|1 - a|, |1 - b|)``
      and, when ``b <= 1`` and ``a >= -1``, ``theta = (1 - a) / 2``: ``D`` is
      theta-averaged iff ``N = I - (I - D)/theta`` has eigenvalues
      ``1 - (1 - h)/theta`` in ``[-1, 1]`` (our derivation, a one-line
      consequence of the definition for symmetric matrices).
    - averaged: ``lipschitz = 1`` and ``residual_lipschitz = 2 theta``, since
      ``D - I = theta (N - I)``.
    - nonexpansive: ``lipschitz = 1``, ``residual_lipschitz = 1 + lipschitz``
      (triangle inequality), ``theta = 1`` (the degenerate, non-averaged end).

    References
    ----------
    .. [1] H. H. Bauschke and P. L. Combettes, *Convex Analysis and Monotone
       Operator Theory in Hilbert Spaces*, 2nd ed., Springer, 2017,
       Prop. 12.28 (proximal operators are firmly nonexpansive; numbering from
       memory).
    .. [2] J.-J. Moreau, "Proximite et dualite dans un espace hilbertien",
       Bull. Soc. Math. France 93 (1965) 273-299.
    """

    kind: str
    theta: float | None = None
    lipschitz: float | None = None
    residual_lipschitz: float | None = None
    spectrum: tuple[float, float] | None = None
    verified: bool = False
    source: str = ""
    tolerance: float = 0.0

    def __post_init__(self) -> None:
        choice(self.kind, "kind", FACT_KINDS)
        if not isinstance(self.verified, bool):
            raise TypeError(f"`verified` must be a bool, got {type(self.verified).__name__}")
        if not isinstance(self.source, str):
            raise TypeError(f"`source` must be a string, got {type(self.source).__name__}")
        set_ = object.__setattr__
        set_(self, "tolerance", nonnegative_number(self.tolerance, "tolerance"))
        if self.theta is not None:
            set_(self, "theta", number_in(self.theta, "theta", 0.0, 1.0))
        for field in ("lipschitz", "residual_lipschitz"):
            value = getattr(self, field)
            if value is not None:
                set_(self, field, nonnegative_number(value, field))
        if self.spectrum is not None:
            if len(self.spectrum) != 2:
                raise ValueError(f"`spectrum` must be a pair (a, b), got {self.spectrum!r}")
            low = number(self.spectrum[0], "spectrum[0]")
            high = number(self.spectrum[1], "spectrum[1]")
            if low > high:
                raise ValueError(f"`spectrum` must satisfy a <= b, got {self.spectrum!r}")
            set_(self, "spectrum", (low, high))
        elif self.kind == "linear_symmetric":
            raise ValueError("a 'linear_symmetric' fact needs `spectrum=(a, b)`")
        if self.kind == "averaged" and self.theta is None:
            raise ValueError("an 'averaged' fact needs `theta`")
        if self.kind == "nonexpansive" and self.lipschitz is not None and self.lipschitz > 1:
            raise ValueError(
                f"a 'nonexpansive' fact needs `lipschitz` <= 1, got {self.lipschitz!r}"
            )
        for field, value in _implied(self).items():
            if getattr(self, field) is None:
                set_(self, field, value)
        if self.kind == "linear_symmetric":
            implied = _implied(self)
            for field in ("theta", "lipschitz", "residual_lipschitz"):
                given, exact = getattr(self, field), implied.get(field)
                if given is not None and exact is not None and given < exact * (1 - 1e-12):
                    raise ValueError(
                        f"`{field}` = {given!r} contradicts `spectrum` = {self.spectrum!r}, "
                        f"which implies {field} = {exact!r}"
                    )

    # ------------------------------------------------------------ builders
    @classmethod
    def proximal(cls, source: str, *, verified: bool = False, tolerance: float = 0.0) -> Fact:
        """A proximal operator of a convex function (firmly nonexpansive)."""
        return cls("proximal", verified=verified, source=source, tolerance=tolerance)

    @classmethod
    def linear_symmetric(
        cls, spectrum: tuple[float, float], source: str, *, verified: bool = False
    ) -> Fact:
        """A symmetric linear map with every eigenvalue in ``spectrum``."""
        return cls("linear_symmetric", spectrum=tuple(spectrum), verified=verified, source=source)

    @classmethod
    def gradient_step(cls, source: str, *, verified: bool = False) -> Fact:
        """``D = I - grad g`` with a computable potential ``g`` (no constants implied)."""
        return cls("gradient_step", verified=verified, source=source)

    @classmethod
    def averaged(cls, theta: float, source: str, *, verified: bool = False) -> Fact:
        """A theta-averaged map."""
        return cls("averaged", theta=theta, verified=verified, source=source)

    @classmethod
    def nonexpansive(
        cls, source: str, *, lipschitz: float = 1.0, verified: bool = False
    ) -> Fact:
        """A map with Lipschitz constant ``lipschitz <= 1``."""
        return cls("nonexpansive", lipschitz=lipschitz, verified=verified, source=source)

    # ---------------------------------------------------------------- text
    def __str__(self) -> str:
        parts = []
        if self.theta is not None:
            parts.append(f"theta <= {self.theta:.6g}")
        if self.lipschitz is not None:
            parts.append(f"Lipschitz <= {self.lipschitz:.6g}")
        if self.residual_lipschitz is not None:
            parts.append(f"Lipschitz(D - I) <= {self.residual_lipschitz:.6g}")
        if self.spectrum is not None:
            parts.append(f"spectrum in [{self.spectrum[0]:.6g}, {self.spectrum[1]:.6g}]")
        if self.tolerance > 0:
            parts.append(f"up to an RMS error of {self.tolerance:.3g} per pixel")
        status = "verified" if self.verified else "unverified"
        if self.kind == "gradient_step":
            parts.append("D = I - grad g, g computable")
        return f"{self.kind} ({', '.join(parts)}) [{status}: {self.source}]"


def _implied(fact: Fact) -> dict[str, float]:
    """Constants implied by a fact's kind (see :class:`Fact`, Notes)."""
    if fact.kind == "proximal":
        return {"theta": 0.5, "lipschitz": 1.0, "residual_lipschitz": 1.0}
    if fact.kind == "averaged":
        return {"lipschitz": 1.0, "residual_lipschitz": 2.0 * fact.theta}
    if fact.kind == "nonexpansive":
        lipschitz = 1.0 if fact.lipschitz is None else fact.lipschitz
        return {"theta": 1.0, "lipschitz": lipschitz, "residual_lipschitz": 1.0 + lipschitz}
    if fact.kind == "gradient_step":
        return {}
    low, high = fact.spectrum
    implied = {
        "lipschitz": max(abs(low), abs(high)),
        "residual_lipschitz": max(abs(1.0 - low), abs(1.0 - high)),
    }
    if high <= 1.0 and low >= -1.0:
        implied["theta"] = (1.0 - low) / 2.0
    return implied


#: Short forms accepted as user claims: "proximal", "nonexpansive",
#: ("averaged", theta), ("linear_symmetric", (a, b)), or a Fact.
ClaimLike = Union[Fact, str, tuple]


def as_claim(claim: ClaimLike) -> Fact:
    """Turn a user's statement into an unverified :class:`Fact`.

    Parameters
    ----------
    claim : Fact, str or tuple
        A :class:`Fact` (its ``verified`` flag is cleared and its source
        prefixed with "the user's claim"), or a short form: ``"proximal"``,
        ``"nonexpansive"``, ``("averaged", theta)`` or
        ``("linear_symmetric", (a, b))``.

    Returns
    -------
    Fact
        With ``verified=False``.

    Raises
    ------
    ValueError, TypeError
        If the claim is not one of the forms above.
    """
    if isinstance(claim, Fact):
        source = f"{_USER_SOURCE}: {claim.source}" if claim.source else _USER_SOURCE
        if claim.source.startswith(_USER_SOURCE):
            source = claim.source
        return replace(claim, verified=False, source=source)
    if isinstance(claim, str):
        if claim == "proximal":
            return Fact.proximal(_USER_SOURCE)
        if claim == "nonexpansive":
            return Fact.nonexpansive(_USER_SOURCE)
        if claim == "gradient_step":
            return Fact.gradient_step(_USER_SOURCE)
        raise ValueError(
            f"a claim given as a string must be 'gradient_step', 'nonexpansive' or 'proximal', got {claim!r}; "
            "use ('averaged', theta), ('linear_symmetric', (a, b)) or a Fact for the others"
        )
    if isinstance(claim, tuple) and len(claim) == 2:
        kind, value = claim
        if kind == "averaged":
            return Fact.averaged(value, _USER_SOURCE)
        if kind == "linear_symmetric":
            return Fact.linear_symmetric(value, _USER_SOURCE)
    raise ValueError(
        "each claim must be a Fact, 'proximal', 'nonexpansive', ('averaged', theta) or "
        f"('linear_symmetric', (a, b)); got {claim!r}"
    )


def relax_fact(fact: Fact, s: float) -> Fact:
    """The fact that holds for ``(1 - s) I + s D`` when ``fact`` holds for ``D``.

    With ``D = (1 - theta) I + theta N``: ``(1 - s) I + s D = (1 - s theta) I
    + s theta N``, so theta becomes ``s theta`` (a nonexpansive ``D`` becomes
    ``s``-averaged); ``D_s - I = s (D - I)`` scales the residual constant by
    ``s``; the triangle inequality gives the Lipschitz constant
    ``(1 - s) + s L``; eigenvalues ``h`` map to ``1 - s + s h`` (for linear
    symmetric maps the Lipschitz constant is recomputed from the new spectrum,
    which is exact and never larger). An inexact map's error scales by ``s``.
    A relaxed proximal operator is in general no longer proximal; it is
    recorded as averaged. ``verified`` is kept.
    """
    if s == 1.0:
        return fact
    source = f"relaxation (1 - {s:g}) I + {s:g} D of: {fact.source}"
    tolerance = s * fact.tolerance
    if fact.kind == "linear_symmetric":
        low, high = fact.spectrum
        return Fact(
            "linear_symmetric",
            spectrum=(1.0 - s + s * low, 1.0 - s + s * high),
            verified=fact.verified,
            source=source,
            tolerance=tolerance,
        )
    theta = None if fact.theta is None else s * fact.theta
    lipschitz = None if fact.lipschitz is None else (1.0 - s) + s * fact.lipschitz
    residual = None if fact.residual_lipschitz is None else s * fact.residual_lipschitz
    kind = "averaged" if theta is not None and theta < 1.0 else fact.kind
    return Fact(
        kind,
        theta=theta,
        lipschitz=lipschitz,
        residual_lipschitz=residual,
        verified=fact.verified,
        source=source,
        tolerance=tolerance,
    )
