"""Iteration maps of the PnP splittings, on the variable the theory is about.

Each scheme maps the governing variable ``v`` to ``(T v, x)``, where ``T`` is
the iteration map whose averagedness or contraction the guarantee certifies
and ``x`` is the image estimate that goes with ``v``.

- Forward-backward: ``T x = D(x - step grad f(x))``; estimate ``T x``
  (a denoised image).
- Douglas-Rachford (and ADMM): ``T z = z + prox_{gamma f}(2 D z - z) - D z
  = (I + R_f R_D) z / 2``; estimate ``prox_{gamma f}(2 D z - z)``, which
  equals ``D z`` at a fixed point. PnP-ADMM ``x+ = prox(z - u)``,
  ``z+ = D(x+ + u)``, ``u+ = u + x+ - z+`` is this map on ``w = x+ + u``
  (Gabay 1983; Eckstein & Bertsekas 1992): its iterates are
  ``z = D w``, ``u = w - D w``, ``x = prox(2 D w - w)``.

References
----------
.. [1] J. Eckstein and D. P. Bertsekas, "On the Douglas-Rachford splitting
   method and the proximal point algorithm for maximal monotone operators",
   Math. Program. 55 (1992) 293-318, doi:10.1007/BF01581204.
.. [2] S. V. Venkatakrishnan, C. A. Bouman and B. Wohlberg, "Plug-and-play
   priors for model based reconstruction", IEEE GlobalSIP 2013,
   doi:10.1109/GlobalSIP.2013.6737048.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Protocol

import torch

from ..denoisers import Denoiser
from ..fidelity import LeastSquares


class Scheme(Protocol):
    """An iteration map ``T`` built from a data term, a denoiser and a parameter."""

    def __init__(self, fidelity: LeastSquares, denoiser: Denoiser, step: float) -> None: ...

    def __call__(self, v: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]: ...

    def denoiser_input(self, v: torch.Tensor) -> torch.Tensor: ...


@dataclass(frozen=True)
class ForwardBackward:
    """``T x = D(x - step grad f(x))``."""

    fidelity: LeastSquares
    denoiser: Denoiser
    step: float

    def __call__(self, v: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        image = self.denoiser.apply(self.denoiser_input(v))
        return image, image

    def denoiser_input(self, v: torch.Tensor) -> torch.Tensor:
        """What the denoiser is applied to at ``v``: ``v - step grad f(v)``."""
        return v - self.step * self.fidelity.apply_grad(v)


@dataclass(frozen=True)
class DouglasRachford:
    """``T z = z + prox_{gamma f}(2 D z - z) - D z``."""

    fidelity: LeastSquares
    denoiser: Denoiser
    step: float

    def __call__(self, v: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        denoised = self.denoiser.apply(v)
        data_step = self.fidelity.apply_prox(2.0 * denoised - v, self.step)
        return v + data_step - denoised, data_step

    def denoiser_input(self, v: torch.Tensor) -> torch.Tensor:
        """What the denoiser is applied to at ``v``: ``v`` itself."""
        return v
