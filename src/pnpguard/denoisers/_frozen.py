"""A torch network frozen for inference, with a copy per dtype and device."""

from __future__ import annotations

import copy

import torch
from torch import nn


class FrozenNetwork:
    """A private, frozen copy of a network, and copies of it in each dtype and device asked for.

    The network is deep-copied (later changes to the caller's module do not
    reach it), put in evaluation mode and its parameters stop requiring
    gradients; :meth:`like` returns the copy that matches a tensor (a float64
    input runs a float64 network), :meth:`on` the copy in the weights' own
    dtype on a device.
    """

    def __init__(self, module: nn.Module):
        if not isinstance(module, nn.Module):
            raise TypeError(f"`module` must be a torch.nn.Module, got {type(module).__name__}")
        self.module = copy.deepcopy(module).eval()
        for parameter in self.module.parameters():
            parameter.requires_grad_(False)
        self._copies: dict[tuple[torch.dtype, torch.device], nn.Module] = {}

    @property
    def dtype(self) -> torch.dtype:
        """The weights' dtype (float32 for a network without floating-point parameters)."""
        for tensor in (*self.module.parameters(), *self.module.buffers()):
            if tensor.is_floating_point():
                return tensor.dtype
        return torch.float32

    def on(self, device: torch.device) -> nn.Module:
        """The copy in the weights' own dtype on ``device``."""
        key = (self.dtype, device)
        if key not in self._copies:
            self._copies[key] = copy.deepcopy(self.module).to(device=device)
        return self._copies[key]

    def like(self, t: torch.Tensor) -> nn.Module:
        """The copy in ``t``'s dtype and on its device."""
        key = (t.dtype, t.device)
        if key not in self._copies:
            self._copies[key] = copy.deepcopy(self.module).to(dtype=t.dtype, device=t.device)
        return self._copies[key]
