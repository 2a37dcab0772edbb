"""The denoiser base class every algorithm accepts.

A :class:`Denoiser` has three entry points over one private kernel
``_denoise``:

- ``__call__(x)``: the public call. Validates ``x`` (numpy or torch, float32
  or float64, finite, ``(H, W)`` or ``(N, C, H, W)``), returns the same kind,
  dtype and device, and checks the output is finite on every call.
- ``apply(t)``: the fast path used inside iterations. A float tensor in, a
  tensor of the same shape, dtype and device out, under ``torch.no_grad``.
- ``apply_traced(t)``: the same map with autograd (and ``torch.func``)
  tracing, for differentiable denoisers only.

The first call through any entry point checks that the output has the
input's shape and is finite, and raises :class:`DenoiserError` naming the
denoiser otherwise. ``apply`` and ``apply_traced`` skip the finiteness check
after that first call; the solvers monitor the finiteness of their iterates.
"""

from __future__ import annotations

import abc
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from typing import Any

import torch

from .._arrays import ArrayLike, from_tensor, to_tensor
from .._validation import positive_number
from ._facts import Fact

_FLOAT_DTYPES = (torch.float32, torch.float64)


class DenoiserError(RuntimeError):
    """A denoiser returned something that is not a finite image of its input's shape."""


def _non_finite_text(out: torch.Tensor) -> str | None:
    """Describe the non-finite entries of ``out``; None if all are finite.

    Returns None as well when the values cannot be inspected (inside
    ``torch.func.vmap``, where data-dependent control flow is not allowed).
    """
    try:
        finite = bool(torch.isfinite(out).all())
    except RuntimeError:
        return None
    if finite:
        return None
    nans = int(torch.isnan(out).sum())
    infs = int(torch.isinf(out).sum())
    return f"{nans} NaN and {infs} infinite entries out of {out.numel()}"


class Denoiser(abc.ABC):
    """A map from noisy images to denoised images, with what is known about it.

    Subclasses call ``super().__init__`` and implement ``_denoise``.

    Parameters
    ----------
    name : str
        Short name used in reports and error messages.
    sigma : float, optional
        The strength: the noise level the denoiser is set for, in the image's
        intensity units (e.g. 0.1 for noise of standard deviation 25.5 on a
        0-255 scale after dividing by 255).
    differentiable : bool
        True when the map can be differentiated with torch autograd and
        ``torch.func`` (``apply_traced`` is then available).
    facts : iterable of Fact
        What is known about the map.

    Notes
    -----
    Contract for ``_denoise(t)``: ``t`` is a float32 or float64 tensor shaped
    ``(H, W)`` or ``(N, C, H, W)``; the result has the same shape, dtype and
    device; ``t`` is never written into; no ``torch.no_grad`` inside (the
    entry points decide about autograd).

    ``lowest_sigma`` is the lowest strength the denoiser accepts (0 unless a
    subclass knows better, e.g. a network's trained range); a refusal
    suggests lowering the strength only above it.
    """

    lowest_sigma: float = 0.0

    def __init__(
        self,
        *,
        name: str,
        sigma: float | None = None,
        differentiable: bool = False,
        facts: Iterable[Fact] = (),
    ):
        if not isinstance(name, str) or not name:
            raise TypeError(f"`name` must be a non-empty string, got {name!r}")
        if not isinstance(differentiable, bool):
            raise TypeError(f"`differentiable` must be a bool, got {differentiable!r}")
        facts = tuple(facts)
        for fact in facts:
            if not isinstance(fact, Fact):
                raise TypeError(f"`facts` must hold Fact objects, got {type(fact).__name__}")
        self._name = name
        self._sigma = None if sigma is None else positive_number(sigma, "sigma")
        self._differentiable = differentiable
        self._facts = facts
        self._checked = False

    # ------------------------------------------------------------ attributes
    @property
    def name(self) -> str:
        """Short name used in reports and error messages."""
        return self._name

    @property
    def sigma(self) -> float | None:
        """The strength (noise level in intensity units), or None when not set."""
        return self._sigma

    @property
    def differentiable(self) -> bool:
        """True when ``apply_traced`` may be used (autograd / ``torch.func``)."""
        return self._differentiable

    @property
    def facts(self) -> tuple[Fact, ...]:
        """What is known about the map (possibly nothing)."""
        return self._facts

    # ---------------------------------------------------------- entry points
    def __call__(self, x: ArrayLike) -> ArrayLike:
        """Denoise ``x``.

        Parameters
        ----------
        x : numpy.ndarray or torch.Tensor
            ``(H, W)`` or ``(N, C, H, W)``, float32 or float64, finite. Never
            modified.

        Returns
        -------
        numpy.ndarray or torch.Tensor
            Same kind, shape, dtype and device as ``x``.

        Raises
        ------
        TypeError, ValueError
            If ``x`` is not a finite float32/float64 array of a valid layout.
        DenoiserError
            If the denoiser returns a wrong shape or non-finite values.
        """
        tensor, kind = to_tensor(x, "x")
        out = self.apply(tensor)
        problem = _non_finite_text(out)
        if problem is not None:
            raise DenoiserError(
                f"denoiser {self.name!r} returned {problem} for an input of shape "
                f"{tuple(tensor.shape)}"
            )
        return from_tensor(out, kind)

    def precision(self, dtype: torch.dtype) -> torch.dtype:
        """The dtype the map computes in for an input of ``dtype``.

        The input's own dtype unless the map runs at a fixed precision (a
        network runs in its weights' precision: a float64 input is cast to
        float32 once, the output cast back). The check and the run monitor
        allow for rounding at the coarser of the two precisions
        (:meth:`rounding_eps`).
        """
        return dtype

    @contextmanager
    def at_input_precision(self) -> Iterator[None]:
        """Within the block, compute at the input's own precision (what :meth:`precision` reports).

        The check probes a denoiser inside this block: pairs closer than a
        coarser precision's rounding would otherwise say nothing, and
        expansions at small scales would go unseen (measured: the residual
        network's refutation on 64 x 64 float64 samples). A no-op for maps
        that always compute at the input's precision.
        """
        yield

    def rounding_eps(self, dtype: torch.dtype) -> float:
        """Machine epsilon of the coarser of ``dtype`` and :meth:`precision` of ``dtype``."""
        return max(torch.finfo(dtype).eps, torch.finfo(self.precision(dtype)).eps)

    def potential_at(self, t: torch.Tensor) -> Any:
        """The potential ``g`` at ``t`` when ``D = I - grad g`` with ``g`` computable, else None.

        Returns a :class:`~pnpguard.denoisers.PotentialPoint` (value now,
        gradient on demand) for gradient-step denoisers; None (the default)
        for every other denoiser.
        """
        return None

    def tolerance_driver(self) -> Callable[[torch.Tensor, float], torch.Tensor] | None:
        """For an inexactly computed map: ``apply(t, tol)`` computing it to RMS error ``tol`` per pixel.

        None (the default) when the denoiser is exact or its error cannot be
        tightened. The solvers use a driver to make the errors of a run
        summable (see :func:`pnpguard.forward_backward`). Each call returns a
        new driver, whose state (warm starts) is private to one run.
        """
        return None

    def apply(self, t: torch.Tensor) -> torch.Tensor:
        """The fast path used inside iterations, without autograd.

        Parameters
        ----------
        t : torch.Tensor
            float32 or float64, ``(H, W)`` or ``(N, C, H, W)``. Validated on
            the first call only.

        Returns
        -------
        torch.Tensor
            Same shape, dtype and device. The output shape is checked on every
            call; finiteness on the first call only (the solvers monitor the
            finiteness of their iterates).
        """
        with torch.no_grad():
            return self._run(t)

    def apply_traced(self, t: torch.Tensor) -> torch.Tensor:
        """The same map as :meth:`apply`, differentiable by autograd and ``torch.func``.

        Raises
        ------
        TypeError
            If the denoiser is not differentiable.
        """
        if not self.differentiable:
            raise TypeError(
                f"denoiser {self.name!r} is not differentiable (differentiable=False); use "
                "`apply` and derivative-free checks, or wrap a torch implementation"
            )
        return self._run(t)

    def _run(self, t: torch.Tensor) -> torch.Tensor:
        if not self._checked:
            self._check_input(t)
        out = self._denoise(t)
        if not isinstance(out, torch.Tensor) or out.shape != t.shape:
            got = tuple(out.shape) if isinstance(out, torch.Tensor) else type(out).__name__
            raise DenoiserError(
                f"denoiser {self.name!r} returned {got} for an input of shape "
                f"{tuple(t.shape)}; a denoiser must return an image of its input's shape"
            )
        if not self._checked:
            if out.dtype != t.dtype or out.device != t.device:
                raise DenoiserError(
                    f"denoiser {self.name!r} returned dtype {out.dtype} on {out.device} for an "
                    f"input of dtype {t.dtype} on {t.device}"
                )
            problem = _non_finite_text(out)
            if problem is not None:
                raise DenoiserError(
                    f"denoiser {self.name!r} returned {problem} for an input of shape "
                    f"{tuple(t.shape)} (first call)"
                )
            self._checked = True
        return out

    def _check_input(self, t: Any) -> None:
        if not isinstance(t, torch.Tensor):
            raise TypeError(
                f"`t` must be a torch tensor (use the denoiser's __call__ for numpy arrays), "
                f"got {type(t).__name__}"
            )
        if t.dtype not in _FLOAT_DTYPES:
            raise TypeError(f"`t` has dtype {t.dtype}; expected torch.float32 or torch.float64")
        if t.ndim not in (2, 4):
            raise ValueError(f"`t` must be shaped (H, W) or (N, C, H, W), got {tuple(t.shape)}")

    @abc.abstractmethod
    def _denoise(self, t: torch.Tensor) -> torch.Tensor:
        """The map on a float tensor ``(H, W)`` or ``(N, C, H, W)`` (see class Notes)."""

    # ------------------------------------------------------------------ repr
    def __repr__(self) -> str:
        sigma = "" if self.sigma is None else f" sigma={self.sigma:g}"
        if self.facts:
            known = "; ".join(
                f"{f.kind} ({'verified' if f.verified else 'unverified'})" for f in self.facts
            )
        else:
            known = "no facts"
        return f"<{type(self).__name__.lstrip('_')} {self.name!r}{sigma}, {known}>"
