"""The network architectures of this package: one record each, read by training and loading."""

from __future__ import annotations

from dataclasses import dataclass

from torch import nn

from ._averaged import AveragedCNN
from ._gradient_step import GradientStepNetwork
from ._multiscale import MultiscaleResidualCNN
from ._residual import ResidualCNN


@dataclass(frozen=True)
class Architecture:
    """One trainable network architecture.

    Attributes
    ----------
    name : str
        The ``architecture`` argument of :func:`~pnpguard.learned.train_denoiser`.
    network : type
        The :class:`torch.nn.Module` class it builds; its class name is what
        weights files record (see :mod:`pnpguard.learned._weights`).
    """

    name: str
    network: type[nn.Module]

    @property
    def class_name(self) -> str:
        """The name weights files record for this architecture."""
        return self.network.__name__


_TABLE = (
    Architecture("averaged", AveragedCNN),
    Architecture("gradient-step", GradientStepNetwork),
    Architecture("multiscale", MultiscaleResidualCNN),
    Architecture("residual", ResidualCNN),
)

#: The architectures by user name (the ``architecture`` argument of training).
BY_NAME: dict[str, Architecture] = {entry.name: entry for entry in _TABLE}
#: The same records by the class name stored in weights files.
BY_CLASS_NAME: dict[str, Architecture] = {entry.class_name: entry for entry in _TABLE}
