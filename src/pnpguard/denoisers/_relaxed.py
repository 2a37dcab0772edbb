"""Relaxation ``(1 - s) I + s D`` of a denoiser, with its facts transformed."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any

import torch

from .._validation import number_in
from ._base import Denoiser
from ._facts import relax_fact
from ._wrap import as_denoiser


class _Relaxed(Denoiser):
    """``(1 - s) I + s D``; nested relaxations collapse (``s`` multiplies)."""

    def __init__(self, denoiser: Denoiser, s: float):
        super().__init__(
            name=f"relaxed({s:g}) {denoiser.name}",
            sigma=denoiser.sigma,
            differentiable=denoiser.differentiable,
            facts=tuple(relax_fact(fact, s) for fact in denoiser.facts),
        )
        self.denoiser = denoiser
        self.s = s

    def _denoise(self, t: torch.Tensor) -> torch.Tensor:
        return (1.0 - self.s) * t + self.s * self.denoiser._run(t)

    def precision(self, dtype: torch.dtype) -> torch.dtype:
        """The inner denoiser's precision."""
        return self.denoiser.precision(dtype)

    @contextmanager
    def at_input_precision(self) -> Iterator[None]:
        """The inner denoiser at the input's precision."""
        with self.denoiser.at_input_precision():
            yield

    def tolerance_driver(self) -> Callable[[torch.Tensor, float], torch.Tensor] | None:
        """The inner driver at tolerance ``tol / s`` (the relaxed map's error is ``s`` times the inner one's)."""
        inner = self.denoiser.tolerance_driver()
        if inner is None:
            return None
        s = self.s

        def apply(t: torch.Tensor, tol: float) -> torch.Tensor:
            return (1.0 - s) * t + s * inner(t, tol / s)

        return apply


def relaxed(denoiser: Any, s: float) -> Denoiser:
    """The relaxed denoiser ``(1 - s) I + s D``.

    Relaxation is the standard repair of a denoiser that is nonexpansive but
    not averaged enough: if ``D = (1 - theta) I + theta N`` with ``N``
    nonexpansive, then ``(1 - s) I + s D = (1 - s theta) I + s theta N`` is
    ``s theta``-averaged (``s``-averaged when ``D`` is merely nonexpansive).

    Parameters
    ----------
    denoiser : Denoiser or anything :func:`as_denoiser` accepts
        The map ``D``.
    s : float
        Relaxation weight in ``(0, 1]``; ``s = 1`` gives ``D`` back.

    Returns
    -------
    Denoiser
        Named ``"relaxed(s) <name>"``, with the same strength and
        differentiability as ``D`` and each fact of ``D`` transformed (see
        Notes); ``verified`` flags are kept. Relaxing a relaxed denoiser
        ``(1 - r) I + r D`` by ``s`` gives ``relaxed(D, r s)``.

    Raises
    ------
    ValueError
        If ``s`` is not in ``(0, 1]``.

    Notes
    -----
    theta becomes ``s theta``; a spectrum ``[a, b]`` becomes
    ``[1 - s + s a, 1 - s + s b]``; a Lipschitz constant ``L`` becomes
    ``(1 - s) + s L`` (triangle inequality; exact from the new spectrum for
    linear symmetric maps); the Lipschitz constant of ``D - I`` is multiplied by
    ``s``, as is the error bound of an inexact map. A relaxed proximal
    operator is recorded as averaged, not proximal.

    References
    ----------
    .. [1] P. L. Combettes and I. Yamada, "Compositions and convex combinations
       of averaged nonexpansive operators", J. Math. Anal. Appl. 425 (2015)
       55-70, doi:10.1016/j.jmaa.2014.11.044 (Definition 1.1 of averaged maps).
    """
    s = number_in(s, "s", 0.0, 1.0, low_open=True)
    denoiser = as_denoiser(denoiser)
    if s == 1.0:
        return denoiser
    if isinstance(denoiser, _Relaxed):
        return _Relaxed(denoiser.denoiser, denoiser.s * s)
    return _Relaxed(denoiser, s)
