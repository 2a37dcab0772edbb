"""Per-dtype, per-device copies of an operator's fixed arrays."""

from __future__ import annotations

import torch


class TransferCache:
    """A float64 array (real or complex) kept once per (dtype, device) it meets."""

    def __init__(self, master: torch.Tensor):
        self.master = master
        self._copies: dict[tuple[torch.dtype, torch.device], torch.Tensor] = {}

    def _copy(self, dtype: torch.dtype, device: torch.device) -> torch.Tensor:
        key = (dtype, device)
        if key not in self._copies:
            self._copies[key] = self.master.to(device=device, dtype=dtype)
        return self._copies[key]

    def like(self, x: torch.Tensor) -> torch.Tensor:
        """The complex array in the complex dtype matching real tensor ``x``."""
        return self._copy(torch.complex64 if x.dtype == torch.float32 else torch.complex128, x.device)

    def like_real(self, x: torch.Tensor) -> torch.Tensor:
        """The real array in ``x``'s dtype and device."""
        return self._copy(x.dtype, x.device)
